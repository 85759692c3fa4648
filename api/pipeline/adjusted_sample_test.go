package pipeline_test

import (
	"math"
	"slices"
	"testing"

	"github.com/deadspace-fhir/deadspace/derive"
)

// A temperature-adjusted PaCO2 (LOINC 32771-8) reported as a component of
// a blood gas is the analyser's value for that blood gas's sample, and
// only for it: the decoder gives it that gas's own reference. A second
// arterial sample drawn 40 s earlier (the first was redrawn, or two
// syringes were sent) is another sample with its own 37 °C value; it must
// keep its own PaCO2 (or have it brought to the patient's temperature with
// the in-vitro coefficient, PCO2(T) = PCO2(37) × 10^(0.019 × (T − 37)),
// J Appl Physiol 1965), never take the other sample's adjusted value. Today
// the "same sample" rule (any 32771-8 within a minute) lends the 52 mm[Hg]
// of the gas whose 37 °C value is 60 to the gas whose 37 °C value is 40,
// so that gas's PaCO2 rises from 40 to 52 in a cooled patient, where it
// should fall.
func TestAdjustedComponentBelongsToItsOwnBloodGas(t *testing.T) {
	t.Parallel()
	first := shapeObs("abg-1", loinc, "2019-8", "2025-03-01T10:15:00Z", qty(40, "mm[Hg]"))
	second := shapeObs("abg-2", loinc, "2019-8", "2025-03-01T10:15:40Z", qty(60, "mm[Hg]"))
	second["component"] = []any{component(loinc, "32771-8", qty(52, "mm[Hg]"))}
	rep := replayShapes(t, slices.Concat([]map[string]any{first, second}, minuteSeries("et", loinc, "19891-1", qty(30, "mm[Hg]"))))
	var got []*derive.Derivation
	for _, r := range rep.Results {
		if r.Derivation != nil {
			got = append(got, r.Derivation)
		}
	}
	if len(got) != 2 {
		t.Fatalf("%d derivations, want 2", len(got))
	}
	for _, d := range got {
		switch d.Gas.Value {
		case 40:
			if d.PaCO2 > 40 {
				t.Errorf("the 10:15:00 blood gas (40 mm[Hg] at 37 °C) used PaCO2 %v: the 10:15:40 gas's adjusted value, not its own sample's", d.PaCO2)
			}
		case 60:
			if math.Abs(d.PaCO2-52) > 1e-9 {
				t.Errorf("the 10:15:40 blood gas used PaCO2 %v, want its own adjusted value 52", d.PaCO2)
			}
		}
	}
}
