package storetest

import (
	"cmp"
	"errors"
	"fmt"
	"sync"
	"testing"
	"time"

	"github.com/deadspace-fhir/deadspace/api/store"
)

// A blood gas re-filed to another patient: the version that moved it
// withdraws the first patient's copy, and the first version, arriving
// late under the first patient, is older than the latest version stored
// under any patient, so it revives nothing (issue 9: late writes never
// win).
func testVersionOrderAcrossPatients(t *testing.T, open func(t *testing.T) store.Store) {
	s := open(t)
	const logical = "Observation/g"
	v1 := input("Patient/a", logical, "1", t0, t0, "v1 under a")
	v2 := input("Patient/b", logical, "2", t0.Add(time.Minute), t0, "v2 under b")
	v2.Withdrawal = []byte("withdrawn from a")

	// In order: v1 under a, then v2 moves it to b.
	if got := put(t, s, t0, v1); got[0] != store.PutNew {
		t.Fatalf("first version: %v, want PutNew", got[0])
	}
	if got := put(t, s, t0, v2); got[0] != store.PutMoved {
		t.Fatalf("moving version: %v, want PutMoved", got[0])
	}
	a, err := s.Input(t.Context(), "Patient/a", logical)
	must(t, err)
	if string(a.Payload) != "withdrawn from a" || a.VersionID != "2" {
		t.Fatalf("copy under a = %q version %s, want the withdrawal with version 2", a.Payload, a.VersionID)
	}
	if owner, err := s.Owner(t.Context(), logical); err != nil || owner != "Patient/b" {
		t.Fatalf("owner = %q, %v; want Patient/b", owner, err)
	}
	// v1 again, late: older than v2 stored under b.
	if got := put(t, s, t0, v1); got[0] != store.PutOlder {
		t.Fatalf("late first version: %v, want PutOlder", got[0])
	}
	a, err = s.Input(t.Context(), "Patient/a", logical)
	must(t, err)
	if string(a.Payload) != "withdrawn from a" {
		t.Fatalf("late first version revived the copy under a: %q", a.Payload)
	}

	// Reordered on a new store: the correction arrives first, then the
	// first version. Nothing is stored under a.
	s2 := open(t)
	if got := put(t, s2, t0, v2); got[0] != store.PutNew {
		t.Fatalf("correction first: %v, want PutNew", got[0])
	}
	if got := put(t, s2, t0, v1); got[0] != store.PutOlder {
		t.Fatalf("first version after the correction: %v, want PutOlder", got[0])
	}
	if _, err := s2.Input(t.Context(), "Patient/a", logical); !errors.Is(err, store.ErrNotFound) {
		t.Fatalf("the first version was stored under a after its correction: %v", err)
	}
}

// tieCases: two versions with the same meta.lastUpdated and versionId
// (copies without meta) are ordered by Input.Tie, which the store asks
// with the stored version's subject and payload (it cannot read a
// payload itself); without Tie they are the same version.
var tieCases = []struct {
	name string
	tie  int // what Tie answers about the stored version
	want store.PutResult
}{
	{"TieSaysNewer", 1, store.PutNewer},
	{"TieSaysOlder", -1, store.PutOlder},
	{"TieSaysSame", 0, store.PutSame},
}

func testVersionTies(t *testing.T, open func(t *testing.T) store.Store) {
	for _, tc := range tieCases {
		t.Run(tc.name, func(t *testing.T) {
			s := open(t)
			old := input("Patient/a", "Observation/t", "", time.Time{}, t0, "first copy")
			put(t, s, t0, old)
			var asked []string
			nw := input("Patient/a", "Observation/t", "", time.Time{}, t0, "second copy")
			nw.Tie = func(subject string, payload []byte) int {
				asked = append(asked, subject+" "+string(payload))
				return tc.tie
			}
			if got := put(t, s, t0, nw); got[0] != tc.want {
				t.Fatalf("second copy: %v, want %v", got[0], tc.want)
			}
			if want := []string{"Patient/a first copy"}; fmt.Sprint(asked) != fmt.Sprint(want) {
				t.Errorf("Tie asked about %q, want %q", asked, want)
			}
			in, err := s.Input(t.Context(), "Patient/a", "Observation/t")
			must(t, err)
			if want := map[bool]string{true: "second copy", false: "first copy"}[tc.want == store.PutNewer]; string(in.Payload) != want {
				t.Errorf("stored %q, want %q", in.Payload, want)
			}
		})
	}
	// Across patients: the copy under b wins the tie and moves the input;
	// the copy under a, again, loses to it; a third copy under a that
	// wins the tie against b's moves it back, though a's withdrawal
	// carries the same version and would win a tie itself (an unusable
	// version does): a withdrawal is not the version to beat while the
	// owner's copy is there.
	t.Run("AcrossPatients", func(t *testing.T) {
		s := open(t)
		ranked := func(subject, payload string, rank int) store.Input {
			in := input(subject, "Observation/t", "", time.Time{}, t0, payload)
			in.Withdrawal = []byte("moved to " + subject)
			in.Tie = func(_ string, old []byte) int {
				oldRank, ok := map[string]int{"a1": 1, "b2": 2, "a3": 3}[string(old)]
				if !ok {
					oldRank = 10 // a withdrawal
				}
				return cmp.Compare(rank, oldRank)
			}
			return in
		}
		if got := put(t, s, t0, ranked("Patient/a", "a1", 1)); got[0] != store.PutNew {
			t.Fatalf("a1: %v, want PutNew", got[0])
		}
		if got := put(t, s, t0, ranked("Patient/b", "b2", 2)); got[0] != store.PutMoved {
			t.Fatalf("b2: %v, want PutMoved", got[0])
		}
		if got := put(t, s, t0, ranked("Patient/a", "a1", 1)); got[0] != store.PutOlder {
			t.Fatalf("a1 again: %v, want PutOlder", got[0])
		}
		if got := put(t, s, t0, ranked("Patient/a", "a3", 3)); got[0] != store.PutMoved {
			t.Fatalf("a3: %v, want PutMoved (a's withdrawal of the same version must not refuse it)", got[0])
		}
		if owner, err := s.Owner(t.Context(), "Observation/t"); err != nil || owner != "Patient/a" {
			t.Errorf("owner %q, %v; want Patient/a", owner, err)
		}
		b, err := s.Input(t.Context(), "Patient/b", "Observation/t")
		must(t, err)
		if string(b.Payload) != "moved to Patient/a" {
			t.Errorf("copy under b = %q, want the withdrawal", b.Payload)
		}
	})
}

// inertCases: a version no result can use (Input.Inert) is stored
// whatever came before it, so that an older version arriving after it is
// refused; its patient is marked dirty only when it replaces a version
// stored there, and the patient it moves the input away from always is.
var inertCases = []struct {
	name        string
	before      []store.Input // stored first, then the marks cleared
	inert       store.Input
	want        store.PutResult
	wantDirty   []string
	wantClean   []string
	thenOlder   store.Input // arrives after the inert version
	olderResult store.PutResult
}{
	{name: "FirstOfItsResource",
		inert:     input("Patient/a", "Observation/x", "2", t0.Add(time.Minute), t0, "cancelled"),
		want:      store.PutNew,
		wantClean: []string{"Patient/a"},
		thenOlder: input("Patient/a", "Observation/x", "1", t0, t0, "final"), olderResult: store.PutOlder},
	{name: "ReplacesAReading",
		before:    []store.Input{input("Patient/a", "Observation/x", "1", t0, t0, "final")},
		inert:     input("Patient/a", "Observation/x", "2", t0.Add(time.Minute), t0, "entered-in-error"),
		want:      store.PutNewer,
		wantDirty: []string{"Patient/a"},
		thenOlder: input("Patient/a", "Observation/x", "1", t0, t0, "final"), olderResult: store.PutOlder},
	{name: "NamesAnotherPatient",
		before:    []store.Input{input("Patient/a", "Observation/x", "1", t0, t0, "final")},
		inert:     withWithdrawal(input("Patient/b", "Observation/x", "2", t0.Add(time.Minute), t0, "venous")),
		want:      store.PutMoved,
		wantDirty: []string{"Patient/a"},
		wantClean: []string{"Patient/b"},
		thenOlder: input("Patient/a", "Observation/x", "1", t0, t0, "final"), olderResult: store.PutOlder},
}

func withWithdrawal(in store.Input) store.Input {
	in.Withdrawal = []byte("withdrawn")
	return in
}

func testInert(t *testing.T, open func(t *testing.T) store.Store) {
	for _, tc := range inertCases {
		t.Run(tc.name, func(t *testing.T) {
			s := open(t)
			ctx := t.Context()
			if len(tc.before) > 0 {
				put(t, s, t0, tc.before...)
				for _, in := range tc.before {
					if d, ok := dirtyOf(t, s, in.Subject); ok {
						must(t, s.Commit(ctx, store.Change{Subject: in.Subject, Generation: d.Generation}, t0))
					}
				}
			}
			in := tc.inert
			in.Inert = true
			if got := put(t, s, t0, in); got[0] != tc.want {
				t.Fatalf("inert version: %v, want %v", got[0], tc.want)
			}
			stored, err := s.Input(ctx, in.Subject, in.Logical)
			must(t, err)
			if string(stored.Payload) != string(in.Payload) {
				t.Errorf("stored %q, want the inert version", stored.Payload)
			}
			for _, subj := range tc.wantDirty {
				if d, ok := dirtyOf(t, s, subj); !ok {
					t.Errorf("%s not dirty", subj)
				} else if !d.From.IsZero() {
					t.Errorf("%s dirty from %v, want the whole patient", subj, d.From)
				}
			}
			for _, subj := range tc.wantClean {
				if _, ok := dirtyOf(t, s, subj); ok {
					t.Errorf("%s dirty: an inert version replaced nothing there", subj)
				}
			}
			if got := put(t, s, t0, tc.thenOlder); got[0] != tc.olderResult {
				t.Errorf("older version after it: %v, want %v", got[0], tc.olderResult)
			}
		})
	}
}

// OnlyReplaces keeps a version only when a version of its resource is
// stored, and the check is made in the same transaction as the write.
func testOnlyReplaces(t *testing.T, open func(t *testing.T) store.Store) {
	s := open(t)
	bad := input("Patient/a", "Observation/x", "2", t0.Add(time.Minute), t0, "unusable")
	bad.OnlyReplaces = true
	if got := put(t, s, t0, bad); got[0] != store.PutSkipped {
		t.Fatalf("nothing to replace: %v, want PutSkipped", got[0])
	}
	if _, ok := dirtyOf(t, s, "Patient/a"); ok {
		t.Fatal("a skipped input marked its patient dirty")
	}
	put(t, s, t0, input("Patient/a", "Observation/x", "1", t0, t0, "usable"))
	if got := put(t, s, t0, bad); got[0] != store.PutNewer {
		t.Fatalf("replacing a stored version: %v, want PutNewer", got[0])
	}
	in, err := s.Input(t.Context(), "Patient/a", "Observation/x")
	must(t, err)
	if string(in.Payload) != "unusable" {
		t.Fatalf("stored payload %q, want the unusable version", in.Payload)
	}
}

// A commit whose expectation no longer holds fails with ErrConflict and
// leaves the ledger, the outbox, the feed and the dirty mark as they were.
func testCommitConflict(t *testing.T, open func(t *testing.T) store.Store) {
	s := open(t)
	ctx := t.Context()
	const subj = "Patient/c"
	must(t, s.MarkDirty(ctx, subj, t0))
	d, _ := dirtyOf(t, s, subj)
	first := store.Change{Subject: subj, Generation: d.Generation,
		Expect:  map[string]store.Expect{"s1": {}},
		Entries: []store.Entry{entry(subj, "s1", "k1", t0)}, Writes: []store.Write{writeFor("s1")}}
	must(t, s.Commit(ctx, first, t0))
	before, err := s.LastEvent(ctx)
	must(t, err)

	for _, tc := range []struct {
		name   string
		expect store.Expect
	}{
		{"ExpectedAbsent", store.Expect{}},
		{"OtherKey", store.Expect{Key: "k0", Status: "final"}},
		{"OtherStatus", store.Expect{Key: "k1", Status: "entered-in-error"}},
	} {
		t.Run(tc.name, func(t *testing.T) {
			must(t, s.MarkDirty(ctx, subj, t0))
			d, _ := dirtyOf(t, s, subj)
			err := s.Commit(ctx, store.Change{Subject: subj, Generation: d.Generation,
				Expect:  map[string]store.Expect{"s1": tc.expect},
				Entries: []store.Entry{entry(subj, "s1", "k2", t0)}, Writes: []store.Write{writeFor("s1")}}, t0)
			if !errors.Is(err, store.ErrConflict) {
				t.Fatalf("err = %v, want store.ErrConflict", err)
			}
			en, err := s.Entry(ctx, "s1")
			must(t, err)
			if en.Key != "k1" {
				t.Fatalf("entry key = %s after a conflict, want k1", en.Key)
			}
			if last, _ := s.LastEvent(ctx); last != before {
				t.Fatalf("feed moved from %d to %d on a conflict", before, last)
			}
			wantStats(t, s, store.Stats{OutboxDepth: 1, OldestWrite: t0, DirtyPatients: 1})
		})
	}

	// Every entry needs an expectation once any is given.
	err = s.Commit(ctx, store.Change{Subject: subj, Expect: map[string]store.Expect{"s1": {Key: "k1", Status: "final"}},
		Entries: []store.Entry{entry(subj, "s2", "k9", t0)}}, t0)
	if err == nil {
		t.Fatal("an entry without an expectation was committed")
	}
	// The right expectation commits.
	must(t, s.Commit(ctx, store.Change{Subject: subj, Expect: map[string]store.Expect{"s1": {Key: "k1", Status: "final"}},
		Entries: []store.Entry{entry(subj, "s1", "k2", t0)}}, t0))
}

// Evaluations that overlap (two replicas, or a restart while one runs)
// read the same ledger and commit the same change: exactly one commit
// lands, so the outbox holds one write and the feed one event per change.
func testOverlappingWriters(t *testing.T, open func(t *testing.T) store.Store) {
	s := open(t)
	ctx := t.Context()
	const writers = 8
	for round, key := range []string{"k1", "k2", "k3"} {
		subj := "Patient/o"
		prev := store.Expect{}
		if round > 0 {
			en, err := s.Entry(ctx, "s")
			must(t, err)
			prev = store.Expect{Key: en.Key, Status: en.Status}
		}
		lastBefore, err := s.LastEvent(ctx)
		must(t, err)
		var wg sync.WaitGroup
		var mu sync.Mutex
		won, conflicts := 0, 0
		for range writers {
			wg.Add(1)
			go func() {
				defer wg.Done()
				err := s.Commit(ctx, store.Change{Subject: subj, Expect: map[string]store.Expect{"s": prev},
					Entries: []store.Entry{entry(subj, "s", key, t0)}, Writes: []store.Write{writeFor("s")}}, t0)
				mu.Lock()
				defer mu.Unlock()
				switch {
				case err == nil:
					won++
				case errors.Is(err, store.ErrConflict):
					conflicts++
				default:
					t.Error(fmt.Errorf("writer: %w", err))
				}
			}()
		}
		wg.Wait()
		if won != 1 || conflicts != writers-1 {
			t.Fatalf("round %d: %d commits won and %d conflicted, want 1 and %d", round, won, conflicts, writers-1)
		}
		last, err := s.LastEvent(ctx)
		must(t, err)
		if last != lastBefore+1 {
			t.Fatalf("round %d: %d feed events, want 1", round, last-lastBefore)
		}
		st, err := s.Stats(ctx)
		must(t, err)
		if st.OutboxDepth != round+1 {
			t.Fatalf("round %d: outbox depth %d, want %d", round, st.OutboxDepth, round+1)
		}
	}
}
