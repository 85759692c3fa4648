package engine

import (
	"encoding/json"
	"fmt"
	"testing"
	"time"

	"github.com/deadspace-fhir/deadspace/api/engine/enginetest"
	"github.com/deadspace-fhir/deadspace/api/store"
	"github.com/deadspace-fhir/deadspace/api/store/boltstore"
	"github.com/deadspace-fhir/deadspace/api/store/pgstore"
	"github.com/deadspace-fhir/deadspace/api/store/pgstore/pgtest"
	"github.com/deadspace-fhir/deadspace/derive"
	"github.com/deadspace-fhir/deadspace/fhir/decode"
)

// endTidalVersion is an end-tidal reading of subject, as version of the
// Observation id, updated at updated.
func endTidalVersion(subject, id, version string, v float64, at, updated time.Time) json.RawMessage {
	return json.RawMessage(fmt.Sprintf(`{"resourceType":"Observation","id":"%s","meta":{"versionId":"%s","lastUpdated":"%s"},"status":"final",`+
		`"code":{"coding":[{"system":"http://loinc.org","code":"19891-1"}]},"subject":{"reference":"%s"},"effectiveDateTime":"%s",`+
		`"valueQuantity":{"value":%g,"unit":"mm[Hg]","system":"http://unitsofmeasure.org","code":"mm[Hg]"}}`,
		id, version, updated.UTC().Format(time.RFC3339), subject, at.UTC().Format(time.RFC3339), v))
}

// openPGReplica is an engine over its own handle on the shared database at
// url, as one replica holds it; nothing runs until the test evaluates.
func openPGReplica(t *testing.T, url, holder string) (*Engine, *pgstore.Store) {
	t.Helper()
	st, err := pgstore.Open(t.Context(), url, pgstore.Options{Holder: holder})
	if err != nil {
		t.Fatal(err)
	}
	t.Cleanup(func() { _ = st.Close() })
	e, err := New(Config{Store: st, Decoder: decode.New(decode.Options{}), Encoder: enginetest.Encoder(t), Derive: derive.DefaultConfig()})
	if err != nil {
		t.Fatal(err)
	}
	return e, st
}

// liveFalls are the onsets of the fall findings in the patient's ledger
// that are not withdrawn.
func liveFalls(t *testing.T, e *Engine, st store.Store, subject string) []time.Time {
	t.Helper()
	ledger, err := st.Ledger(t.Context(), subject)
	if err != nil {
		t.Fatal(err)
	}
	var onsets []time.Time
	for _, en := range ledger {
		if !isFall(en) || en.Status == statusWithdrawn {
			continue
		}
		var p EntryPayload
		if err := json.Unmarshal(en.Payload, &p); err != nil {
			t.Fatal(err)
		}
		if err := e.loadResult(t.Context(), &p); err != nil || p.Fall == nil {
			t.Fatalf("fall entry's result: %+v, %v", p, err)
		}
		onsets = append(onsets, p.Fall.Onset)
	}
	return onsets
}

// Replicas on PostgreSQL keep the fall detector's state between a
// patient's evaluations, as the embedded store's single process does, but
// only while no other replica evaluated the patient in between. Here
// replica A evaluates an hour of steady end-tidal readings (its states are
// saved minutes before the end); replica B takes in corrections that
// lower the last 25 minutes into a sustained fall and evaluates, finding
// one fall; then a new low reading reaches A. Resumed from its saved
// state, which has not seen the corrections, A would find the fall again
// a second time, from its state on; it must find what one evaluation of
// everything finds: the one fall, once.
func TestReplicaDoesNotResumeAfterAnotherReplicaEvaluated(t *testing.T) {
	t.Parallel()
	url := pgtest.NewSchema(t)
	a, stA := openPGReplica(t, url, "replica-a")
	b, stB := openPGReplica(t, url, "replica-b")
	ctx := t.Context()
	const subject = "Patient/fs-0"
	now := time.Now().UTC().Truncate(time.Minute)
	first := now.Add(-time.Hour)
	var history, corrections []json.RawMessage
	for m := 60; m > 0; m-- {
		at := now.Add(-time.Duration(m) * time.Minute)
		id := fmt.Sprintf("et-%d", m)
		history = append(history, endTidalVersion(subject, id, "1", 38, at, first))
		if m <= 25 {
			corrections = append(corrections, endTidalVersion(subject, id, "2", 25, at, now))
		}
	}
	latest := endTidalVersion(subject, "et-0", "1", 25, now, now)

	ingestAndEvaluate := func(e *Engine, raws []json.RawMessage) {
		t.Helper()
		if _, err := e.Ingest(ctx, "test", raws); err != nil {
			t.Fatal(err)
		}
		if err := e.EvaluateNow(ctx); err != nil {
			t.Fatal(err)
		}
	}
	ingestAndEvaluate(a, history)
	if _, ok := a.fallStates.Load(subject); !ok {
		t.Fatal("replica A kept no detector state over PostgreSQL")
	}
	ingestAndEvaluate(b, corrections)
	ingestAndEvaluate(a, []json.RawMessage{latest})

	// One evaluation of everything, on a store of its own.
	ref := enginetest.OpenStore(t, boltstore.Options{NoSync: true})
	whole, err := New(Config{Store: ref, Decoder: decode.New(decode.Options{}), Encoder: enginetest.Encoder(t), Derive: derive.DefaultConfig()})
	if err != nil {
		t.Fatal(err)
	}
	ingestAndEvaluate(whole, append(append(history, corrections...), latest))
	want := liveFalls(t, whole, ref, subject)
	if len(want) != 1 {
		t.Fatalf("one evaluation of everything found falls at %v, want one (the test's data is wrong)", want)
	}
	for name, st := range map[string]store.Store{"A": stA, "B": stB} {
		got := liveFalls(t, a, st, subject)
		if len(got) != 1 || !got[0].Equal(want[0]) {
			t.Errorf("read through replica %s, the ledger holds falls at %v, want one at %v", name, got, want[0])
		}
	}
}
