package encode

import (
	"encoding/json"
	"fmt"

	"github.com/deadspace-fhir/deadspace/derive"
)

// definitions say what each code means, its unit and how it is computed,
// for the CodeSystem resource. They name equations and published sources
// only where the source is confirmed (see the README's rules section).
var definitions = map[derive.Code]string{
	derive.CodeGradient: "Arterial minus end-tidal partial pressure of CO2, PaCO2 − PetCO2, in mm[Hg], the arterial value at the patient's temperature when known. " +
		"Normally 0 to 5 mm[Hg] in adults (Malley WJ, Clinical Blood Gases, 2005).",
	derive.CodeAlveolarFraction: "End-tidal alveolar dead-space fraction, (PaCO2 − PetCO2)/PaCO2, dimensionless (unit 1).",
	derive.CodePhysiologic: "Physiologic dead-space fraction by the Enghoff modification of the Bohr equation, (PaCO2 − PĒCO2)/PaCO2, dimensionless (unit 1); " +
		"PĒCO2 measured or calculated from VCO2 and expired minute volume.",
	derive.CodeAirwayFraction:  "Airway dead-space fraction by the Bohr equation with end-tidal PCO2 in place of mean alveolar PCO2, (PetCO2 − PĒCO2)/PetCO2, dimensionless (unit 1).",
	derive.CodeDeadSpaceVolume: "Physiologic dead-space volume, VD/VT × tidal volume, in mL.",
	derive.CodeAlveolarVent:    "Alveolar minute ventilation, expired minute volume × (1 − VD/VT), in L/min.",
	derive.CodeVentilatoryRatio: "Ventilatory ratio, (VE × PaCO2)/(predicted body weight × 100 × 37.5) with VE in mL/min (Sinha P et al., Br J Anaesth 2009), " +
		"dimensionless (unit 1); about 1 in healthy adults. Adults only.",
	derive.CodeEstimatedFraction: "Dead-space fraction estimated by a regression on the arterial to end-tidal gradient, respiratory rate and age, " +
		"dimensionless (unit 1); an estimate, not a measurement. Ventilated adults only.",
	derive.CodeMixedExpiredCO2: "Mixed-expired partial pressure of CO2 calculated as 0.863 × VCO2 (mL/min STPD) / expired minute volume (L/min BTPS), in mm[Hg].",
	derive.CodeEtCO2Drop: "A sustained fall of end-tidal CO2 below the patient's own trailing baseline: the median level from onset to confirmation minus the baseline median, " +
		"in mm[Hg] (negative).",
	derive.CodeEtCO2Rise: "A sustained rise of end-tidal CO2 above the patient's own trailing baseline: the median level from onset to confirmation minus the baseline median, " +
		"in mm[Hg] (positive).",
}

// codeSystem is the part of the FHIR R4 CodeSystem resource written here.
// It is its own type because the samply model marshals every value[x] of a
// concept property, which FHIR forbids.
type codeSystem struct {
	ResourceType  string              `json:"resourceType"`
	URL           string              `json:"url"`
	Version       string              `json:"version"`
	Name          string              `json:"name"`
	Title         string              `json:"title"`
	Status        string              `json:"status"`
	Experimental  bool                `json:"experimental"`
	Publisher     string              `json:"publisher"`
	Description   string              `json:"description"`
	CaseSensitive bool                `json:"caseSensitive"`
	Content       string              `json:"content"`
	Count         int                 `json:"count"`
	Property      []codeSystemProp    `json:"property"`
	Concept       []codeSystemConcept `json:"concept"`
}

type codeSystemProp struct {
	Code        string `json:"code"`
	Description string `json:"description"`
	Type        string `json:"type"`
}

type codeSystemConcept struct {
	Code       string                 `json:"code"`
	Display    string                 `json:"display"`
	Definition string                 `json:"definition"`
	Property   []conceptPropertyValue `json:"property"`
}

type conceptPropertyValue struct {
	Code        string `json:"code"`
	ValueString string `json:"valueString"`
}

// CodeSystem returns, as JSON, the FHIR R4 CodeSystem that defines every
// code the encoder writes, with its definition and UCUM unit (property
// "unit"). Its url is Options.CodeSystem, the system of every derived
// Observation's code, so a consumer can resolve the codes; create it
// conditionally on that url. Its version is the algorithm version: a
// change of a definition is a change of the rules. No LOINC code is given
// for any concept: the codes that exist for the same quantities could not
// be confirmed (see the README).
func (e *Encoder) CodeSystem() ([]byte, error) {
	cs := codeSystem{
		ResourceType:  "CodeSystem",
		URL:           e.o.CodeSystem,
		Version:       derive.AlgorithmVersion,
		Name:          "DeadSpaceDerivedValues",
		Title:         "deadspace derived respiratory values",
		Status:        "active",
		Publisher:     "deadspace",
		Description:   "Codes of the values deadspace derives from arterial blood gases and ventilator and capnograph readings. Each value is a calculation, to be read with the clinical picture.",
		CaseSensitive: true,
		Content:       "complete",
		Count:         len(Codes()),
		Property:      []codeSystemProp{{Code: "unit", Description: "The UCUM code of the unit the value is written in", Type: "string"}},
	}
	for _, c := range Codes() {
		p, ok := precisions[c]
		def, okDef := definitions[c]
		if !ok || !okDef {
			return nil, fmt.Errorf("encode: code %s has no precision or definition", c)
		}
		cs.Concept = append(cs.Concept, codeSystemConcept{
			Code: string(c), Display: p.Text, Definition: def,
			Property: []conceptPropertyValue{{Code: "unit", ValueString: p.Unit}},
		})
	}
	b, err := json.Marshal(cs)
	if err != nil {
		return nil, fmt.Errorf("encode: code system: %w", err)
	}
	return b, nil
}
