package encode

import (
	"fmt"
	"math"
	"strconv"

	"github.com/deadspace-fhir/deadspace/derive"
)

// Default systems. They are the project's own names.
const (
	DefaultCodeSystem       = "https://deadspace-fhir.github.io/fhir/CodeSystem/dead-space"
	DefaultIdentifierSystem = "https://deadspace-fhir.github.io/fhir/sid/derivation"
	DefaultSeriesSystem     = "https://deadspace-fhir.github.io/fhir/sid/derivation-series"
	DefaultDeviceSystem     = "https://deadspace-fhir.github.io/fhir/sid/software"
)

// External systems, as named in the FHIR R4 specification.
const (
	systemUCUM           = "http://unitsofmeasure.org"
	systemObsCategory    = "http://terminology.hl7.org/CodeSystem/observation-category"
	systemInterpretation = "http://terminology.hl7.org/CodeSystem/v3-ObservationInterpretation"
	systemDataOperation  = "http://terminology.hl7.org/CodeSystem/v3-DataOperation"
	systemParticipant    = "http://terminology.hl7.org/CodeSystem/provenance-participant-type"
)

// Precision is how one derived value is written.
type Precision struct {
	// Text is the readable name, used as code.text and coding.display.
	Text string
	// Unit is the UCUM code the value must arrive in; the encoder refuses a
	// value in any other unit rather than relabel it.
	Unit string
	// Display is the human-readable unit, Quantity.unit.
	Display string
	// Decimals is the number of decimals written. Fractions get 3 (0.001 of
	// VD/VT is well below the 0.05 step that Nuckton et al., N Engl J Med
	// 2002, tied to mortality odds), pressures 1 (PCO2 reported to 0.1 mm[Hg]
	// is common practice), volumes 0, flows 2, the ventilatory ratio 2.
	Decimals int
}

// precisions holds every code the encoder may emit. A code not listed is an
// error: the CodeSystem must define what we write.
var precisions = map[derive.Code]Precision{
	derive.CodeGradient:          {"Arterial to end-tidal CO2 difference", "mm[Hg]", "mmHg", 1},
	derive.CodeAlveolarFraction:  {"Alveolar dead-space fraction", "1", "1", 3},
	derive.CodePhysiologic:       {"Physiologic dead-space fraction (Enghoff)", "1", "1", 3},
	derive.CodeAirwayFraction:    {"Airway dead-space fraction (Bohr)", "1", "1", 3},
	derive.CodeDeadSpaceVolume:   {"Physiologic dead-space volume", "mL", "mL", 0},
	derive.CodeAlveolarVent:      {"Alveolar minute ventilation", "L/min", "L/min", 2},
	derive.CodeVentilatoryRatio:  {"Ventilatory ratio", "1", "1", 2},
	derive.CodeEstimatedFraction: {"Estimated dead-space fraction", "1", "1", 3},
	derive.CodeMixedExpiredCO2:   {"Mixed-expired CO2 partial pressure (calculated)", "mm[Hg]", "mmHg", 1},
	derive.CodeEtCO2Drop:         {"End-tidal CO2 fall from baseline", "mm[Hg]", "mmHg", 1},
	derive.CodeEtCO2Rise:         {"End-tidal CO2 rise above baseline", "mm[Hg]", "mmHg", 1},
}

// PrecisionOf returns how code is written, and false for a code the encoder
// does not know.
func PrecisionOf(code derive.Code) (Precision, bool) {
	p, ok := precisions[code]
	return p, ok
}

// Codes lists every code the encoder may emit, for the CodeSystem resource
// and its tests.
func Codes() []derive.Code {
	return []derive.Code{
		derive.CodeGradient, derive.CodeAlveolarFraction, derive.CodePhysiologic,
		derive.CodeAirwayFraction, derive.CodeDeadSpaceVolume, derive.CodeAlveolarVent,
		derive.CodeVentilatoryRatio, derive.CodeEstimatedFraction, derive.CodeMixedExpiredCO2,
		derive.CodeEtCO2Drop, derive.CodeEtCO2Rise,
	}
}

// formatDecimal writes v with a fixed number of decimals. Fixed decimals
// are deliberate: in FHIR a decimal's trailing zeros state its precision, so
// 0.300 says "to the thousandth".
func formatDecimal(v float64, decimals int) (string, error) {
	if math.IsNaN(v) || math.IsInf(v, 0) {
		return "", fmt.Errorf("value %v is not a finite number", v)
	}
	s := strconv.FormatFloat(v, 'f', decimals, 64)
	// A small negative value rounds to "-0.000", which is a legal decimal but
	// reads as a sign that is not there.
	if f, _ := strconv.ParseFloat(s, 64); f == 0 && s[0] == '-' {
		s = s[1:]
	}
	return s, nil
}

// formatBound writes a reference-range bound as given: bounds come from
// publications and carry their own precision.
func formatBound(v float64) (string, error) {
	if math.IsNaN(v) || math.IsInf(v, 0) {
		return "", fmt.Errorf("range bound %v is not a finite number", v)
	}
	return strconv.FormatFloat(v, 'f', -1, 64), nil
}
