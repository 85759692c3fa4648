package storetest

import (
	"slices"
	"testing"

	"github.com/deadspace-fhir/deadspace/api/store"
)

// testPutNotified checks that PutNotified answers as PutInputs and then
// SeenEvent would, and that a refused batch leaves the event counter
// where it was: a notification whose content was not stored must not pass
// for one already seen when the sender retries it.
func testPutNotified(t *testing.T, open func(t *testing.T) store.Store) {
	s := open(t)
	ctx := t.Context()
	steps := []struct {
		name   string
		inputs []store.Input
		number uint64
		want   []store.PutResult
		prev   uint64
	}{
		{"first", []store.Input{input("Patient/1", "Observation/a", "1", t0, t0, "a1")}, 4, []store.PutResult{store.PutNew}, 0},
		{"newer version", []store.Input{input("Patient/1", "Observation/a", "2", t0.Add(1), t0, "a2")}, 5, []store.PutResult{store.PutNewer}, 4},
		{"redelivery", []store.Input{input("Patient/1", "Observation/a", "2", t0.Add(1), t0, "a2")}, 5, []store.PutResult{store.PutSame}, 5},
		{"late older", []store.Input{input("Patient/1", "Observation/a", "1", t0, t0, "a1")}, 3, []store.PutResult{store.PutOlder}, 5},
	}
	for _, st := range steps {
		res, prev, err := s.PutNotified(ctx, st.inputs, t0, "Subscription/x", st.number)
		must(t, err)
		if !slices.Equal(res, st.want) || prev != st.prev {
			t.Errorf("%s: PutNotified = %v, %d; want %v, %d", st.name, res, prev, st.want, st.prev)
		}
	}
	in, err := s.Input(ctx, "Patient/1", "Observation/a")
	must(t, err)
	if in.VersionID != "2" {
		t.Errorf("stored version %s, want 2", in.VersionID)
	}
	if _, ok := dirtyOf(t, s, "Patient/1"); !ok {
		t.Error("the patient is not marked for evaluation")
	}

	bad := []store.Input{input("Patient/2", "Observation/b", "1", t0, t0, "b"), input("", "Observation/c", "1", t0, t0, "c")}
	if _, _, err := s.PutNotified(ctx, bad, t0, "Subscription/x", 9); err == nil {
		t.Fatal("a batch with an input without a subject was taken")
	}
	_, err = s.Input(ctx, "Patient/2", "Observation/b")
	mustNotFound(t, "valid input of a refused batch", err)
	if prev, err := s.SeenEvent(ctx, "Subscription/x", 6); err != nil || prev != 5 {
		t.Errorf("after a refused notification the counter is %d (%v), want 5", prev, err)
	}
}
