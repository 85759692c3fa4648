package engine

import (
	"context"
	"encoding/json"
	"fmt"
	"sync"
	"testing"
	"time"

	"github.com/deadspace-fhir/deadspace/api/engine/enginetest"
	"github.com/deadspace-fhir/deadspace/api/store/boltstore"
	"github.com/deadspace-fhir/deadspace/derive"
	"github.com/deadspace-fhir/deadspace/fhir/decode"
)

// reports records what Hooks.Evaluated is told.
type reports struct {
	mu   sync.Mutex
	n    int
	last map[string][]derive.Omission
}

func (r *reports) evaluated(subject string, omitted []derive.Omission) {
	r.mu.Lock()
	defer r.mu.Unlock()
	r.n++
	r.last[subject] = omitted
}

// count returns how many reports came and how many inputs the patient's
// last one left out.
func (r *reports) count(subject string) (reports, inputs int) {
	r.mu.Lock()
	defer r.mu.Unlock()
	for _, o := range r.last[subject] {
		if o.Code == "" {
			inputs++
		}
	}
	return r.n, inputs
}

func reading(id, code string, v float64, at time.Time) json.RawMessage {
	return json.RawMessage(fmt.Sprintf(`{"resourceType":"Observation","id":"%s","meta":{"versionId":"1","lastUpdated":"%s"},"status":"final",`+
		`"code":{"coding":[{"system":"http://loinc.org","code":"%s"}]},"subject":{"reference":"Patient/p1"},"effectiveDateTime":"%s",`+
		`"valueQuantity":{"value":%g,"unit":"mm[Hg]","system":"http://unitsofmeasure.org","code":"mm[Hg]"}}`,
		id, at.Add(time.Minute).UTC().Format(time.RFC3339), code, at.UTC().Format(time.RFC3339), v))
}

// TestPictureAfterIncrementalEvaluations: evaluations that derive only
// part of a patient leave the patient's picture stale, not reported; one
// refresh re-derives the patient whole once however many evaluations
// marked it, reports what a complete evaluation leaves out, and leaves a
// fresh patient alone; EvaluateNow returns with the picture reported.
func TestPictureAfterIncrementalEvaluations(t *testing.T) {
	st := enginetest.OpenStore(t, boltstore.Options{NoSync: true})
	enc := enginetest.Encoder(t)
	rep := &reports{last: map[string][]derive.Omission{}}
	e, err := New(Config{Store: st, Decoder: decode.New(decode.Options{}), Encoder: enc, Derive: derive.DefaultConfig(),
		Hooks: Hooks{Evaluated: rep.evaluated}})
	if err != nil {
		t.Fatal(err)
	}
	ctx := context.Background()
	ingest := func(raws ...json.RawMessage) {
		t.Helper()
		if _, err := e.Ingest(ctx, "test", raws); err != nil {
			t.Fatal(err)
		}
	}
	gasAt := time.Now().Add(-4 * time.Hour).Truncate(time.Minute)
	first := []json.RawMessage{reading("gas", "2019-8", 44, gasAt)}
	for m := -2; m <= 2; m++ {
		first = append(first, reading(fmt.Sprintf("near%d", m+2), "19891-1", 36, gasAt.Add(time.Duration(m)*time.Minute)))
	}
	ingest(first...)
	e.evaluateDue(ctx, true)
	// The patient's first evaluation in the process is complete, and
	// reports.
	if n, _ := rep.count("Patient/p1"); n != 1 {
		t.Fatalf("%d reports from the first evaluation, want 1", n)
	}
	// Readings far from the blood gas, one evaluation each: no pairing
	// window takes them, and they are too few for a fall baseline, so
	// replay would count each as left out (unpaired, or too sparse).
	const far = 10
	for i := range far {
		ingest(reading(fmt.Sprintf("far%d", i), "19891-1", 35, gasAt.Add(2*time.Hour+time.Duration(i)*time.Minute)))
		e.evaluateDue(ctx, true)
	}
	if n, _ := rep.count("Patient/p1"); n != 1 {
		t.Fatalf("%d more reports from incremental evaluations, want none (each knows only part of the patient)", n-1)
	}
	if got := e.stalePictures(); got != 1 {
		t.Fatalf("%d stale pictures after %d incremental evaluations of one patient, want 1", got, far+1)
	}

	if err := e.refreshPictures(ctx); err != nil {
		t.Fatal(err)
	}
	n, leftOut := rep.count("Patient/p1")
	if n != 2 || leftOut != far {
		t.Errorf("after one refresh: %d reports with %d inputs left out, want 2 reports, the last with %d", n, leftOut, far)
	}
	if got := e.stalePictures(); got != 0 {
		t.Errorf("%d stale pictures after the refresh", got)
	}
	if err := e.refreshPictures(ctx); err != nil {
		t.Fatal(err)
	}
	if n, _ := rep.count("Patient/p1"); n != 2 {
		t.Errorf("a refresh with nothing stale re-derived a patient: %d reports", n)
	}

	ingest(reading("far-last", "19891-1", 35, gasAt.Add(3*time.Hour)))
	if err := e.EvaluateNow(ctx); err != nil {
		t.Fatal(err)
	}
	if n, leftOut := rep.count("Patient/p1"); n != 3 || leftOut != far+1 {
		t.Errorf("after EvaluateNow: %d reports with %d inputs left out, want 3, the last with %d", n, leftOut, far+1)
	}
}
