package derive_test

import (
	"fmt"
	"math"
	"testing"
	"time"

	"github.com/deadspace-fhir/deadspace/derive"
)

// Boundaries of the validity rules, one table each, cases named after the
// clinical situation.

// sourced gives r a code-table priority and a reference of its own,
// so that two sources at the same minute are two inputs.
func sourced(r derive.Reading, p int16, id string) derive.Reading {
	r.Priority = p
	r.Ref = fmt.Sprintf("Observation/%s/_history/1", id)
	return r
}

// End-tidal above arterial: the alveolar dead-space fraction is written
// negative with a warning, "down to −0.25 (end-tidal 25 % above
// arterial)". Negative gradients are described by Malley WJ, Clinical
// Blood Gases, 2005 ("Occasionally, PetCO2 may actually be higher than
// PaCO2"); the floor itself is a design choice. The floor is inclusive, and
// like every other bound of a written fraction (the implausible VD/VT of
// 0.9) it must be judged on the number written (3 decimals), not on
// floating-point noise: end-tidal exactly 25 % above arterial is −0.250
// and is written. Expected fractions are own arithmetic:
// (44.4 − 55.5)/44.4 = −11.1/44.4 = −0.25, and likewise for the others.
func TestRuleAlveolarFractionFloorIsInclusive(t *testing.T) {
	t.Parallel()
	cases := []struct {
		name      string
		paco2, et float64
		written   bool
	}{
		{"end-tidal 50 against arterial 40: exactly the floor", 40, 50, true},
		{"end-tidal 55.5 against arterial 44.4: exactly 25 % above", 44.4, 55.5, true},
		{"end-tidal 46 against arterial 36.8: exactly 25 % above", 36.8, 46, true},
		{"end-tidal 63.5 against arterial 50.8: exactly 25 % above", 50.8, 63.5, true},
		// (40 − 50.5)/40 = −0.2625: beyond the floor, inputs inconsistent.
		{"end-tidal 50.5 against arterial 40: beyond the floor", 40, 50.5, false},
	}
	for _, tc := range cases {
		t.Run(tc.name, func(t *testing.T) {
			t.Parallel()
			rs := []derive.Reading{rd(derive.KindEtCO2, -time.Minute, tc.et), rd(derive.KindEtCO2, 0, tc.et), rd(derive.KindEtCO2, time.Minute, tc.et)}
			d := derive.Derive(derive.DefaultConfig(), gasOf(tc.paco2), man60, rs)
			checkAccounts(t, d)
			v := value(d, derive.CodeAlveolarFraction)
			if got := v.Code != ""; got != tc.written {
				t.Fatalf("alveolar dead-space fraction written %v (omission %+v), want %v: the floor is −0.25 inclusive, judged as written",
					got, omission(d, derive.CodeAlveolarFraction), tc.written)
			}
			if tc.written && math.Abs(v.Value-(tc.paco2-tc.et)/tc.paco2) > 1e-9 {
				t.Errorf("AVDSF %v, want %v", v.Value, (tc.paco2-tc.et)/tc.paco2)
			}
		})
	}
}
