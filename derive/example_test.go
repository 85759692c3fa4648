package derive_test

import (
	"fmt"
	"time"

	"github.com/deadspace-fhir/deadspace/derive"
)

// A blood gas with capnography and ventilator readings around its sample
// time. The numbers are the common-practice check case: PaCO2 40,
// PĒCO2 28, VT 500 mL gives VD/VT 0.30 and 150 mL of dead space.
func ExampleDerive() {
	sample := time.Date(2024, 3, 1, 10, 0, 0, 0, time.UTC)
	at := func(d time.Duration) int64 { return sample.Add(d).UnixMilli() }
	gas := derive.Reading{Ref: "Observation/abg/_history/1", AtMillis: at(0), Value: 40, Kind: derive.KindPaCO2}
	patient := derive.Patient{Ref: "Patient/p1/_history/1", Sex: derive.SexFemale, BirthDate: time.Date(1970, 5, 2, 0, 0, 0, 0, time.UTC)}
	readings := []derive.Reading{ // sorted by time
		{Ref: "Observation/h/_history/1", AtMillis: at(-48 * time.Hour), Value: 165, Kind: derive.KindHeight},
		{Ref: "Observation/et1/_history/1", AtMillis: at(-2 * time.Minute), Value: 34, Kind: derive.KindEtCO2},
		{Ref: "Observation/vt/_history/1", AtMillis: at(-time.Minute), Value: 500, Kind: derive.KindTidalVolume},
		{Ref: "Observation/ve/_history/1", AtMillis: at(-time.Minute), Value: 7, Kind: derive.KindMinuteVolume},
		{Ref: "Observation/et2/_history/1", AtMillis: at(0), Value: 35, Kind: derive.KindEtCO2},
		{Ref: "Observation/pe/_history/1", AtMillis: at(time.Minute), Value: 28, Kind: derive.KindMixedExpiredCO2},
		{Ref: "Observation/et3/_history/1", AtMillis: at(2 * time.Minute), Value: 36, Kind: derive.KindEtCO2},
	}

	d := derive.Derive(derive.DefaultConfig(), gas, patient, readings)
	for _, s := range d.Used {
		fmt.Printf("%-18s %6.1f  %s\n", s.Kind, s.Median, s.Rule)
	}
	for _, v := range d.Values {
		fmt.Printf("%-32s %8.3f %s\n", v.Code, v.Value, v.Unit)
	}
	for _, o := range d.Omitted {
		fmt.Printf("%-32s not emitted: %s\n", o.Code, o.Reason)
	}
	// Output:
	// etco2                35.0  median of 3 readings within ±5 min of sample time
	// mixed-expired-co2    28.0  the only reading within ±5 min of sample time
	// tidal-volume        500.0  the only reading within ±5 min of sample time
	// minute-volume         7.0  the only reading within ±5 min of sample time
	// body-height         165.0  latest body height at or before sample time, not older than 365 days
	// paco2-etco2-gradient                5.000 mm[Hg]
	// alveolar-dead-space-fraction        0.125 1
	// physiologic-dead-space-fraction     0.300 1
	// airway-dead-space-fraction          0.200 1
	// physiologic-dead-space-volume     150.000 mL
	// alveolar-minute-ventilation         4.900 L/min
	// ventilatory-ratio                   1.311 1
	// mixed-expired-co2                not emitted: not-applicable
	// estimated-dead-space-fraction    not emitted: not-applicable
}

// A disconnection: EtCO2 falls from 38 to 0 mm[Hg] and stays there.
func ExampleDetectFalls() {
	start := time.Date(2024, 3, 1, 10, 0, 0, 0, time.UTC)
	var series []derive.Reading
	for i := range 30 {
		v := 38.0
		if i >= 20 {
			v = 0
		}
		series = append(series, derive.Reading{
			Ref:      fmt.Sprintf("Observation/et%d/_history/1", i),
			AtMillis: start.Add(time.Duration(i) * time.Minute).UnixMilli(),
			Value:    v,
			Kind:     derive.KindEtCO2,
		})
	}
	for _, f := range derive.DetectFalls(derive.DefaultConfig().Fall, series) {
		fmt.Printf("onset %s, confirmed %s: %.0f → %.0f mm[Hg] (%+.0f)\n",
			f.Onset.Format("15:04"), f.Confirmed.Format("15:04"), f.Baseline, f.Level, f.Change)
		for _, n := range f.Notes {
			fmt.Println("-", n)
		}
	}
	// Output:
	// onset 10:20, confirmed 10:23: 38 → 0 mm[Hg] (-38)
	// - rule out a sudden rise in dead space: pulmonary embolism, low cardiac output (Courtney 2002; Grmec 2003)
	// - rule out a leak or a disconnection of the circuit
	// - rule out a sampling fault of the capnograph
	// - near-zero end-tidal CO2: check first for disconnection, extubation or an oesophageal tube
}
