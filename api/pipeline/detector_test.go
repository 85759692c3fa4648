package pipeline_test

import (
	"fmt"
	"reflect"
	"testing"
	"time"

	"github.com/deadspace-fhir/deadspace/api/pipeline"
	"github.com/deadspace-fhir/deadspace/derive"
	"github.com/deadspace-fhir/deadspace/fhir/encode"
)

// detectorStream is four hours of one patient's minute readings: end-tidal
// CO2 from two sources of different priority, with a fall and a rise,
// ventilator readings of four kinds, a body temperature and three blood
// gases. The values are arbitrary: the tests compare two ways of
// evaluating the same data, not clinical results.
func detectorStream(base time.Time) []pipeline.Input {
	var in []pipeline.Input
	add := func(id string, k derive.Kind, v float64, m int, priority int) {
		in = append(in, pipeline.Input{Priority: priority, Reading: derive.Reading{
			Ref: fmt.Sprintf("Observation/%s-%d/_history/1", id, m), AtMillis: base.Add(time.Duration(m) * time.Minute).UnixMilli(), Value: v, Kind: k}})
	}
	for m := range 4 * 60 {
		et := 36 + float64(m%5)/2
		switch {
		case m >= 90 && m < 120:
			et = 23 + float64(m%3)/2
		case m >= 170 && m < 185:
			et = 52 + float64(m%2)
		}
		add("et", derive.KindEtCO2, et, m, 10)
		if m%7 == 3 {
			add("etlow", derive.KindEtCO2, et+3, m, 0)
		}
		add("vt", derive.KindTidalVolume, 450+float64(m%40), m, 0)
		add("rr", derive.KindRespRate, 14+float64(m%6), m, 0)
		add("mv", derive.KindMinuteVolume, 6.5+float64(m%9)/4, m, 0)
		add("vco2", derive.KindVCO2, 190+float64(m%30), m, 0)
		if m%40 == 5 {
			add("temp", derive.KindBodyTemperature, 36+float64(m%3), m, 0)
		}
	}
	for _, m := range []int{30, 150, 200} {
		add("gas", derive.KindPaCO2, 44, m, 0)
	}
	return in
}

// findings are the results without their encoding (which is stamped
// with the time it was made).
func findings(rs []pipeline.Result) []pipeline.Result {
	out := make([]pipeline.Result, 0, len(rs))
	for _, r := range rs {
		out = append(out, pipeline.Result{Subject: r.Subject, Derivation: r.Derivation, Fall: r.Fall})
	}
	return out
}

// onlyKind keeps the inputs of kind k.
func onlyKind(in []pipeline.Input, k derive.Kind) []pipeline.Input {
	var out []pipeline.Input
	for _, i := range in {
		if i.Reading.Kind == k {
			out = append(out, i)
		}
	}
	return out
}

// TestDetectorKindAloneWhenNoBloodGasIsDerived: an evaluation among whose
// inputs no blood gas is derived (all sampled before GasesFrom) gives the
// same results from the detector's kind alone as from every input, with
// the detector run whole or resumed; with a blood gas from GasesFrom on,
// Derives says so, and the other kinds make a difference (so the first
// comparison is not empty).
func TestDetectorKindAloneWhenNoBloodGasIsDerived(t *testing.T) {
	t.Parallel()
	cfg := derive.DefaultConfig()
	enc, err := encode.New(encode.DefaultOptions())
	if err != nil {
		t.Fatal(err)
	}
	base := time.Date(2026, 3, 1, 0, 0, 0, 0, time.UTC)
	all := detectorStream(base)
	const subject = "Patient/d1"
	evaluate := func(in []pipeline.Input, inc pipeline.Incremental) ([]pipeline.Result, []*pipeline.FallState) {
		t.Helper()
		res, _, saved, err := pipeline.EvaluateIncremental(cfg, enc, subject, derive.Patient{}, in, inc)
		if err != nil {
			t.Fatal(err)
		}
		return res, saved
	}
	// A state of the detector saved at 3 h 30, to resume from.
	_, saved := evaluate(all, pipeline.Incremental{SaveAt: []time.Time{base.Add(210 * time.Minute)}})
	if len(saved) != 1 {
		t.Fatalf("%d states saved, want 1", len(saved))
	}
	after := base.Add(201 * time.Minute) // after every blood gas
	for _, tc := range []struct {
		name string
		inc  pipeline.Incremental
	}{
		{"detector run whole", pipeline.Incremental{GasesFrom: after}},
		{"detector resumed", pipeline.Incremental{GasesFrom: base.Add(215 * time.Minute), Falls: saved[0]}},
	} {
		t.Run(tc.name, func(t *testing.T) {
			for _, in := range all {
				if tc.inc.Derives(in.Reading) {
					t.Fatalf("the stream has a blood gas from GasesFrom on: %+v", in.Reading)
				}
			}
			want, _ := evaluate(all, tc.inc)
			got, _ := evaluate(onlyKind(all, pipeline.DetectorKind), tc.inc)
			falls := 0
			for _, r := range want {
				if r.Fall == nil {
					t.Fatalf("a result that is not a finding: %+v", r)
				}
				falls++
			}
			if falls < 2 {
				t.Fatalf("%d findings; the stream has a fall and a rise", falls)
			}
			if g, w := findings(got), findings(want); !reflect.DeepEqual(g, w) {
				t.Errorf("from the detector's kind alone:\n%+v\nfrom every input:\n%+v", g, w)
			}
		})
	}
	t.Run("a blood gas from GasesFrom on", func(t *testing.T) {
		inc := pipeline.Incremental{GasesFrom: base.Add(200 * time.Minute)} // the last gas's sample time
		derived := 0
		for _, in := range all {
			if inc.Derives(in.Reading) {
				derived++
			}
		}
		if derived != 1 {
			t.Fatalf("Derives is true for %d inputs, want the blood gas sampled at GasesFrom", derived)
		}
		want, _ := evaluate(all, inc)
		got, _ := evaluate(onlyKind(all, pipeline.DetectorKind), inc)
		if reflect.DeepEqual(findings(got), findings(want)) {
			t.Error("a blood gas is derived, yet the other kinds made no difference")
		}
	})
}

// TestNoOmissionsLeavesTheResultsAsTheyAre: a caller that does not want
// what the inputs leave out gets the same results, and no omissions,
// whether every blood gas is derived or some, with the detector run whole
// or resumed.
func TestNoOmissionsLeavesTheResultsAsTheyAre(t *testing.T) {
	t.Parallel()
	cfg := derive.DefaultConfig()
	enc, err := encode.New(encode.DefaultOptions())
	if err != nil {
		t.Fatal(err)
	}
	base := time.Date(2026, 3, 1, 0, 0, 0, 0, time.UTC)
	all := detectorStream(base)
	_, _, saved, err := pipeline.EvaluateIncremental(cfg, enc, "Patient/d1", derive.Patient{}, all, pipeline.Incremental{SaveAt: []time.Time{base.Add(100 * time.Minute)}})
	if err != nil || len(saved) != 1 {
		t.Fatalf("saving a state: %v, %d states", err, len(saved))
	}
	for _, tc := range []struct {
		name string
		inc  pipeline.Incremental
	}{
		{"every blood gas", pipeline.Incremental{}},
		{"blood gases from 2 h 30", pipeline.Incremental{GasesFrom: base.Add(150 * time.Minute)}},
		{"detector resumed", pipeline.Incremental{GasesFrom: base.Add(110 * time.Minute), Falls: saved[0]}},
	} {
		t.Run(tc.name, func(t *testing.T) {
			want, wantOmitted, _, err := pipeline.EvaluateIncremental(cfg, enc, "Patient/d1", derive.Patient{}, all, tc.inc)
			if err != nil {
				t.Fatal(err)
			}
			tc.inc.NoOmissions = true
			got, gotOmitted, _, err := pipeline.EvaluateIncremental(cfg, enc, "Patient/d1", derive.Patient{}, all, tc.inc)
			if err != nil {
				t.Fatal(err)
			}
			if len(wantOmitted) == 0 || gotOmitted != nil {
				t.Errorf("omissions: %d with them wanted (want some), %d without (want none)", len(wantOmitted), len(gotOmitted))
			}
			derivations := 0
			for _, r := range want {
				if r.Derivation != nil {
					derivations++
				}
			}
			if derivations == 0 {
				t.Fatal("no blood gas derived: the comparison shows nothing of the derivations")
			}
			if g, w := findings(got), findings(want); !reflect.DeepEqual(g, w) {
				t.Errorf("results without omissions differ:\n%+v\nwith:\n%+v", g, w)
			}
		})
	}
}
