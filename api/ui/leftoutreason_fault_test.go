package ui

import (
	"context"
	"encoding/json"
	"strings"
	"testing"
	"time"

	"github.com/deadspace-fhir/deadspace/api/engine"
	"github.com/deadspace-fhir/deadspace/api/engine/enginetest"
	"github.com/deadspace-fhir/deadspace/api/store/boltstore"
	"github.com/deadspace-fhir/deadspace/derive"
	"github.com/deadspace-fhir/deadspace/fhir/decode"
)

// TestLiveExplainListsReadingsLeftOutNearTheBloodGas: the live Explain page
// must list "readings near the blood gas that were left out and why"
// (README); the replay report of the same data lists the artefact. An auditor
// checking a gradient needs to see that an end-tidal reading of its window
// was withdrawn (entered-in-error) and that another was left out as an
// artefact. The live adapter looks only at unusable stored readings, whose
// stored head keeps no time, and drops every one without a time; it never
// sees readings that are usable but left out (artefacts, a preferred source
// present). So the list is always empty on the live page, and when it is
// not, every entry would carry the reason entered-in-error whatever the
// real one.
func TestLiveExplainListsReadingsLeftOutNearTheBloodGas(t *testing.T) {
	at := time.Now().Add(-time.Hour).Truncate(time.Minute)
	updated := at.Add(10 * time.Minute)
	var raws []json.RawMessage
	for _, l := range faultGasWindow("lo1", "gas", 42, at, updated) {
		raws = append(raws, json.RawMessage(l))
	}
	raws = append(raws,
		json.RawMessage(faultObs("lo1", "et-withdrawn", "1", "final", "19891-1", "mm[Hg]", 37, at.Add(30*time.Second), updated)),
		json.RawMessage(faultObs("lo1", "et-artefact", "1", "final", "19891-1", "mm[Hg]", 2, at.Add(90*time.Second), updated)))
	st := enginetest.OpenStore(t, boltstore.Options{NoSync: true})
	eng, err := engine.New(engine.Config{Store: st, Decoder: decode.New(decode.Options{}), Encoder: enginetest.Encoder(t), Derive: derive.DefaultConfig()})
	if err != nil {
		t.Fatal(err)
	}
	ctx := context.Background()
	if _, err := eng.Ingest(ctx, "test", raws); err != nil {
		t.Fatal(err)
	}
	if err := eng.EvaluateNow(ctx); err != nil {
		t.Fatal(err)
	}
	// The nurse withdraws one end-tidal reading as entered in error.
	if _, err := eng.Ingest(ctx, "test", []json.RawMessage{json.RawMessage(
		faultObs("lo1", "et-withdrawn", "2", "entered-in-error", "19891-1", "mm[Hg]", 37, at.Add(30*time.Second), updated.Add(time.Minute)))}); err != nil {
		t.Fatal(err)
	}
	if err := eng.EvaluateNow(ctx); err != nil {
		t.Fatal(err)
	}
	cfg := derive.DefaultConfig()
	live := NewLive(LiveConfig{Engine: eng, Window: cfg.Window, Fall: cfg.Fall})
	tl, err := live.Timeline(ctx, "lo1")
	if err != nil {
		t.Fatal(err)
	}
	var grad string
	for _, v := range tl.Values {
		if v.Code == derive.CodeGradient && v.Status != StatusSuperseded && v.Status != StatusWithdrawn {
			grad = v.ExplainID
		}
	}
	if grad == "" {
		t.Fatalf("no current gradient: %+v", tl.Values)
	}
	ex, err := live.Explain(ctx, grad)
	if err != nil {
		t.Fatal(err)
	}
	for _, want := range []struct {
		ref    string
		reason derive.Reason
	}{
		{"Observation/et-withdrawn", derive.ReasonEnteredInError},
		{"Observation/et-artefact", derive.ReasonArtefact},
	} {
		found := false
		for _, o := range ex.LeftOut {
			if strings.Contains(o.What, want.ref+"/") || strings.Contains(o.What, want.ref+" ") {
				found = true
				if o.Reason != want.reason {
					t.Errorf("%s left out with reason %s, want %s", o.What, o.Reason, want.reason)
				}
			}
		}
		if !found {
			t.Errorf("%s (%s, in the blood gas's window) is not among the readings left out: %+v", want.ref, want.reason, ex.LeftOut)
		}
	}
}
