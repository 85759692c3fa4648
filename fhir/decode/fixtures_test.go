package decode

import (
	"encoding/json"
	"maps"
	"strings"
	"testing"

	"github.com/deadspace-fhir/deadspace/derive"
)

// Fixtures are built from realistic base resources with one change each, so
// every case shows the one thing it tests. Structures follow the R4
// Observation and Patient definitions (https://hl7.org/fhir/R4/observation.html);
// codes are the defaults of package codes, whose notes say where each was seen.

type mod func(m map[string]any)

// set replaces the member at a dotted path, creating objects on the way.
func set(path string, v any) mod {
	return func(m map[string]any) {
		parts := strings.Split(path, ".")
		for _, p := range parts[:len(parts)-1] {
			next, ok := m[p].(map[string]any)
			if !ok {
				next = map[string]any{}
				m[p] = next
			}
			m = next
		}
		m[parts[len(parts)-1]] = v
	}
}

// del removes the member at a dotted path.
func del(path string) mod {
	return func(m map[string]any) {
		parts := strings.Split(path, ".")
		for _, p := range parts[:len(parts)-1] {
			next, ok := m[p].(map[string]any)
			if !ok {
				return
			}
			m = next
		}
		delete(m, parts[len(parts)-1])
	}
}

func coding(system, code, display string) map[string]any {
	return map[string]any{"coding": []any{map[string]any{"system": system, "code": code, "display": display}}}
}

func quantity(value, unit, code string) map[string]any {
	return map[string]any{"value": json.Number(value), "unit": unit, "system": "http://unitsofmeasure.org", "code": code}
}

func deepCopy(m map[string]any) map[string]any {
	out := maps.Clone(m)
	for k, v := range out {
		if mm, ok := v.(map[string]any); ok {
			out[k] = deepCopy(mm)
		}
	}
	return out
}

// baseABG is an arterial PCO2 result as a laboratory system sends it.
var baseABG = map[string]any{
	"resourceType": "Observation",
	"id":           "abg-55",
	"meta":         map[string]any{"versionId": "3", "lastUpdated": "2025-03-01T10:20:00Z"},
	"status":       "final",
	"category": []any{map[string]any{"coding": []any{map[string]any{
		"system": "http://terminology.hl7.org/CodeSystem/observation-category", "code": "laboratory"}}}},
	"code":              coding("http://loinc.org", "2019-8", "Carbon dioxide [Partial pressure] in Arterial blood"),
	"subject":           map[string]any{"reference": "Patient/p1"},
	"encounter":         map[string]any{"reference": "Encounter/e1"},
	"effectiveDateTime": "2025-03-01T10:15:00Z",
	"issued":            "2025-03-01T10:19:30Z",
	"valueQuantity":     quantity("40.0", "mmHg", "mm[Hg]"),
}

// panelPaCO2, panelTemperature and panelPaO2 are components of an arterial
// blood gas panel (LOINC 24336-0), shaped as R4's Observation.component
// (https://hl7.org/fhir/R4/observation-definitions.html#Observation.component):
// a code and a value each, no id of their own.
func panelPaCO2(value, unit, code string) map[string]any {
	return map[string]any{"code": coding("http://loinc.org", "2019-8", "Carbon dioxide [Partial pressure] in Arterial blood"), "valueQuantity": quantity(value, unit, code)}
}

var (
	panelTemperature = map[string]any{"code": coding("http://loinc.org", "8310-5", "Body temperature"), "valueQuantity": quantity("38.0", "C", "Cel")}
	panelPaO2        = map[string]any{"code": coding("http://loinc.org", "2703-7", "Oxygen [Partial pressure] in Arterial blood"), "valueQuantity": quantity("85", "mmHg", "mm[Hg]")}
	panelVenous      = map[string]any{"code": coding("http://loinc.org", "2021-4", "Carbon dioxide [Partial pressure] in Venous blood"), "valueQuantity": quantity("46", "mmHg", "mm[Hg]")}
)

// panel is an arterial blood gas panel: baseABG's identity, subject and
// time, code 24336-0, no value of its own, and these components.
func panel(components ...any) []byte {
	return abg(set("code", coding("http://loinc.org", "24336-0", "Gas panel - Arterial blood")), del("valueQuantity"), set("component", components))
}

// baseEtCO2 is a capnograph reading with an MDC code, as a device gateway
// sends it.
var baseEtCO2 = map[string]any{
	"resourceType":      "Observation",
	"id":                "etco2-77",
	"meta":              map[string]any{"versionId": "1", "lastUpdated": "2025-03-01T10:15:05Z"},
	"status":            "final",
	"code":              coding("urn:iso:std:iso:11073:10101", "151708", "MDC_AWAY_CO2_ET"),
	"subject":           map[string]any{"reference": "Patient/p1"},
	"effectiveDateTime": "2025-03-01T10:15:00+01:00",
	"valueQuantity":     quantity("35", "mmHg", "mm[Hg]"),
}

var basePatient = map[string]any{
	"resourceType": "Patient",
	"id":           "p1",
	"meta":         map[string]any{"versionId": "2"},
	"gender":       "male",
	"birthDate":    "1960-05-17",
}

func build(base map[string]any, mods ...mod) []byte {
	m := deepCopy(base)
	for _, f := range mods {
		f(m)
	}
	b, err := json.Marshal(m)
	if err != nil {
		panic(err)
	}
	return b
}

func abg(mods ...mod) []byte     { return build(baseABG, mods...) }
func etco2(mods ...mod) []byte   { return build(baseEtCO2, mods...) }
func patient(mods ...mod) []byte { return build(basePatient, mods...) }

// fixture is one decoding case.
type fixture struct {
	name string
	line []byte
	opts Options
	// Expectations; zero fields are not checked.
	typ    ItemType
	reason derive.Reason
	err    error
	check  func(t *testing.T, it Item)
}

// rawFixtures are lines that cannot be built from a map.
var rawFixtures = []fixture{
	{name: "not JSON", line: []byte(`{"resourceType": "Observation",`), err: ErrNotJSON},
	{name: "JSON array", line: []byte(`[{"resourceType": "Observation"}]`), err: ErrNotResource},
	{name: "no resourceType", line: []byte(`{"id": "x", "status": "final"}`), err: ErrNotResource},
	{name: "resourceType not a string", line: []byte(`{"resourceType": 7}`), err: ErrNotResource},
	{name: "empty resourceType", line: []byte(`{"resourceType": ""}`), err: ErrNotResource},
	{name: "escaped code value still found",
		line: []byte(`{"resourceType":"Observation","id":"o1","status":"final","code":{"coding":[{"system":"http://loinc.org","code":"2019\u002d8"}]},"subject":{"reference":"Patient/p1"},"effectiveDateTime":"2025-03-01T10:15:00Z","valueQuantity":{"value":41,"system":"http://unitsofmeasure.org","code":"mm[Hg]"}}`),
		typ:  ItemReading},
	{name: "escaped member name still found",
		line: []byte(`{"resourceType":"Observation","id":"o1","status":"final","co\u0064e":{"coding":[{"system":"http://loinc.org","code":"2019-8"}]},"subject":{"reference":"Patient/p1"},"effectiveDateTime":"2025-03-01T10:15:00Z","valueQuantity":{"value":41,"system":"http://unitsofmeasure.org","code":"mm[Hg]"}}`),
		typ:  ItemReading},
	{name: "escaped resourceType",
		line: []byte(`{"resource\u0054ype":"Obs\u0065rvation","id":"o1","status":"final","code":{"coding":[{"system":"http://loinc.org","code":"2019-8"}]},"subject":{"reference":"Patient/p1"},"effectiveDateTime":"2025-03-01T10:15:00Z","valueQuantity":{"value":41,"system":"http://unitsofmeasure.org","code":"mm[Hg]"}}`),
		typ:  ItemReading},
	{name: "member names differ in case (encoding/json folds them)",
		line: []byte(`{"resourceType":"Observation","id":"o1","status":"final","CODE":{"Coding":[{"SYSTEM":"http://loinc.org","Code":"2019-8"}]},"subject":{"reference":"Patient/p1"},"effectiveDateTime":"2025-03-01T10:15:00Z","valueQuantity":{"value":41,"system":"http://unitsofmeasure.org","code":"mm[Hg]"}}`)},
	{name: "value as a string", line: []byte(`{"resourceType":"Observation","id":"o1","status":"final","code":{"coding":[{"system":"http://loinc.org","code":"2019-8"}]},"subject":{"reference":"Patient/p1"},"effectiveDateTime":"2025-03-01T10:15:00Z","valueQuantity":{"value":"41","system":"http://unitsofmeasure.org","code":"mm[Hg]"}}`),
		typ: ItemOmitted, reason: derive.ReasonMalformed},
	{name: "Bundle is unrelated", line: []byte(`{"resourceType":"Bundle","type":"collection","entry":[{"resource":{"resourceType":"Observation","id":"o1","status":"final","code":{"coding":[{"system":"http://loinc.org","code":"2019-8"}]}}}]}`),
		typ: ItemUnrelated, check: func(t *testing.T, it Item) {
			if it.ResourceType != "Bundle" {
				t.Errorf("ResourceType = %q", it.ResourceType)
			}
		}},
	{name: "Encounter is unrelated", line: []byte(`{"resourceType":"Encounter","id":"e1","status":"in-progress","class":{"code":"IMP"}}`), typ: ItemUnrelated},
	{name: "deep nesting", line: []byte(`{"resourceType":"Basic","extension":` + strings.Repeat("[", 500) + strings.Repeat("]", 500) + `}`), typ: ItemUnrelated},
	{name: "whitespace and CRLF around the line", line: []byte("  {\"resourceType\":\"Device\"}\r\n"), typ: ItemUnrelated},
}
