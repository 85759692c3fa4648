package derive_test

import (
	"math"
	"reflect"
	"slices"
	"testing"
	"time"

	"github.com/deadspace-fhir/deadspace/derive"
)

// gasAt is a blood gas of its own resource sampled off from sampleTime.
func gasAt(id string, off time.Duration, v float64) derive.Reading {
	return derive.Reading{Ref: "Observation/" + id + "/_history/1", AtMillis: sampleTime.Add(off).UnixMilli(), Value: v, Kind: derive.KindPaCO2}
}

// A separate temperature-adjusted PaCO2 (LOINC 32771-8 as its own
// Observation) is the analyser's value for one sample. The decoder sees no
// reference from it to its blood gas, so time decides: the blood gas
// nearest in time within the minute takes it, and when two are as near
// neither does, with a reason and a note (no silent drop). The 37 °C value
// of a sample without its own adjusted value is then used as reported or
// brought to the patient's temperature with PCO2(T) = PCO2(37) ×
// 10^(0.019 × (T − 37)) (J Appl Physiol 1965). Which blood gas a value
// belongs to when two are equally near is a design choice (neither).
func TestSeparateAdjustedPaCO2GoesToOneSample(t *testing.T) {
	t.Parallel()
	at33 := 40 * math.Pow(10, 0.019*(33-37)) // J Appl Physiol 1965 coefficient
	et := etco2Every(time.Minute, 5*time.Minute, 30)
	cases := []struct {
		name      string
		other     *derive.Reading // another blood gas of the patient
		more      []derive.Reading
		pa        float64 // the PaCO2 the blood gas at sampleTime uses
		otherPa   float64 // and the other one
		ambiguous bool
	}{
		{"a lone blood gas takes the adjusted value 40 s after it", nil,
			[]derive.Reading{rd(derive.KindPaCO2Adjusted, 40*time.Second, 34)}, 34, 0, false},
		{"a redraw 90 s later: the value 30 s after the first belongs to the first", ptr(gasAt("redraw", 90*time.Second, 60)),
			[]derive.Reading{rd(derive.KindPaCO2Adjusted, 30*time.Second, 34)}, 34, 60, false},
		{"a redraw 60 s later: the value 40 s after the first belongs to the redraw", ptr(gasAt("redraw", time.Minute, 60)),
			[]derive.Reading{rd(derive.KindPaCO2Adjusted, 40*time.Second, 52)}, 40, 52, false},
		{"two syringes 80 s apart, the value 40 s from each: neither takes it", ptr(gasAt("syringe-2", 80*time.Second, 60)),
			[]derive.Reading{rd(derive.KindPaCO2Adjusted, 40*time.Second, 52)}, 40, 60, true},
		{"as near both, a cooled patient's 37 °C value is adjusted with the formula instead", ptr(gasAt("syringe-2", -80*time.Second, 40)),
			[]derive.Reading{rd(derive.KindPaCO2Adjusted, -40*time.Second, 52), rd(derive.KindBodyTemperature, -20*time.Minute, 33)}, at33, at33, true},
		// The panel and the separate PaCO2 of one sample are one blood
		// gas, not two equally near ones.
		{"one sample reported twice is not two samples", ptr(gasAt("zz-separate", 0, 40)),
			[]derive.Reading{rd(derive.KindPaCO2Adjusted, 40*time.Second, 34)}, 34, 0, false},
	}
	for _, tc := range cases {
		t.Run(tc.name, func(t *testing.T) {
			t.Parallel()
			gas := gasAt("abg", 0, 40)
			all := slices.Concat([]derive.Reading{gas}, tc.more, et)
			if tc.other != nil {
				all = append(all, *tc.other)
			}
			all = sortByTime(all)
			d := derive.Derive(derive.DefaultConfig(), gas, man60, all)
			checkAccounts(t, d)
			if math.Abs(d.PaCO2-tc.pa) > 1e-9 {
				t.Errorf("PaCO2 used %v, want %v", d.PaCO2, tc.pa)
			}
			adjRef := tc.more[0].Ref
			gotAmbiguous := slices.Contains(omittedRefs(d, derive.ReasonSampleAmbiguous), adjRef)
			if gotAmbiguous != tc.ambiguous {
				t.Errorf("adjusted value left out as ambiguous: %v, want %v (%+v)", gotAmbiguous, tc.ambiguous, d.Omitted)
			}
			if g := value(d, derive.CodeGradient); hasNote(g, "cannot be told") != tc.ambiguous {
				t.Errorf("gradient notes %q: want a note of the ambiguous value %v", g.Notes, tc.ambiguous)
			}
			if tc.other == nil || tc.otherPa == 0 {
				return
			}
			o := derive.Derive(derive.DefaultConfig(), *tc.other, man60, all)
			if math.Abs(o.PaCO2-tc.otherPa) > 1e-9 {
				t.Errorf("the other blood gas used PaCO2 %v, want %v", o.PaCO2, tc.otherPa)
			}
			if got := slices.Contains(omittedRefs(o, derive.ReasonSampleAmbiguous), adjRef); got != tc.ambiguous {
				t.Errorf("the other blood gas: adjusted value left out as ambiguous: %v, want %v", got, tc.ambiguous)
			}
		})
	}
}

func ptr[T any](v T) *T { return &v }

// A laboratory that sends one arterial sample both as the blood gas panel
// (LOINC 24336-0, PaCO2 as its 2019-8 component) and as a separate 2019-8
// Observation reports one sample, not two: one patient, one code, one
// sample time and one value (within 1 mm[Hg], a design choice: the
// coarsest common reporting step; 0.1 kPa is 0.75 mm[Hg]) give one blood
// gas, derived once and citing both reports. Different values at the same
// instant cannot both be the sample's, and nothing guesses between them
// (common practice: a discrepant result is queried with the laboratory,
// not chosen by software).
func TestSameSampleReportedTwice(t *testing.T) {
	t.Parallel()
	et := etco2Every(time.Minute, 5*time.Minute, 35)
	panel := gasAt("abg-panel", 0, 42)
	cases := []struct {
		name     string
		gases    []derive.Reading
		derived  string // the one blood gas derived ("" none)
		disagree bool
	}{
		{"panel and separate PaCO2 with the same value", []derive.Reading{panel, gasAt("abg-separate", 0, 42)}, panel.Ref, false},
		// 5.6 kPa × 7.500616 = 42.003 mm[Hg] (the conversion factor of
		// package units: 1 kPa = 7.500616 mm[Hg]).
		{"the separate one in kPa agrees after conversion", []derive.Reading{panel, gasAt("abg-separate", 0, 5.6*7.500616)}, panel.Ref, false},
		{"values 0.8 mm[Hg] apart (0.1 kPa rounding) are one sample", []derive.Reading{panel, gasAt("abg-separate", 0, 42.8)}, panel.Ref, false},
		{"the higher-priority report is preferred whatever its name", []derive.Reading{panel, func() derive.Reading {
			r := gasAt("abg-separate", 0, 42)
			r.Priority = 30
			return r
		}()}, "Observation/abg-separate/_history/1", false},
		{"three reports of one sample", []derive.Reading{panel, gasAt("abg-separate", 0, 42), gasAt("abg-copy", 0, 42.2)}, "Observation/abg-copy/_history/1", false},
		{"values 3 mm[Hg] apart at one instant: neither is used", []derive.Reading{panel, gasAt("abg-separate", 0, 45)}, "", true},
		{"a redraw a second later is another sample", []derive.Reading{panel, gasAt("abg-redraw", time.Second, 45)}, "", false},
	}
	for _, tc := range cases {
		t.Run(tc.name, func(t *testing.T) {
			t.Parallel()
			for _, order := range [][]derive.Reading{tc.gases, reversed(tc.gases)} {
				all := sortByTime(slices.Concat(order, et))
				var derived []string
				for _, gas := range order {
					d := derive.Derive(derive.DefaultConfig(), gas, man60, all)
					switch {
					case len(d.Values) > 0:
						checkAccounts(t, d)
						derived = append(derived, gas.Ref)
						g := value(d, derive.CodeGradient)
						sameInstant := 0
						for _, o := range tc.gases {
							if o.AtMillis == gas.AtMillis && o.Ref != gas.Ref {
								sameInstant++
							}
						}
						if sameInstant == 0 {
							if hasNote(g, "the same arterial sample") || len(usedOf(d, derive.KindPaCO2)) != 0 {
								t.Errorf("%s: a lone blood gas cites another report: %q %+v", gas.Ref, g.Notes, d.Used)
							}
							continue
						}
						if !hasNote(g, "the same arterial sample was reported") {
							t.Errorf("%s: gradient notes %q lack the same-sample note", gas.Ref, g.Notes)
						}
						if got := usedOf(d, derive.KindPaCO2); len(got) != sameInstant {
							t.Errorf("%s cites %d other reports, want %d", gas.Ref, len(got), sameInstant)
						}
					case tc.disagree:
						checkAccounts(t, d)
						if !slices.Contains(omittedRefs(d, derive.ReasonSampleDisagrees), gas.Ref) {
							t.Errorf("%s: omissions %+v lack %s", gas.Ref, d.Omitted, derive.ReasonSampleDisagrees)
						}
					default:
						if !slices.Contains(omittedRefs(d, derive.ReasonSameSample), gas.Ref) {
							t.Errorf("%s gave no values and is not left out as %s: %+v", gas.Ref, derive.ReasonSameSample, d.Omitted)
						}
					}
				}
				want := []string{tc.derived}
				switch {
				case tc.disagree:
					want = nil
				case tc.derived == "":
					want = nil
					for _, g := range tc.gases {
						want = append(want, g.Ref)
					}
				}
				slices.Sort(derived)
				slices.Sort(want)
				if !reflect.DeepEqual(derived, want) {
					t.Errorf("derived %v, want %v", derived, want)
				}
			}
		})
	}
}

func reversed(rs []derive.Reading) []derive.Reading {
	out := slices.Clone(rs)
	slices.Reverse(out)
	return out
}

// usedOf returns the refs of d's summary of kind k.
func usedOf(d derive.Derivation, k derive.Kind) []string {
	var out []string
	for _, s := range d.Used {
		if s.Kind == k {
			for _, r := range s.Readings {
				out = append(out, r.Ref)
			}
		}
	}
	return out
}

// A blood gas reaches the blood gases up to 2 min away: a separate
// temperature-adjusted PaCO2 halfway between them is then as near both,
// and neither uses it (see TestSeparateAdjustedPaCO2GoesToOneSample). A
// blood gas just beyond leaves the derivation as it was.
func TestReachOfABloodGas(t *testing.T) {
	t.Parallel()
	cfg := derive.DefaultConfig()
	reach := cfg.Reach(derive.KindPaCO2)
	if reach != cfg.ReachLater(derive.KindPaCO2) || reach != 2*time.Minute {
		t.Fatalf("Reach %v, ReachLater %v, want 2 min both", reach, cfg.ReachLater(derive.KindPaCO2))
	}
	gas := gasAt("abg", 0, 40)
	for _, side := range []time.Duration{1, -1} {
		base := sortByTime(slices.Concat([]derive.Reading{gas, rd(derive.KindPaCO2Adjusted, side*time.Minute, 34)}, etco2Every(time.Minute, 5*time.Minute, 30)))
		ref := derive.Derive(cfg, gas, man60, base)
		if ref.PaCO2 != 34 {
			t.Fatalf("PaCO2 %v without another blood gas, want the adjusted 34", ref.PaCO2)
		}
		within := derive.Derive(cfg, gas, man60, sortByTime(append(slices.Clone(base), gasAt("other", side*reach, 50))))
		if derivationsEqual(ref, within) {
			t.Errorf("a blood gas %v away changed nothing", side*reach)
		}
		beyond := derive.Derive(cfg, gas, man60, sortByTime(append(slices.Clone(base), gasAt("other", side*(reach+time.Millisecond), 50))))
		if !derivationsEqual(ref, beyond) {
			t.Errorf("a blood gas %v away changed the derivation", side*(reach+time.Millisecond))
		}
	}
}
