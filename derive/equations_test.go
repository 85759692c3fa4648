package derive_test

import (
	"errors"
	"math"
	"testing"

	"github.com/deadspace-fhir/deadspace/derive"
)

// near reports whether got is within tol of want.
func near(got, want, tol float64) bool { return math.Abs(got-want) <= tol }

func TestEquations(t *testing.T) {
	t.Parallel()
	cases := []struct {
		name      string
		got, want float64
		tol       float64
	}{
		// Worked example: PaCO2 40, PĒCO2 27, VT 500 → 0.325, 162.5 mL (a
		// published teaching example: "0.325 x 500 … 162.5 ml"). Enghoff
		// form from Anderson & Breen, Crit Care 2000;4:207.
		{"teaching example Enghoff fraction", derive.EnghoffFraction(40, 27), 0.325, 1e-12},
		{"teaching example dead-space volume", derive.DeadSpaceVolume(derive.EnghoffFraction(40, 27), 500), 162.5, 1e-9},
		// The common-practice check case: PaCO2 40, PĒCO2 28 → 0.30,
		// and 150 mL of a 500 mL breath.
		{"common-practice Enghoff fraction", derive.EnghoffFraction(40, 28), 0.30, 1e-12},
		{"common-practice dead-space volume", derive.DeadSpaceVolume(derive.EnghoffFraction(40, 28), 500), 150, 1e-9},
		// Worked example: VT 500 mL × 14 /min with VD 150 mL gives VE 7 L/min
		// and VA = (VT − VD) × RR = 4.9 L/min (a published teaching example;
		// formula from Medbullets: "VA = (TV - VD) x RR"). Our per-minute form with
		// VE 7 and VD/VT 0.3 must give the same.
		{"teaching example alveolar ventilation", derive.AlveolarVentilation(7, 0.3), 4.9, 1e-12},
		{"teaching example (VT-VD)*RR cross-check", derive.AlveolarVentilation(500*14/1000.0, 150.0/500), (500 - 150) * 14 / 1000.0, 1e-12},
		// Own arithmetic on the published formula of Siddiki et al. (Crit
		// Care 2010;14:R141), "1 − [(0.86 × VCO2)/(VE × PaCO2)]", with the
		// constant 0.863 (common practice): VCO2 200, VE 6, PaCO2 40 →
		// PĒCO2 28.767, VD/VT 0.2808.
		{"Siddiki mixed-expired PCO2", derive.MixedExpiredFromVCO2(200, 6), 28.767, 5e-4},
		{"Siddiki Enghoff from computed PĒCO2", derive.EnghoffFraction(40, derive.MixedExpiredFromVCO2(200, 6)), 0.2808, 5e-5},
		{"computed PĒCO2 equals Siddiki's closed form", derive.EnghoffFraction(40, derive.MixedExpiredFromVCO2(200, 6)), 1 - 0.863*200/(6*40), 1e-12},
		// Own arithmetic on the published formula of Sinha et al. (Br J
		// Anaesth 2009;102:692): VE 10 000 mL/min, PaCO2 50, PBW 70 → 1.905.
		{"Sinha ventilatory ratio", derive.VentilatoryRatio(10000, 50, 70), 1.905, 5e-4},
		// Sinha 2009: "A value close to 1 is predicted for normal
		// individuals": predicted VE (100 mL/kg/min) at predicted PaCO2
		// (37.5 mm[Hg]) is exactly 1 by construction.
		{"Sinha normal is 1", derive.VentilatoryRatio(100*70, 37.5, 70), 1, 1e-12},
		// Own arithmetic on a formula recalled from memory (believed
		// Frankenfield DC et al., Crit Care Med 2010;38:288): gradient 10,
		// RR 20, age 60 → 0.576.
		{"Frankenfield estimated fraction (from memory)", derive.EstimatedFraction(10, 20, 60), 0.576, 1e-12},
		// Malley 2005: "Normally, the gradient is less than 5 mm Hg".
		// The gradient is a plain difference; 40 − 36 = 4 is own arithmetic.
		{"gradient", derive.Gradient(40, 36), 4, 0},
		// AVDSF, name from Bhalla 2015 (Respir Care 60:1548), formula from
		// memory; own arithmetic: (40 − 30)/40 = 0.25.
		{"alveolar fraction (formula from memory)", derive.AlveolarFraction(40, 30), 0.25, 1e-12},
		// Bohr with PetCO2 (Tusman 2012, Anesth Analg 114:866); own
		// arithmetic: (35 − 28)/35 = 0.2.
		{"Bohr airway fraction", derive.BohrAirwayFraction(35, 28), 0.2, 1e-12},
		// The mixed-expired constant 0.863: derivation from memory,
		// 760 × (310/273)/1000.
		{"0.863 derivation (from memory)", derive.MixedExpiredConstant, 760 * (310.0 / 273) / 1000, 1e-4},
	}
	for _, tc := range cases {
		t.Run(tc.name, func(t *testing.T) {
			t.Parallel()
			if !near(tc.got, tc.want, tc.tol) {
				t.Errorf("got %.10g, want %.10g ± %g", tc.got, tc.want, tc.tol)
			}
		})
	}
}

func TestEquationsRefuseNonPositiveDenominators(t *testing.T) {
	t.Parallel()
	cases := map[string]float64{
		"alveolar PaCO2 0":   derive.AlveolarFraction(0, 30),
		"Enghoff PaCO2 -1":   derive.EnghoffFraction(-1, 30),
		"Bohr PetCO2 0":      derive.BohrAirwayFraction(0, 10),
		"mixed-expired VE 0": derive.MixedExpiredFromVCO2(200, 0),
		"VR PBW 0":           derive.VentilatoryRatio(7000, 40, 0),
	}
	for name, got := range cases {
		t.Run(name, func(t *testing.T) {
			t.Parallel()
			if !math.IsNaN(got) {
				t.Errorf("got %v, want NaN", got)
			}
		})
	}
}

func TestPredictedBodyWeight(t *testing.T) {
	t.Parallel()
	cases := []struct {
		name    string
		sex     derive.Sex
		height  float64
		want    float64
		tol     float64
		wantErr error
	}{
		// Own arithmetic on the published formula of the ARDS Network (NEJM
		// 2000;342:1301; the cm form seen only in a secondary source, its
		// wording in the paper from memory): male 175 cm → 70.566 kg.
		{name: "ARDSNet male 175 cm", sex: derive.SexMale, height: 175, want: 70.566, tol: 1e-9},
		// Same formula, female 165 cm → 56.966 kg.
		{name: "ARDSNet female 165 cm", sex: derive.SexFemale, height: 165, want: 56.966, tol: 1e-9},
		// ARDSNet protocol card, inch form: "Male PBW = 50 + 2.3[height
		// (inches) − 60]": a 70-inch man is 50 + 2.3·10 = 73 kg. 70 in is
		// 177.8 cm; the cm form gives 73.114 because the card rounds
		// 0.91 × 2.54 = 2.311 to 2.3, so they agree within 0.2 kg.
		{name: "card 70-inch male", sex: derive.SexMale, height: 70 * 2.54, want: 50 + 2.3*(70-60), tol: 0.2},
		// Card, female: 45.5 + 2.3·(64 − 60) = 54.7 kg for 64 in.
		{name: "card 64-inch female", sex: derive.SexFemale, height: 64 * 2.54, want: 45.5 + 2.3*(64-60), tol: 0.2},
		// At 152.4 cm (60 in) both forms reduce to the intercepts.
		{name: "male at 60 in", sex: derive.SexMale, height: 152.4, want: 50, tol: 1e-9},
		{name: "unknown sex", sex: derive.SexUnknown, height: 175, wantErr: derive.ErrUnknownSex},
		// Design choice: the adult formula is refused below 120 cm.
		{name: "child 110 cm", sex: derive.SexFemale, height: 110, wantErr: derive.ErrHeightOutOfRange},
		{name: "at the adult limit", sex: derive.SexFemale, height: 120, want: 45.5 + 0.91*(120-152.4), tol: 1e-9},
		{name: "NaN height", sex: derive.SexMale, height: math.NaN(), wantErr: derive.ErrHeightOutOfRange},
	}
	for _, tc := range cases {
		t.Run(tc.name, func(t *testing.T) {
			t.Parallel()
			got, err := derive.PredictedBodyWeight(tc.sex, tc.height)
			if !errors.Is(err, tc.wantErr) {
				t.Fatalf("err = %v, want %v", err, tc.wantErr)
			}
			if err == nil && !near(got, tc.want, tc.tol) {
				t.Errorf("PBW = %.6g kg, want %.6g ± %g", got, tc.want, tc.tol)
			}
		})
	}
}

func TestMedian(t *testing.T) {
	t.Parallel()
	cases := []struct {
		name string
		in   []float64
		want float64
	}{
		// The textbook definition (common practice): middle value, or mean
		// of the two middle values.
		{"odd", []float64{38, 30, 35}, 35},
		{"even", []float64{40, 30, 36, 34}, 35},
		{"one", []float64{7}, 7},
		{"ties", []float64{2, 2, 2, 9}, 2},
	}
	for _, tc := range cases {
		t.Run(tc.name, func(t *testing.T) {
			t.Parallel()
			in := append([]float64(nil), tc.in...)
			if got := derive.Median(in); got != tc.want {
				t.Errorf("Median(%v) = %v, want %v", tc.in, got, tc.want)
			}
			for i := range in {
				if in[i] != tc.in[i] {
					t.Fatalf("Median modified its input: %v", in)
				}
			}
		})
	}
	t.Run("empty", func(t *testing.T) {
		t.Parallel()
		if got := derive.Median(nil); !math.IsNaN(got) {
			t.Errorf("Median(nil) = %v, want NaN", got)
		}
	})
}
