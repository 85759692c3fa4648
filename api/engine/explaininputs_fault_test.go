package engine_test

import (
	"context"
	"encoding/json"
	"fmt"
	"maps"
	"slices"
	"testing"
	"time"

	"github.com/deadspace-fhir/deadspace/api/engine"
	"github.com/deadspace-fhir/deadspace/api/engine/enginetest"
	"github.com/deadspace-fhir/deadspace/api/store/boltstore"
	"github.com/deadspace-fhir/deadspace/derive"
	"github.com/deadspace-fhir/deadspace/fhir/decode"
)

// TestExplainListsEveryInputTheObservationCites: an auditor traces a
// written value back through Explain and expects Explain's inputs to be
// exactly the versioned references in the written Observation's
// derivedFrom (and so the Provenance's entities), no more and no fewer.
// One arterial sample reported twice (a panel and a separate PaCO2, the
// same time and value) gives values that cite both reports in derivedFrom
// (rule 3). The values that do not use PaCO2 in their own equation
// (computed mixed-expired CO2 and the airway VD/VT) still cite the second
// report in derivedFrom, but Explain lists only the inputs of the kinds the
// value's equation names, so the second report, which the written record
// cites, is missing from the explanation.
func TestExplainListsEveryInputTheObservationCites(t *testing.T) {
	at := time.Now().Add(-time.Hour).Truncate(time.Minute)
	updated := at.Add(10 * time.Minute)
	raws := []json.RawMessage{
		panelObs("gas-a", 42, at, updated),
		obs("gas-b", "1", "final", "2019-8", "mm[Hg]", 42, at, updated),
		obs("vco2", "1", "final", "60825-7", "mL/min", 200, at, updated),
		obs("ve", "1", "final", "76008-2", "L/min", 8, at, updated),
	}
	for m := -2; m <= 2; m++ {
		raws = append(raws, obs(fmt.Sprintf("et%d", m+2), "1", "final", "19891-1", "mm[Hg]", 36, at.Add(time.Duration(m)*time.Minute), updated))
	}
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
	recs, err := eng.Derivations(ctx, "Patient/w1", time.Time{}, at.Add(time.Hour), "", 100)
	if err != nil {
		t.Fatal(err)
	}
	codes := map[derive.Code]bool{}
	for _, r := range recs {
		if r.Status == "entered-in-error" {
			continue
		}
		codes[r.Code] = true
		ex, err := eng.Explain(ctx, r)
		if err != nil {
			t.Fatal(err)
		}
		var o struct {
			DerivedFrom []struct{ Reference string } `json:"derivedFrom"`
		}
		if err := json.Unmarshal(r.Payload.Observation, &o); err != nil {
			t.Fatal(err)
		}
		written := map[string]bool{}
		for _, d := range o.DerivedFrom {
			written[d.Reference] = true
		}
		explained := map[string]bool{}
		for _, in := range ex.Inputs {
			explained[in.Reading.Ref] = true
		}
		if !maps.Equal(written, explained) {
			t.Errorf("%s: the Observation's derivedFrom cites %v, Explain lists %v", r.Code,
				slices.Sorted(maps.Keys(written)), slices.Sorted(maps.Keys(explained)))
		}
	}
	if !codes[derive.CodeAirwayFraction] || !codes[derive.CodeMixedExpiredCO2] {
		t.Fatalf("the scenario derived %v; it needs the airway VD/VT and mixed-expired CO2", slices.Sorted(maps.Keys(codes)))
	}
}
