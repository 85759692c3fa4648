package units_test

import (
	"errors"
	"math"
	"testing"

	"github.com/deadspace-fhir/deadspace/derive"
	"github.com/deadspace-fhir/deadspace/fhir/units"
)

// A CO2 percentage whose unit names its gas conditions. The package turns a
// fraction into a partial pressure on a dry basis, PCO2 = F × PB, or a wet
// (BTPS) basis, PCO2 = F × (PB − 47) (Intensive Care Med 2004 dead-space
// article, doi 10.1007/s00134-004-2194-8: "PCO2 = FCO2 multiplied by the
// difference between barometric pressure minus water-vapour pressure"; 47
// mm[Hg] from alveolar gas tables). A sender that writes "%{BTPS}" says
// which basis its fraction is on, and the annotation is not dropped for gas
// volumes; for a percentage it is dropped today, and 5 %{BTPS} becomes
// 5 × 760 / 100 = 38.0 mm[Hg] on the site's dry basis instead of
// 5 × 713 / 100 = 35.65 mm[Hg] (own arithmetic), 6.6 % high. Expected: the
// wet basis, or a refusal as for ambient conditions; whether to convert or
// refuse is a judgement call, the silent dry basis is not.
func TestGasConditionsOfACO2Percentage(t *testing.T) {
	t.Parallel()
	cases := []struct {
		name string
		code string
	}{
		{"end-tidal CO2 of 5 % at BTPS", "%{BTPS}"},
		{"end-tidal CO2 of 5 % at BTPS, lower-case annotation", "%{btps}"},
	}
	for _, tc := range cases {
		t.Run(tc.name, func(t *testing.T) {
			t.Parallel()
			got, err := units.Convert(derive.KindEtCO2, 5, tc.code, units.Options{PercentBasis: units.BasisDry})
			var ue *units.Error
			if errors.As(err, &ue) {
				return // refused: acceptable
			}
			if err != nil || math.Abs(got.ToValue-35.65) > 1e-9 {
				t.Errorf("Convert(5 %s) = %v mm[Hg] (%q), %v; want 35.65 mm[Hg] (wet basis, as the annotation says) or a refusal", tc.code, got.ToValue, got.Text, err)
			}
		})
	}
}

// The other gas conditions on a percentage, with the same formulas: dry
// gas (STPD, ATPD) is the dry basis, 5 × 760 / 100 = 38.0 mm[Hg] even where
// the site's basis is wet; gas saturated at the room's temperature (ATPS)
// needs a water vapour pressure the service does not have and is refused;
// an annotation naming no conditions is a label and keeps the site's basis
// (wet here: 35.65 mm[Hg]). Own arithmetic.
func TestGasConditionsOfACO2PercentageOtherAnnotations(t *testing.T) {
	t.Parallel()
	cases := []struct {
		name, code string
		want       float64 // 0: refused
	}{
		{"fraction of dry gas at STPD", "%{STPD}", 38},
		{"fraction of dry gas at ATPD, lower case", "%{atpd}", 38},
		{"fraction of gas saturated at room temperature", "%{ATPS}", 0},
		{"a label naming the gas", "%{CO2}", 35.65},
		{"BTPS on a wet site", "%{BTPS}", 35.65},
	}
	for _, tc := range cases {
		t.Run(tc.name, func(t *testing.T) {
			t.Parallel()
			got, err := units.Convert(derive.KindEtCO2, 5, tc.code, units.Options{PercentBasis: units.BasisWet})
			var ue *units.Error
			if tc.want == 0 {
				if !errors.As(err, &ue) || ue.Reason != derive.ReasonUnitUnknown {
					t.Errorf("Convert(5 %s) = %v, %v; want a refusal with unit-not-recognised", tc.code, got.ToValue, err)
				}
				return
			}
			if err != nil || math.Abs(got.ToValue-tc.want) > 1e-9 {
				t.Errorf("Convert(5 %s) = %v (%q), %v; want %v mm[Hg]", tc.code, got.ToValue, got.Text, err, tc.want)
			}
		})
	}
}
