package pipeline_test

import (
	"math"
	"slices"
	"testing"

	"github.com/deadspace-fhir/deadspace/derive"
)

// The two rules of what one blood gas sample is, end to end through the
// decoder and the collector as replay runs them (the live engine runs the
// same pipeline; see TestSameSampleOneSeriesWhicheverArrivesFirst in
// api/engine).
//
// A laboratory that sends one arterial sample both as the blood gas panel
// (LOINC 24336-0, PaCO2 as its 2019-8 component) and as a separate 2019-8
// Observation reports one sample: one set of derived values, citing both
// reports in derivedFrom. Values that disagree at one instant are not
// guessed between. A separate temperature-adjusted PaCO2 (32771-8) as near
// two blood gases is used by neither, and says so. Invented data; the
// rules are design choices (one sample, one value: common practice).
func TestSameSampleEndToEnd(t *testing.T) {
	t.Parallel()
	const (
		panelRef = "Observation/abg-panel/_history/1"
		sepRef   = "Observation/abg-separate/_history/1"
		adjRef   = "Observation/adj/_history/1"
	)
	panel := func(v float64) map[string]any {
		p := shapeObs("abg-panel", loinc, "24336-0", "2025-03-01T10:15:00Z", nil)
		p["component"] = []any{component(loinc, "2019-8", qty(v, "mm[Hg]"))}
		return p
	}
	// 5.6 kPa is 42.0 mm[Hg] (1 kPa = 7.500616 mm[Hg]).
	separateKPa := shapeObs("abg-separate", loinc, "2019-8", "2025-03-01T10:15:00Z", qty(5.6, "kPa"))
	separate48 := shapeObs("abg-separate", loinc, "2019-8", "2025-03-01T10:15:00Z", qty(48, "mm[Hg]"))
	syringe2 := shapeObs("abg-2", loinc, "2019-8", "2025-03-01T10:16:20Z", qty(44, "mm[Hg]"))
	adjusted := shapeObs("adj", loinc, "32771-8", "2025-03-01T10:15:40Z", qty(36, "mm[Hg]"))
	cases := []struct {
		name       string
		gases      []map[string]any
		derived    []string // blood gases derived, in time order
		cites      []string // what every derived Observation of the first cites besides the readings
		left       map[string]derive.Reason
		valuesLeft derive.Reason // the reason of values not emitted, if any
		paco2      []float64
	}{
		{"panel and separate PaCO2 of one sample, in kPa and mm[Hg]", []map[string]any{panel(42), separateKPa},
			[]string{panelRef}, []string{panelRef, sepRef}, map[string]derive.Reason{sepRef: derive.ReasonSameSample}, "", []float64{42}},
		{"panel and separate PaCO2 that disagree at one instant", []map[string]any{panel(42), separate48},
			nil, nil, map[string]derive.Reason{panelRef: derive.ReasonSampleDisagrees, sepRef: derive.ReasonSampleDisagrees}, derive.ReasonSampleDisagrees, nil},
		{"a separate adjusted PaCO2 as near two syringes", []map[string]any{panel(42), syringe2, adjusted},
			[]string{panelRef, "Observation/abg-2/_history/1"}, []string{panelRef}, map[string]derive.Reason{adjRef: derive.ReasonSampleAmbiguous}, "", []float64{42, 44}},
	}
	for _, tc := range cases {
		t.Run(tc.name, func(t *testing.T) {
			t.Parallel()
			rep := replayShapes(t, slices.Concat(tc.gases, ventilator()))
			var ds []*derive.Derivation
			for _, r := range rep.Results {
				if r.Derivation == nil {
					continue
				}
				ds = append(ds, r.Derivation)
				if len(ds) > 1 {
					continue
				}
				for _, o := range r.Bundle.Observations {
					var from []string
					for _, ref := range o.DerivedFrom {
						if ref.Reference != nil {
							from = append(from, *ref.Reference)
						}
					}
					for _, c := range tc.cites {
						if !slices.Contains(from, c) {
							t.Errorf("%s derivedFrom %v lacks %s", *o.Code.Text, from, c)
						}
					}
				}
			}
			if len(ds) != len(tc.derived) {
				t.Fatalf("%d derivations, want %d (%v); inputs left out %+v", len(ds), len(tc.derived), tc.derived, rep.Inputs)
			}
			for i, d := range ds {
				if d.Gas.Ref != tc.derived[i] || math.Abs(d.PaCO2-tc.paco2[i]) > 1e-9 {
					t.Errorf("derivation %d of %s with PaCO2 %v, want %s with %v", i, d.Gas.Ref, d.PaCO2, tc.derived[i], tc.paco2[i])
				}
			}
			for ref, reason := range tc.left {
				if !slices.ContainsFunc(rep.Inputs, func(o derive.Omission) bool { return o.Ref == ref && o.Reason == reason }) {
					t.Errorf("%s is not left out with %s: %+v", ref, reason, rep.Inputs)
				}
			}
			if tc.valuesLeft != "" {
				n := 0
				for _, o := range rep.Values {
					if o.Reason == tc.valuesLeft {
						n++
					}
				}
				if n == 0 {
					t.Errorf("no value left out with %s: %+v", tc.valuesLeft, rep.Values)
				}
			}
		})
	}
}
