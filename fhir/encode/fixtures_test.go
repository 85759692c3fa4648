package encode_test

import (
	"testing"
	"time"

	"github.com/deadspace-fhir/deadspace/derive"
	"github.com/deadspace-fhir/deadspace/fhir/encode"
)

// The fixtures are inputs to the encoder, not checks of the physiology:
// package derive owns the arithmetic. Where a number has a published or
// reproducible origin (own arithmetic on a published formula) the paper is
// named beside it; the rest only need to be plausible.

var (
	sampleTime = time.Date(2025, 3, 1, 10, 15, 0, 0, time.UTC)
	issuedTime = time.Date(2025, 3, 1, 10, 15, 7, 0, time.UTC)
)

const subject = "Patient/p1"

func reading(ref, enc string, at time.Time, v float64, k derive.Kind) derive.Reading {
	return derive.Reading{Ref: ref, Encounter: enc, AtMillis: at.UnixMilli(), Value: v, Kind: k}
}

func f64(v float64) *float64 { return &v }

func ptr[T any](v T) *T { return &v }

// fullDerivation has every derived value the encoder knows except the fall.
func fullDerivation() derive.Derivation {
	const enc = "Encounter/icu-1"
	m := func(n int) time.Time { return sampleTime.Add(time.Duration(n) * time.Minute) }
	return derive.Derivation{
		Gas:     reading("Observation/abg-1/_history/2", enc, sampleTime, 40, derive.KindPaCO2),
		Patient: derive.Patient{Ref: "Patient/p1/_history/3", Sex: derive.SexMale, BirthDate: time.Date(1965, 1, 1, 0, 0, 0, 0, time.UTC)},
		Used: []derive.Summary{
			{Kind: derive.KindEtCO2, Median: 30, Rule: "median of readings within 5 min", Readings: []derive.Reading{
				reading("Observation/etco2-1/_history/1", enc, m(-2), 30, derive.KindEtCO2),
				reading("Observation/etco2-2/_history/1", enc, m(0), 30, derive.KindEtCO2),
				reading("Observation/etco2-3/_history/1", enc, m(2), 31, derive.KindEtCO2),
			}},
			// Own arithmetic on the published formula of Siddiki et al. (Crit
			// Care 2010;14:R141): VCO2 200 mL/min, VE 6 L/min, PaCO2 40 →
			// PĒCO2 28.767, VD/VT 0.2808.
			{Kind: derive.KindVCO2, Median: 200, Readings: []derive.Reading{
				reading("Observation/vco2-1/_history/1", enc, m(-1), 200, derive.KindVCO2),
			}},
			{Kind: derive.KindTidalVolume, Median: 500, Readings: []derive.Reading{
				reading("Observation/vt-1/_history/1", enc, m(-1), 500, derive.KindTidalVolume),
			}},
			{Kind: derive.KindMinuteVolume, Median: 6, Readings: []derive.Reading{
				reading("Observation/ve-1/_history/1", enc, m(-1), 6, derive.KindMinuteVolume),
			}},
			{Kind: derive.KindRespRate, Median: 20, Readings: []derive.Reading{
				reading("Observation/rr-1/_history/4", enc, m(-1), 20, derive.KindRespRate),
			}},
			// Height measured in an earlier encounter: values using it
			// span two encounters and must carry none.
			{Kind: derive.KindHeight, Median: 175, Readings: []derive.Reading{
				reading("Observation/height-1/_history/1", "Encounter/ward-0", sampleTime.Add(-72*time.Hour), 175, derive.KindHeight),
			}},
		},
		Values: []derive.Value{
			{Code: derive.CodeGradient, Value: 10, Unit: "mm[Hg]",
				Inputs: []derive.Kind{derive.KindPaCO2, derive.KindEtCO2}, Equation: "PaCO2 - PetCO2",
				Flag: derive.FlagHigh, Range: &derive.Range{High: f64(5), Text: "normal below 5 mm[Hg]", Source: "common practice"}},
			{Code: derive.CodeAlveolarFraction, Value: 0.25, Unit: "1",
				Inputs: []derive.Kind{derive.KindPaCO2, derive.KindEtCO2}, Equation: "(PaCO2 - PetCO2) / PaCO2"},
			{Code: derive.CodeMixedExpiredCO2, Value: 28.767123287671232, Unit: "mm[Hg]",
				Inputs: []derive.Kind{derive.KindVCO2, derive.KindMinuteVolume}, Equation: "PĒCO2 = VCO2 × 0.863 / VE"},
			{Code: derive.CodePhysiologic, Value: 0.2808219178082192, Unit: "1",
				Inputs: []derive.Kind{derive.KindPaCO2, derive.KindVCO2, derive.KindMinuteVolume}, Equation: "Enghoff: (PaCO2 - PĒCO2) / PaCO2",
				Flag: derive.FlagNormal, Range: &derive.Range{Low: f64(0.2), High: f64(0.35), Text: "at rest", Source: "board-review text"}},
			{Code: derive.CodeAirwayFraction, Value: 0.04109589041095893, Unit: "1",
				Inputs: []derive.Kind{derive.KindEtCO2, derive.KindVCO2, derive.KindMinuteVolume}, Equation: "Bohr: (PetCO2 - PĒCO2) / PetCO2"},
			{Code: derive.CodeDeadSpaceVolume, Value: 140.4109589041096, Unit: "mL",
				Inputs: []derive.Kind{derive.KindPaCO2, derive.KindVCO2, derive.KindMinuteVolume, derive.KindTidalVolume}, Equation: "VD = VD/VT × VT"},
			{Code: derive.CodeAlveolarVent, Value: 4.315068493150685, Unit: "L/min",
				Inputs: []derive.Kind{derive.KindPaCO2, derive.KindVCO2, derive.KindMinuteVolume}, Equation: "VA = VE × (1 - VD/VT)"},
			{Code: derive.CodeVentilatoryRatio, Value: 0.9069, Unit: "1",
				Inputs: []derive.Kind{derive.KindPaCO2, derive.KindMinuteVolume, derive.KindHeight}, UsesPatient: true,
				Equation: "VR = VE × PaCO2 / (PBW × 100 × 37.5), Sinha 2009", Flag: derive.FlagNormal,
				Notes: []string{"Predicted body weight from height and sex."}},
			{Code: derive.CodeEstimatedFraction, Value: 0.576, Unit: "1",
				Inputs: []derive.Kind{derive.KindPaCO2, derive.KindEtCO2, derive.KindRespRate}, UsesPatient: true, Estimate: true,
				Equation: "regression on gradient, rate and age"},
		},
	}
}

// fall is an end-tidal CO2 fall of 14 mm[Hg] below a 38 mm[Hg] baseline.
func fall() derive.Fall {
	const enc = "Encounter/icu-1"
	onset := time.Date(2025, 3, 1, 11, 0, 0, 0, time.UTC)
	var base, ep []derive.Reading
	for i := range 5 {
		at := onset.Add(time.Duration(i-10) * time.Minute)
		base = append(base, reading("Observation/et-b"+string(rune('1'+i))+"/_history/1", enc, at, 38, derive.KindEtCO2))
	}
	for i := range 3 {
		at := onset.Add(time.Duration(i) * time.Minute)
		ep = append(ep, reading("Observation/et-e"+string(rune('1'+i))+"/_history/1", enc, at, 24, derive.KindEtCO2))
	}
	return derive.Fall{
		Onset: onset, Confirmed: onset.Add(2 * time.Minute),
		Baseline: 38, Level: 24, Change: -14,
		BaselineReadings: base, EpisodeReadings: ep,
		Notes: []string{
			"Rule out circuit disconnection, extubation or an oesophageal tube, and airway obstruction.",
			"A sudden fall with hypotension suggests a massive pulmonary embolism or a low cardiac output.",
		},
	}
}

func newEncoder(t testing.TB) *encode.Encoder {
	t.Helper()
	o := encode.DefaultOptions()
	o.SoftwareVersion = "1.0.0"
	o.Issued = issuedTime
	e, err := encode.New(o)
	if err != nil {
		t.Fatalf("New: %v", err)
	}
	return e
}
