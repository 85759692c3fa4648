package derive_test

import (
	"fmt"
	"math"
	"reflect"
	"slices"
	"strings"
	"testing"
	"time"

	"github.com/deadspace-fhir/deadspace/derive"
)

// sampleTime is an arbitrary instant; every test reading is placed
// relative to it.
var sampleTime = time.Date(2024, 3, 1, 10, 0, 0, 0, time.UTC)

// valueOrder is the order Derive emits values in.
var valueOrder = []derive.Code{
	derive.CodeGradient, derive.CodeAlveolarFraction, derive.CodeMixedExpiredCO2,
	derive.CodePhysiologic, derive.CodeAirwayFraction, derive.CodeDeadSpaceVolume,
	derive.CodeAlveolarVent, derive.CodeVentilatoryRatio, derive.CodeEstimatedFraction,
}

func rd(k derive.Kind, off time.Duration, v float64) derive.Reading {
	return derive.Reading{
		Ref:      fmt.Sprintf("Observation/%s%+d/_history/1", k, off.Milliseconds()),
		AtMillis: sampleTime.Add(off).UnixMilli(),
		Value:    v,
		Kind:     k,
	}
}

func gasOf(v float64) derive.Reading {
	return derive.Reading{Ref: "Observation/abg/_history/1", AtMillis: sampleTime.UnixMilli(), Value: v, Kind: derive.KindPaCO2}
}

func sortByTime(rs []derive.Reading) []derive.Reading {
	out := slices.Clone(rs)
	slices.SortStableFunc(out, func(a, b derive.Reading) int {
		switch {
		case a.AtMillis < b.AtMillis:
			return -1
		case a.AtMillis > b.AtMillis:
			return 1
		}
		return 0
	})
	return out
}

// man60 is 60 years old at sampleTime.
var man60 = derive.Patient{
	Ref:       "Patient/p1/_history/1",
	Sex:       derive.SexMale,
	BirthDate: time.Date(1964, 2, 1, 0, 0, 0, 0, time.UTC),
}

// measured is a full set of readings around the gas: PetCO2 35, PĒCO2 28,
// VT 500, VE 7, RR 14, height 175 cm a month before.
func measured() []derive.Reading {
	return []derive.Reading{
		rd(derive.KindHeight, -30*24*time.Hour, 175),
		rd(derive.KindEtCO2, -time.Minute, 35), rd(derive.KindEtCO2, 0, 35), rd(derive.KindEtCO2, time.Minute, 35),
		rd(derive.KindMixedExpiredCO2, 0, 28),
		rd(derive.KindTidalVolume, 0, 500),
		rd(derive.KindMinuteVolume, 0, 7),
		rd(derive.KindRespRate, 0, 14),
	}
}

func without(rs []derive.Reading, kinds ...derive.Kind) []derive.Reading {
	return slices.DeleteFunc(slices.Clone(rs), func(r derive.Reading) bool { return slices.Contains(kinds, r.Kind) })
}

func with(rs []derive.Reading, more ...derive.Reading) []derive.Reading {
	return append(slices.Clone(rs), more...)
}

func TestDerive(t *testing.T) {
	t.Parallel()
	// VR for the full set, own arithmetic: ARDS Network PBW (NEJM
	// 2000;342:1301) of a 175 cm man (70.566 kg), Sinha 2009 formula with
	// VE 7000 mL/min, PaCO2 40.
	vrFull := 7000 * 40 / (70.566 * 100 * 37.5)
	// Own arithmetic on the published formula of Siddiki et al. (Crit Care
	// 2010;14:R141): PĒCO2 = 0.863 × 200 / 6.
	peSiddiki := 0.863 * 200 / 6

	cases := []struct {
		name     string
		gas      float64
		patient  derive.Patient
		readings []derive.Reading
		values   map[derive.Code]float64
		omitted  map[derive.Code]derive.Reason
		check    func(t *testing.T, d derive.Derivation)
	}{
		{
			// The common-practice check case: PaCO2 40, PĒCO2 28,
			// VT 500 → VD/VT 0.30, VD 150 mL; worked example: VT 500 mL ×
			// 14 /min, VD 150 mL → VE 7 L/min, VA 4.9 L/min (a published
			// teaching example; VA = (VT − VD) × RR, Medbullets), so VE 7 and
			// VD/VT 0.3 → VA 4.9 L/min. Gradient 40 − 35 = 5 is at Malley's
			// limit; AVDSF 5/40 and Bohr (35 − 28)/35 are own arithmetic.
			name: "full set with measured PĒCO2", gas: 40, patient: man60, readings: measured(),
			values: map[derive.Code]float64{
				derive.CodeGradient:         5,
				derive.CodeAlveolarFraction: 0.125,
				derive.CodePhysiologic:      0.30,
				derive.CodeAirwayFraction:   0.2,
				derive.CodeDeadSpaceVolume:  150,
				derive.CodeAlveolarVent:     4.9,
				derive.CodeVentilatoryRatio: vrFull,
			},
			omitted: map[derive.Code]derive.Reason{
				derive.CodeMixedExpiredCO2:   derive.ReasonNotApplicable,
				derive.CodeEstimatedFraction: derive.ReasonNotApplicable,
			},
			check: func(t *testing.T, d derive.Derivation) {
				// Malley 2005: normal is "less than 5 mm Hg"; FHIR's
				// referenceRange.high is inclusive, so the boundary value 5
				// is written inside the range and flagged normal, never a
				// flag that disagrees with the range.
				if v := value(d, derive.CodeGradient); v.Flag != derive.FlagNormal || *v.Range.High != 5 {
					t.Errorf("gradient 5 flag = %v, want normal", v.Flag)
				}
				// The healthy range (board-review text, about 0.3) is kept as
				// the reference range; 0.30 is below Kallet's 0.60, no flag.
				v := value(d, derive.CodePhysiologic)
				if v.Flag != derive.FlagNone || v.Range == nil || *v.Range.Low != 0.2 || *v.Range.High != 0.35 {
					t.Errorf("physiologic flag %v range %+v", v.Flag, v.Range)
				}
				if !slices.Equal(v.Inputs, []derive.Kind{derive.KindPaCO2, derive.KindMixedExpiredCO2}) {
					t.Errorf("physiologic inputs %v", v.Inputs)
				}
				if !hasNote(v, "shunt") || hasNote(v, "markedly") {
					t.Errorf("physiologic notes %q", v.Notes)
				}
				vr := value(d, derive.CodeVentilatoryRatio)
				if !vr.UsesPatient || vr.Range == nil || *vr.Range.High != 2 || vr.Flag != derive.FlagNone || !near(term(t, vr, "PBW"), 70.566, 1e-9) || term(t, vr, "VE") != 7000 {
					t.Errorf("ventilatory ratio %+v", vr)
				}
				if !slices.Equal(usedKinds(d), []derive.Kind{
					derive.KindEtCO2, derive.KindMixedExpiredCO2, derive.KindTidalVolume,
					derive.KindMinuteVolume, derive.KindRespRate, derive.KindHeight,
				}) {
					t.Errorf("Used kinds %v", usedKinds(d))
				}
			},
		},
		{
			// Own arithmetic on the published formula of Siddiki et al.
			// (Crit Care 2010;14:R141), constant 0.863: VCO2 200, VE 6,
			// PaCO2 40 → PĒCO2 28.767, VD/VT 0.2808.
			name: "PĒCO2 computed from VCO2 and VE", gas: 40, patient: man60,
			readings: []derive.Reading{
				rd(derive.KindEtCO2, 0, 35), rd(derive.KindVCO2, 0, 200), rd(derive.KindMinuteVolume, 0, 6),
			},
			values: map[derive.Code]float64{
				derive.CodeGradient:         5,
				derive.CodeAlveolarFraction: 0.125,
				derive.CodeMixedExpiredCO2:  peSiddiki,
				derive.CodePhysiologic:      1 - peSiddiki/40,
				derive.CodeAirwayFraction:   (35 - peSiddiki) / 35,
				derive.CodeAlveolarVent:     6 * peSiddiki / 40,
			},
			omitted: map[derive.Code]derive.Reason{
				derive.CodeDeadSpaceVolume:   derive.ReasonMissingInput,
				derive.CodeVentilatoryRatio:  derive.ReasonPatientFacts,
				derive.CodeEstimatedFraction: derive.ReasonNotApplicable,
			},
			check: func(t *testing.T, d derive.Derivation) {
				if got := value(d, derive.CodePhysiologic).Value; !near(got, 0.2808, 5e-5) {
					t.Errorf("Siddiki-form VD/VT %v, want 0.2808", got)
				}
				want := []derive.Kind{derive.KindPaCO2, derive.KindVCO2, derive.KindMinuteVolume}
				for _, c := range []derive.Code{derive.CodePhysiologic, derive.CodeAlveolarVent} {
					if got := value(d, c).Inputs; !slices.Equal(got, want) {
						t.Errorf("%s inputs %v, want %v", c, got, want)
					}
				}
				if !strings.Contains(value(d, derive.CodePhysiologic).Equation, "0.863") {
					t.Errorf("equation does not name the computed PĒCO2")
				}
				if !strings.Contains(omission(d, derive.CodeDeadSpaceVolume).Detail, "tidal-volume") {
					t.Errorf("dead-space volume detail %q", omission(d, derive.CodeDeadSpaceVolume).Detail)
				}
			},
		},
		{
			// Own arithmetic on a formula recalled from memory (thought to
			// be Frankenfield DC et al., Crit Care Med 2010;38:288): gradient
			// 10, RR 20, age 60 → 0.576. The record names the method
			// without the uncertain citation.
			name: "no expired CO2: estimated fraction", gas: 40, patient: man60,
			readings: []derive.Reading{rd(derive.KindEtCO2, 0, 30), rd(derive.KindRespRate, 0, 20)},
			values: map[derive.Code]float64{
				derive.CodeGradient:          10,
				derive.CodeAlveolarFraction:  0.25,
				derive.CodeEstimatedFraction: 0.576,
			},
			omitted: map[derive.Code]derive.Reason{
				derive.CodeMixedExpiredCO2:  derive.ReasonMissingInput,
				derive.CodePhysiologic:      derive.ReasonMissingInput,
				derive.CodeAirwayFraction:   derive.ReasonMissingInput,
				derive.CodeDeadSpaceVolume:  derive.ReasonMissingInput,
				derive.CodeAlveolarVent:     derive.ReasonMissingInput,
				derive.CodeVentilatoryRatio: derive.ReasonMissingInput,
			},
			check: func(t *testing.T, d derive.Derivation) {
				v := value(d, derive.CodeEstimatedFraction)
				if !v.Estimate || !v.UsesPatient || !hasNote(v, "not a measurement") || term(t, v, "age") != 60 {
					t.Errorf("estimate %+v", v)
				}
				if strings.Contains(v.Equation, "memory") || strings.Contains(v.Equation, "believed") || strings.Contains(v.Equation, "Frankenfield") {
					t.Errorf("equation %q carries an uncertain attribution into the record", v.Equation)
				}
			},
		},
		{
			name: "estimate needs age", gas: 40, patient: derive.Patient{Sex: derive.SexFemale},
			readings: []derive.Reading{rd(derive.KindEtCO2, 0, 30), rd(derive.KindRespRate, 0, 20)},
			values:   map[derive.Code]float64{derive.CodeGradient: 10, derive.CodeAlveolarFraction: 0.25},
			omitted: map[derive.Code]derive.Reason{
				derive.CodeMixedExpiredCO2: derive.ReasonMissingInput, derive.CodePhysiologic: derive.ReasonMissingInput,
				derive.CodeAirwayFraction: derive.ReasonMissingInput, derive.CodeDeadSpaceVolume: derive.ReasonMissingInput,
				derive.CodeAlveolarVent: derive.ReasonMissingInput, derive.CodeVentilatoryRatio: derive.ReasonMissingInput,
				derive.CodeEstimatedFraction: derive.ReasonPatientFacts,
			},
		},
		{
			name: "birth date after the sample", gas: 40,
			patient:  derive.Patient{Sex: derive.SexMale, BirthDate: sampleTime.AddDate(0, 0, 1)},
			readings: []derive.Reading{rd(derive.KindEtCO2, 0, 30), rd(derive.KindRespRate, 0, 20)},
			values:   map[derive.Code]float64{derive.CodeGradient: 10, derive.CodeAlveolarFraction: 0.25},
			omitted: map[derive.Code]derive.Reason{
				derive.CodeMixedExpiredCO2: derive.ReasonMissingInput, derive.CodePhysiologic: derive.ReasonMissingInput,
				derive.CodeAirwayFraction: derive.ReasonMissingInput, derive.CodeDeadSpaceVolume: derive.ReasonMissingInput,
				derive.CodeAlveolarVent: derive.ReasonMissingInput, derive.CodeVentilatoryRatio: derive.ReasonMissingInput,
				derive.CodeEstimatedFraction: derive.ReasonPatientFacts,
			},
		},
		{
			name: "the gas alone", gas: 40, patient: man60,
			omitted: map[derive.Code]derive.Reason{
				derive.CodeGradient: derive.ReasonMissingInput, derive.CodeAlveolarFraction: derive.ReasonMissingInput,
				derive.CodeMixedExpiredCO2: derive.ReasonMissingInput, derive.CodePhysiologic: derive.ReasonMissingInput,
				derive.CodeAirwayFraction: derive.ReasonMissingInput, derive.CodeDeadSpaceVolume: derive.ReasonMissingInput,
				derive.CodeAlveolarVent: derive.ReasonMissingInput, derive.CodeVentilatoryRatio: derive.ReasonMissingInput,
				derive.CodeEstimatedFraction: derive.ReasonMissingInput,
			},
			check: func(t *testing.T, d derive.Derivation) {
				if len(d.Used) != 0 {
					t.Errorf("Used = %+v, want none", d.Used)
				}
				if got := omission(d, derive.CodeEstimatedFraction).Detail; !strings.Contains(got, "etco2, respiratory-rate") {
					t.Errorf("estimate detail %q does not name both missing kinds", got)
				}
			},
		},
		{
			// Range rule, from memory: 0 < PĒCO2 < PaCO2. Measured inputs
			// that contradict each other also keep the regression estimate
			// out (rule 9): it would hide the contradiction.
			name: "PĒCO2 above PaCO2", gas: 40, patient: man60,
			readings: []derive.Reading{
				rd(derive.KindEtCO2, 0, 30), rd(derive.KindMixedExpiredCO2, 0, 42), rd(derive.KindRespRate, 0, 20),
				rd(derive.KindTidalVolume, 0, 500),
			},
			values: map[derive.Code]float64{
				derive.CodeGradient: 10, derive.CodeAlveolarFraction: 0.25,
			},
			omitted: map[derive.Code]derive.Reason{
				derive.CodeMixedExpiredCO2: derive.ReasonNotApplicable, derive.CodePhysiologic: derive.ReasonInconsistent,
				derive.CodeAirwayFraction: derive.ReasonInconsistent, derive.CodeDeadSpaceVolume: derive.ReasonMissingInput,
				derive.CodeAlveolarVent: derive.ReasonMissingInput, derive.CodeVentilatoryRatio: derive.ReasonMissingInput,
				derive.CodeEstimatedFraction: derive.ReasonInconsistent,
			},
		},
		{
			// The edge of the same rule: PĒCO2 equal to PaCO2 would mean no
			// CO2-free dead space at all, which cannot be.
			name: "PĒCO2 equal to PaCO2", gas: 40, patient: man60,
			readings: []derive.Reading{rd(derive.KindMixedExpiredCO2, 0, 40)},
			omitted: map[derive.Code]derive.Reason{
				derive.CodeGradient: derive.ReasonMissingInput, derive.CodeAlveolarFraction: derive.ReasonMissingInput,
				derive.CodeMixedExpiredCO2: derive.ReasonNotApplicable, derive.CodePhysiologic: derive.ReasonInconsistent,
				derive.CodeAirwayFraction: derive.ReasonMissingInput, derive.CodeDeadSpaceVolume: derive.ReasonMissingInput,
				derive.CodeAlveolarVent: derive.ReasonMissingInput, derive.CodeVentilatoryRatio: derive.ReasonMissingInput,
				derive.CodeEstimatedFraction: derive.ReasonMissingInput,
			},
		},
		{
			// 0.863 × 2000 / 0.5 = 3452 mm[Hg] cannot be a gas pressure.
			name: "computed PĒCO2 implausible", gas: 40, patient: man60,
			readings: []derive.Reading{rd(derive.KindVCO2, 0, 2000), rd(derive.KindMinuteVolume, 0, 0.5)},
			omitted: map[derive.Code]derive.Reason{
				derive.CodeGradient: derive.ReasonMissingInput, derive.CodeAlveolarFraction: derive.ReasonMissingInput,
				derive.CodeMixedExpiredCO2: derive.ReasonInconsistent, derive.CodePhysiologic: derive.ReasonInconsistent,
				derive.CodeAirwayFraction: derive.ReasonMissingInput, derive.CodeDeadSpaceVolume: derive.ReasonMissingInput,
				derive.CodeAlveolarVent: derive.ReasonMissingInput, derive.CodeVentilatoryRatio: derive.ReasonPatientFacts,
				derive.CodeEstimatedFraction: derive.ReasonMissingInput,
			},
		},
		{
			// End-tidal 12 mm[Hg] above arterial: (40 − 52)/40 = −0.3,
			// beyond the negative gradients of low V/Q units; the bound
			// (derive.AlveolarFractionFloor, −0.25) is a design choice.
			name: "end-tidal far above arterial", gas: 40, patient: man60,
			readings: []derive.Reading{rd(derive.KindEtCO2, 0, 52)},
			values:   map[derive.Code]float64{derive.CodeGradient: -12},
			omitted: map[derive.Code]derive.Reason{
				derive.CodeAlveolarFraction: derive.ReasonInconsistent,
				derive.CodeMixedExpiredCO2:  derive.ReasonMissingInput, derive.CodePhysiologic: derive.ReasonMissingInput,
				derive.CodeAirwayFraction: derive.ReasonMissingInput, derive.CodeDeadSpaceVolume: derive.ReasonMissingInput,
				derive.CodeAlveolarVent: derive.ReasonMissingInput, derive.CodeVentilatoryRatio: derive.ReasonMissingInput,
				derive.CodeEstimatedFraction: derive.ReasonMissingInput,
			},
		},
		{
			// Malley 2005: "Occasionally, PetCO2 may actually be higher
			// than PaCO2": emitted with a note, never clamped; the AVDSF
			// is reported negative with its warning, (40 − 44)/40 = −0.1
			// (Malley 2005: end-tidal above arterial occurs with low V/Q units,
			// so it is reported, not clamped).
			name: "negative gradient", gas: 40, patient: man60,
			readings: []derive.Reading{rd(derive.KindEtCO2, 0, 44)},
			values:   map[derive.Code]float64{derive.CodeGradient: -4, derive.CodeAlveolarFraction: -0.1},
			omitted: map[derive.Code]derive.Reason{
				derive.CodeMixedExpiredCO2: derive.ReasonMissingInput, derive.CodePhysiologic: derive.ReasonMissingInput,
				derive.CodeAirwayFraction: derive.ReasonMissingInput, derive.CodeDeadSpaceVolume: derive.ReasonMissingInput,
				derive.CodeAlveolarVent: derive.ReasonMissingInput, derive.CodeVentilatoryRatio: derive.ReasonMissingInput,
				derive.CodeEstimatedFraction: derive.ReasonMissingInput,
			},
			check: func(t *testing.T, d derive.Derivation) {
				v := value(d, derive.CodeGradient)
				// A negative gradient is not "normal": no flag, the note
				// says what it hints at.
				if v.Flag != derive.FlagNone || !hasNote(v, "timing or sampling error") || !hasNote(v, "Malley 2005") {
					t.Errorf("gradient %+v", v)
				}
			},
		},
		{
			// A disconnected capnograph reads 0 (disconnection the commonest
			// cause of a fall to zero: ANZCA study notes): it is
			// an artefact, not an end-tidal value, so nothing is paired with
			// it and the values that need EtCO2 say why.
			name: "EtCO2 zero", gas: 40, patient: man60,
			readings: []derive.Reading{rd(derive.KindEtCO2, 0, 0), rd(derive.KindMixedExpiredCO2, 0, 28)},
			values:   map[derive.Code]float64{derive.CodePhysiologic: 0.3},
			omitted: map[derive.Code]derive.Reason{
				derive.CodeGradient:         derive.ReasonTooFewUsable,
				derive.CodeAlveolarFraction: derive.ReasonTooFewUsable,
				derive.CodeMixedExpiredCO2:  derive.ReasonNotApplicable,
				derive.CodeAirwayFraction:   derive.ReasonTooFewUsable, derive.CodeDeadSpaceVolume: derive.ReasonMissingInput,
				derive.CodeAlveolarVent: derive.ReasonMissingInput, derive.CodeVentilatoryRatio: derive.ReasonMissingInput,
				derive.CodeEstimatedFraction: derive.ReasonNotApplicable,
			},
		},
		{
			// Kallet 2014 (Respir Care 59:1611): "Markedly elevated VD/VT
			// (≥0.60)"; (40 − 14)/40 = 0.65, own arithmetic.
			name: "markedly elevated VD/VT", gas: 40, patient: man60,
			readings: []derive.Reading{rd(derive.KindMixedExpiredCO2, 0, 14)},
			values:   map[derive.Code]float64{derive.CodePhysiologic: 0.65},
			omitted: map[derive.Code]derive.Reason{
				derive.CodeGradient: derive.ReasonMissingInput, derive.CodeAlveolarFraction: derive.ReasonMissingInput,
				derive.CodeMixedExpiredCO2: derive.ReasonNotApplicable, derive.CodeAirwayFraction: derive.ReasonMissingInput,
				derive.CodeDeadSpaceVolume: derive.ReasonMissingInput, derive.CodeAlveolarVent: derive.ReasonMissingInput,
				derive.CodeVentilatoryRatio: derive.ReasonMissingInput, derive.CodeEstimatedFraction: derive.ReasonNotApplicable,
			},
			check: func(t *testing.T, d derive.Derivation) {
				v := value(d, derive.CodePhysiologic)
				if v.Flag != derive.FlagHigh || !hasNote(v, "markedly elevated") {
					t.Errorf("physiologic %+v", v)
				}
			},
		},
		{
			// Above the healthy 0.2–0.35 but under Kallet's 0.60 (Kallet
			// 2014, ventilated adults with ARDS): (40 − 24)/40 = 0.4, own
			// arithmetic. Ventilated adults commonly sit here, so no flag.
			name: "high VD/VT", gas: 40, patient: man60,
			readings: []derive.Reading{rd(derive.KindMixedExpiredCO2, 0, 24)},
			values:   map[derive.Code]float64{derive.CodePhysiologic: 0.4},
			omitted: map[derive.Code]derive.Reason{
				derive.CodeGradient: derive.ReasonMissingInput, derive.CodeAlveolarFraction: derive.ReasonMissingInput,
				derive.CodeMixedExpiredCO2: derive.ReasonNotApplicable, derive.CodeAirwayFraction: derive.ReasonMissingInput,
				derive.CodeDeadSpaceVolume: derive.ReasonMissingInput, derive.CodeAlveolarVent: derive.ReasonMissingInput,
				derive.CodeVentilatoryRatio: derive.ReasonMissingInput, derive.CodeEstimatedFraction: derive.ReasonNotApplicable,
			},
			check: func(t *testing.T, d derive.Derivation) {
				if v := value(d, derive.CodePhysiologic); v.Flag != derive.FlagNone || hasNote(v, "markedly") {
					t.Errorf("physiologic %+v", v)
				}
			},
		},
		{
			// Below the healthy 0.2–0.35 (board-review text): (40 − 34)/40 =
			// 0.15. No outcome threshold exists below, so no flag.
			name: "low VD/VT", gas: 40, patient: man60,
			readings: []derive.Reading{rd(derive.KindMixedExpiredCO2, 0, 34)},
			values:   map[derive.Code]float64{derive.CodePhysiologic: 0.15},
			omitted: map[derive.Code]derive.Reason{
				derive.CodeGradient: derive.ReasonMissingInput, derive.CodeAlveolarFraction: derive.ReasonMissingInput,
				derive.CodeMixedExpiredCO2: derive.ReasonNotApplicable, derive.CodeAirwayFraction: derive.ReasonMissingInput,
				derive.CodeDeadSpaceVolume: derive.ReasonMissingInput, derive.CodeAlveolarVent: derive.ReasonMissingInput,
				derive.CodeVentilatoryRatio: derive.ReasonMissingInput, derive.CodeEstimatedFraction: derive.ReasonNotApplicable,
			},
			check: func(t *testing.T, d derive.Derivation) {
				if v := value(d, derive.CodePhysiologic); v.Flag != derive.FlagNone {
					t.Errorf("flag %v, want none", v.Flag)
				}
			},
		},
		{
			// No living patient has an arterial PCO2 of 0.2 mm[Hg], nor one
			// of 0.2 kPa (from memory).
			name: "implausible PaCO2", gas: 0.2, patient: man60,
			readings: []derive.Reading{rd(derive.KindEtCO2, 0, 35), rd(derive.KindMixedExpiredCO2, 0, 28), rd(derive.KindTidalVolume, 0, 500)},
			values:   map[derive.Code]float64{derive.CodeAirwayFraction: 0.2},
			omitted: map[derive.Code]derive.Reason{
				derive.CodeGradient: derive.ReasonMissingInput, derive.CodeAlveolarFraction: derive.ReasonMissingInput,
				derive.CodeMixedExpiredCO2: derive.ReasonNotApplicable, derive.CodePhysiologic: derive.ReasonMissingInput,
				derive.CodeDeadSpaceVolume: derive.ReasonMissingInput, derive.CodeAlveolarVent: derive.ReasonMissingInput,
				derive.CodeVentilatoryRatio: derive.ReasonMissingInput, derive.CodeEstimatedFraction: derive.ReasonMissingInput,
			},
			check: func(t *testing.T, d derive.Derivation) {
				if !slices.ContainsFunc(d.Omitted, func(o derive.Omission) bool {
					return o.Ref == "Observation/abg/_history/1" && o.Reason == derive.ReasonImplausible
				}) {
					t.Errorf("the gas is not listed as implausible: %+v", d.Omitted)
				}
			},
		},
		{
			name: "implausible reading in the window is not used", gas: 40, patient: man60,
			readings: []derive.Reading{rd(derive.KindEtCO2, 0, 36), rd(derive.KindEtCO2, time.Minute, math.NaN()), rd(derive.KindEtCO2, 2*time.Minute, 900)},
			values:   map[derive.Code]float64{derive.CodeGradient: 4, derive.CodeAlveolarFraction: 0.1},
			omitted: map[derive.Code]derive.Reason{
				derive.CodeMixedExpiredCO2: derive.ReasonMissingInput, derive.CodePhysiologic: derive.ReasonMissingInput,
				derive.CodeAirwayFraction: derive.ReasonMissingInput, derive.CodeDeadSpaceVolume: derive.ReasonMissingInput,
				derive.CodeAlveolarVent: derive.ReasonMissingInput, derive.CodeVentilatoryRatio: derive.ReasonMissingInput,
				derive.CodeEstimatedFraction: derive.ReasonMissingInput,
			},
			check: func(t *testing.T, d derive.Derivation) {
				var refs []string
				for _, o := range d.Omitted {
					if o.Reason == derive.ReasonImplausible {
						refs = append(refs, o.Ref)
					}
				}
				want := []string{rd(derive.KindEtCO2, time.Minute, 0).Ref, rd(derive.KindEtCO2, 2*time.Minute, 0).Ref}
				if !slices.Equal(refs, want) {
					t.Errorf("implausible refs %v, want %v", refs, want)
				}
				// Malley 2005: 4 mm[Hg] is below the 5 mm[Hg] limit.
				if v := value(d, derive.CodeGradient); v.Flag != derive.FlagNormal {
					t.Errorf("gradient 4 flag %v, want normal", v.Flag)
				}
			},
		},
	}
	for _, tc := range cases {
		t.Run(tc.name, func(t *testing.T) {
			t.Parallel()
			d := derive.Derive(derive.DefaultConfig(), gasOf(tc.gas), tc.patient, sortByTime(tc.readings))
			checkAccounts(t, d)
			for c, want := range tc.values {
				v := value(d, c)
				if v.Code == "" {
					t.Errorf("%s not emitted: %+v", c, omission(d, c))
					continue
				}
				if !near(v.Value, want, 1e-9) {
					t.Errorf("%s = %.10g, want %.10g", c, v.Value, want)
				}
			}
			for c, want := range tc.omitted {
				o := omission(d, c)
				if o.Reason != want {
					t.Errorf("%s omitted with %q (%s), want %q", c, o.Reason, o.Detail, want)
				}
				if o.Detail == "" && o.Code != "" {
					t.Errorf("%s omitted without detail", c)
				}
			}
			if got, want := len(d.Values)+countValueOmissions(d), len(tc.values)+len(tc.omitted); got != want || len(tc.values) != len(d.Values) {
				t.Errorf("%d values and %d omissions, case expects %d and %d", len(d.Values), countValueOmissions(d), len(tc.values), len(tc.omitted))
			}
			if tc.check != nil {
				tc.check(t, d)
			}
		})
	}
}

func TestDeriveHeight(t *testing.T) {
	t.Parallel()
	base := []derive.Reading{rd(derive.KindMinuteVolume, 0, 7)}
	day := 24 * time.Hour
	cases := []struct {
		name   string
		pat    derive.Patient
		height []derive.Reading
		want   derive.Reason // "" when the ratio is emitted
		used   float64
		rule   string
	}{
		{"latest before wins", man60, []derive.Reading{rd(derive.KindHeight, -300*day, 170), rd(derive.KindHeight, -10*day, 175), rd(derive.KindHeight, 2*time.Minute, 180)}, "", 175, "latest body height at or before sample time, not older than 365 days"},
		{"exactly 365 days old", man60, []derive.Reading{rd(derive.KindHeight, -365*day, 175)}, "", 175, "latest"},
		{"older than 365 days", man60, []derive.Reading{rd(derive.KindHeight, -365*day-time.Millisecond, 175)}, derive.ReasonPatientFacts, 0, ""},
		{"none before, one just after", man60, []derive.Reading{rd(derive.KindHeight, 5*time.Minute, 175)}, "", 175, "first body height within 5 min after sample time"},
		{"none before, one too late", man60, []derive.Reading{rd(derive.KindHeight, 6*time.Minute, 175)}, derive.ReasonPatientFacts, 0, ""},
		// Design choice: the ARDS Network equation is for adults.
		{"below 120 cm", man60, []derive.Reading{rd(derive.KindHeight, -day, 110)}, derive.ReasonPatientFacts, 110, "latest"},
		{"sex unknown", derive.Patient{BirthDate: man60.BirthDate}, []derive.Reading{rd(derive.KindHeight, -day, 175)}, derive.ReasonPatientFacts, 175, "latest"},
		{"implausible height skipped", man60, []derive.Reading{rd(derive.KindHeight, -2*day, 175), rd(derive.KindHeight, -day, 1.75)}, "", 175, "latest"},
	}
	for _, tc := range cases {
		t.Run(tc.name, func(t *testing.T) {
			t.Parallel()
			d := derive.Derive(derive.DefaultConfig(), gasOf(40), tc.pat, sortByTime(with(base, tc.height...)))
			checkAccounts(t, d)
			o := omission(d, derive.CodeVentilatoryRatio)
			if o.Reason != tc.want {
				t.Fatalf("ventilatory ratio omission %q (%s), want %q", o.Reason, o.Detail, tc.want)
			}
			var h *derive.Summary
			for i := range d.Used {
				if d.Used[i].Kind == derive.KindHeight {
					h = &d.Used[i]
				}
			}
			if tc.used == 0 {
				if h != nil {
					t.Errorf("height used: %+v", h)
				}
				return
			}
			if h == nil || h.Median != tc.used || len(h.Readings) != 1 || !strings.HasPrefix(h.Rule, tc.rule) {
				t.Errorf("height summary %+v, want %v with rule %q", h, tc.used, tc.rule)
			}
		})
	}
}

func TestDeriveWindow(t *testing.T) {
	t.Parallel()
	const ms = time.Millisecond
	w := derive.DefaultConfig().Window
	cases := []struct {
		name     string
		readings []derive.Reading
		want     []float64 // EtCO2 values used, in time order
		median   float64
	}{
		{
			name: "edges included, just outside excluded",
			readings: []derive.Reading{
				rd(derive.KindEtCO2, -w-ms, 10), rd(derive.KindEtCO2, -w, 30), rd(derive.KindEtCO2, 0, 34),
				rd(derive.KindEtCO2, w, 38), rd(derive.KindEtCO2, w+ms, 90),
			},
			want: []float64{30, 34, 38}, median: 34,
		},
		{
			// The gas's sample time is what counts; a reading 6 min away
			// (near when a result might be reported) is outside.
			name: "six minutes away excluded",
			readings: []derive.Reading{
				rd(derive.KindEtCO2, -2*time.Minute, 36), rd(derive.KindEtCO2, 6*time.Minute, 20), rd(derive.KindEtCO2, 20*time.Minute, 20),
			},
			want: []float64{36}, median: 36,
		},
		{
			name: "even count: mean of the two middle values",
			readings: []derive.Reading{
				rd(derive.KindEtCO2, -3*time.Minute, 40), rd(derive.KindEtCO2, -time.Minute, 30),
				rd(derive.KindEtCO2, time.Minute, 36), rd(derive.KindEtCO2, 3*time.Minute, 34),
			},
			want: []float64{40, 30, 36, 34}, median: 35,
		},
		{
			name: "odd count: middle value",
			readings: []derive.Reading{
				rd(derive.KindEtCO2, -time.Minute, 38), rd(derive.KindEtCO2, 0, 30), rd(derive.KindEtCO2, time.Minute, 35),
			},
			want: []float64{38, 30, 35}, median: 35,
		},
	}
	for _, tc := range cases {
		t.Run(tc.name, func(t *testing.T) {
			t.Parallel()
			d := derive.Derive(derive.DefaultConfig(), gasOf(40), man60, sortByTime(tc.readings))
			if len(d.Used) != 1 || d.Used[0].Kind != derive.KindEtCO2 {
				t.Fatalf("Used = %+v", d.Used)
			}
			s := d.Used[0]
			var got []float64
			for _, r := range s.Readings {
				got = append(got, r.Value)
			}
			if !slices.Equal(got, tc.want) || s.Median != tc.median {
				t.Errorf("used %v median %v, want %v median %v", got, s.Median, tc.want, tc.median)
			}
			if g := value(d, derive.CodeGradient).Value; g != 40-tc.median {
				t.Errorf("gradient %v not from the median", g)
			}
			wantRule := fmt.Sprintf("median of %d readings within ±5 min of sample time", len(tc.want))
			if len(tc.want) == 1 {
				wantRule = "the only reading within ±5 min of sample time"
			}
			if s.Rule != wantRule {
				t.Errorf("rule %q, want %q", s.Rule, wantRule)
			}
		})
	}
}

func TestDeriveDeterministic(t *testing.T) {
	t.Parallel()
	rs := sortByTime(with(measured(), rd(derive.KindVCO2, 0, 200), rd(derive.KindEtCO2, 2*time.Minute, math.Inf(1))))
	a := derive.Derive(derive.DefaultConfig(), gasOf(40), man60, rs)
	for range 20 {
		if b := derive.Derive(derive.DefaultConfig(), gasOf(40), man60, slices.Clone(rs)); !reflect.DeepEqual(a, b) {
			t.Fatalf("two runs differ:\n%+v\n%+v", a, b)
		}
	}
}

// checkAccounts asserts the invariants every derivation keeps: each code
// appears once, as a value or an omission, values in the documented order,
// and nothing non-finite.
func checkAccounts(t *testing.T, d derive.Derivation) {
	t.Helper()
	seen := map[derive.Code]int{}
	var order []derive.Code
	for _, v := range d.Values {
		seen[v.Code]++
		order = append(order, v.Code)
		if math.IsNaN(v.Value) || math.IsInf(v.Value, 0) {
			t.Errorf("%s is %v", v.Code, v.Value)
		}
		if v.Equation == "" || v.Unit == "" || len(v.Inputs) == 0 {
			t.Errorf("%s lacks equation, unit or inputs: %+v", v.Code, v)
		}
		if !slices.IsSorted(v.Inputs) {
			t.Errorf("%s inputs not in Kind order: %v", v.Code, v.Inputs)
		}
	}
	for _, o := range d.Omitted {
		if o.Code != "" {
			seen[o.Code]++
		}
	}
	for _, c := range valueOrder {
		if seen[c] != 1 {
			t.Errorf("%s accounted for %d times", c, seen[c])
		}
	}
	if !slices.IsSortedFunc(order, func(a, b derive.Code) int {
		return slices.Index(valueOrder, a) - slices.Index(valueOrder, b)
	}) {
		t.Errorf("values out of order: %v", order)
	}
	if !slices.IsSorted(usedKinds(d)) {
		t.Errorf("Used not in Kind order: %v", usedKinds(d))
	}
}

func value(d derive.Derivation, c derive.Code) derive.Value {
	for _, v := range d.Values {
		if v.Code == c {
			return v
		}
	}
	return derive.Value{}
}

func omission(d derive.Derivation, c derive.Code) derive.Omission {
	for _, o := range d.Omitted {
		if o.Code == c {
			return o
		}
	}
	return derive.Omission{}
}

func countValueOmissions(d derive.Derivation) int {
	n := 0
	for _, o := range d.Omitted {
		if o.Code != "" {
			n++
		}
	}
	return n
}

func term(t *testing.T, v derive.Value, name string) float64 {
	t.Helper()
	for _, x := range v.Terms {
		if x.Name == name {
			return x.Value
		}
	}
	t.Errorf("%s has no term %q", v.Code, name)
	return math.NaN()
}

func hasNote(v derive.Value, sub string) bool {
	return slices.ContainsFunc(v.Notes, func(n string) bool { return strings.Contains(n, sub) })
}

func usedKinds(d derive.Derivation) []derive.Kind {
	var ks []derive.Kind
	for _, s := range d.Used {
		ks = append(ks, s.Kind)
	}
	return ks
}
