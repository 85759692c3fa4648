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
	"github.com/deadspace-fhir/deadspace/fhir/encode"
)

// panelObs is an arterial blood gas panel (LOINC 24336-0) whose PaCO2 is
// its 2019-8 component.
func panelObs(id string, v float64, at, updated time.Time) json.RawMessage {
	return json.RawMessage(fmt.Sprintf(`{"resourceType":"Observation","id":"%s","meta":{"versionId":"1","lastUpdated":"%s"},"status":"final",`+
		`"code":{"coding":[{"system":"http://loinc.org","code":"24336-0"}]},"subject":{"reference":"Patient/w1"},"effectiveDateTime":"%s",`+
		`"component":[{"code":{"coding":[{"system":"http://loinc.org","code":"2019-8"}]},"valueQuantity":{"value":%g,"unit":"mm[Hg]","system":"http://unitsofmeasure.org","code":"mm[Hg]"}}]}`,
		id, updated.UTC().Format(time.RFC3339), at.UTC().Format(time.RFC3339), v))
}

// TestSameSampleOneSeriesWhicheverArrivesFirst: a laboratory sends one
// arterial sample as the panel and as a separate PaCO2 Observation, in
// either order and in separate notifications. The live engine ends with
// one series per derived code, filed under the same blood gas (the one
// derive prefers, whatever arrived first), with the key that cites both
// reports: the one replay computes. When the report derive does not
// prefer arrived first, the values written from it alone are withdrawn
// once the other arrives, and nothing else is written twice. The rule
// (one sample, one set of values) is common practice.
func TestSameSampleOneSeriesWhicheverArrivesFirst(t *testing.T) {
	at := time.Now().Add(-time.Hour).Truncate(time.Minute)
	updated := at.Add(10 * time.Minute)
	panel := panelObs("gas-a", 42, at, updated)
	separate := obs("gas-b", "1", "final", "2019-8", "mm[Hg]", 42, at, updated)
	var et []json.RawMessage
	for m := -2; m <= 2; m++ {
		et = append(et, obs(fmt.Sprintf("et%d", m+2), "1", "final", "19891-1", "mm[Hg]", 36, at.Add(time.Duration(m)*time.Minute), updated))
	}
	wantSeries := func(code derive.Code) string {
		s, err := encode.GasSeries(code, "Observation/gas-a")
		if err != nil {
			t.Fatal(err)
		}
		return s
	}
	cases := []struct {
		name      string
		first     json.RawMessage
		second    json.RawMessage
		withdrawn int // series withdrawn on the way
	}{
		{"the panel first", panel, separate, 0},
		{"the separate PaCO2 first", separate, panel, 2}, // gradient and alveolar fraction from it alone
	}
	final := make([]map[string]string, len(cases))
	for i, tc := range cases {
		t.Run(tc.name, func(t *testing.T) {
			st := enginetest.OpenStore(t, boltstore.Options{NoSync: true})
			eng, err := engine.New(engine.Config{Store: st, Decoder: decode.New(decode.Options{}), Encoder: enginetest.Encoder(t), Derive: derive.DefaultConfig()})
			if err != nil {
				t.Fatal(err)
			}
			ctx := context.Background()
			for _, raws := range [][]json.RawMessage{append(slices.Clone(et), tc.first), {tc.second}} {
				if _, err := eng.Ingest(ctx, "test", raws); err != nil {
					t.Fatal(err)
				}
				if err := eng.EvaluateNow(ctx); err != nil {
					t.Fatal(err)
				}
			}
			recs, err := eng.Derivations(ctx, "Patient/w1", time.Time{}, at.Add(time.Hour), "", 100)
			if err != nil {
				t.Fatal(err)
			}
			live := map[string]string{}
			withdrawn := 0
			for _, r := range recs {
				if r.Status == "entered-in-error" {
					withdrawn++
					continue
				}
				if r.Series != wantSeries(r.Code) {
					t.Errorf("%s filed under series %s, want the panel's %s", r.Code, r.Series, wantSeries(r.Code))
				}
				if _, dup := live[string(r.Code)]; dup {
					t.Errorf("%s written twice for one sample", r.Code)
				}
				live[string(r.Code)] = r.Key
				rec, err := eng.Derivation(ctx, r.Key)
				if err != nil {
					t.Fatal(err)
				}
				ex, err := eng.Explain(ctx, rec)
				if err != nil {
					t.Fatal(err)
				}
				cited := map[string]bool{ex.Derivation.Gas.Ref: true}
				for _, s := range ex.Derivation.Used {
					if s.Kind == derive.KindPaCO2 {
						for _, rd := range s.Readings {
							cited[rd.Ref] = true
						}
					}
				}
				if !cited["Observation/gas-a/_history/1"] || !cited["Observation/gas-b/_history/1"] {
					t.Errorf("%s cites %v, want both reports of the sample", r.Code, slices.Sorted(maps.Keys(cited)))
				}
			}
			if len(live) == 0 {
				t.Fatal("nothing derived")
			}
			if withdrawn != tc.withdrawn {
				t.Errorf("%d series withdrawn, want %d", withdrawn, tc.withdrawn)
			}
			final[i] = live
		})
	}
	if !maps.Equal(final[0], final[1]) {
		t.Errorf("the final values depend on the order of arrival:\n%v\n%v", final[0], final[1])
	}
}

// TestLaterBloodGasTakesBackAnAdjustedPaCO2: a separate
// temperature-adjusted PaCO2 (32771-8) 40 s after a blood gas is that
// sample's until a second syringe sampled 80 s after the first arrives;
// then it is as near both and neither uses it. The live engine derives
// the first blood gas again when the second arrives (a blood gas reaches
// 2 min either side), as replay of the same data would derive it. The
// rule (neither, when as near) is a design choice.
func TestLaterBloodGasTakesBackAnAdjustedPaCO2(t *testing.T) {
	at := time.Now().Add(-time.Hour).Truncate(time.Minute)
	updated := at.Add(10 * time.Minute)
	st := enginetest.OpenStore(t, boltstore.Options{NoSync: true})
	eng, err := engine.New(engine.Config{Store: st, Decoder: decode.New(decode.Options{}), Encoder: enginetest.Encoder(t), Derive: derive.DefaultConfig()})
	if err != nil {
		t.Fatal(err)
	}
	ctx := context.Background()
	first := []json.RawMessage{
		obs("gas-1", "1", "final", "2019-8", "mm[Hg]", 42, at, updated),
		obs("adj", "1", "final", "32771-8", "mm[Hg]", 36, at.Add(40*time.Second), updated),
	}
	for m := -2; m <= 3; m++ {
		first = append(first, obs(fmt.Sprintf("et%d", m+2), "1", "final", "19891-1", "mm[Hg]", 30, at.Add(time.Duration(m)*time.Minute), updated))
	}
	paco2 := func() float64 {
		t.Helper()
		recs, err := eng.Derivations(ctx, "Patient/w1", time.Time{}, at.Add(time.Hour), "", 100)
		if err != nil {
			t.Fatal(err)
		}
		for _, r := range recs {
			if r.Code != derive.CodeGradient || r.Status == "entered-in-error" || !r.EffectiveAt.Equal(at) {
				continue
			}
			ex, err := eng.Explain(ctx, r)
			if err != nil {
				t.Fatal(err)
			}
			return ex.Derivation.PaCO2
		}
		t.Fatal("no gradient of the first blood gas")
		return 0
	}
	for i, raws := range [][]json.RawMessage{first, {obs("gas-2", "1", "final", "2019-8", "mm[Hg]", 48, at.Add(80*time.Second), updated)}} {
		if _, err := eng.Ingest(ctx, "test", raws); err != nil {
			t.Fatal(err)
		}
		if err := eng.EvaluateNow(ctx); err != nil {
			t.Fatal(err)
		}
		want := []float64{36, 42}[i]
		if got := paco2(); got != want {
			t.Errorf("after step %d the first blood gas uses PaCO2 %v, want %v", i+1, got, want)
		}
	}
}
