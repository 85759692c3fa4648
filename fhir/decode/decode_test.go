package decode

import (
	"errors"
	"math"
	"reflect"
	"strings"
	"testing"
	"time"

	"github.com/deadspace-fhir/deadspace/derive"
	"github.com/deadspace-fhir/deadspace/fhir/codes"
	"github.com/deadspace-fhir/deadspace/fhir/units"
)

func near(a, b float64) bool { return math.Abs(a-b) <= 1e-9*math.Max(1, math.Abs(b)) }

func siteTable(t testing.TB, js string) *codes.Table {
	t.Helper()
	tab, err := codes.Load(strings.NewReader(js))
	if err != nil {
		t.Fatal(err)
	}
	return tab
}

// fixtures returns every case; the property and fuzz tests use them all.
func fixtures(t testing.TB) []fixture {
	wet := units.Options{PercentBasis: units.BasisWet}
	percentRow := siteTable(t, `{"rows": [{"system": "http://loinc.org", "code": "19889-5", "kind": "etco2", "co2Basis": "wet", "priority": 10}]}`)
	mixedRow := siteTable(t, `{"rows": [{"system": "urn:oid:1.2.3.4", "code": "PECO2", "kind": "mixed-expired-co2", "priority": 20}]}`)
	fetco2 := func(value string, mods ...mod) []byte {
		return etco2(append([]mod{set("code", coding("http://loinc.org", "19889-5", "Carbon dioxide/Gas.total.at end expiration in Exhaled gas")),
			set("valueQuantity", quantity(value, "%", "%"))}, mods...)...)
	}
	fs := []fixture{
		// Accepted readings.
		{name: "PaCO2 in mm[Hg]", line: abg(), typ: ItemReading, check: func(t *testing.T, it Item) {
			want := derive.Reading{Ref: "Observation/abg-55/_history/3", Encounter: "Encounter/e1",
				AtMillis: time.Date(2025, 3, 1, 10, 15, 0, 0, time.UTC).UnixMilli(), Value: 40, Kind: derive.KindPaCO2}
			if it.Reading != want {
				t.Errorf("Reading = %+v, want %+v", it.Reading, want)
			}
			if it.Ref != want.Ref || it.Subject != "Patient/p1" || it.ID != "abg-55" || it.VersionID != "3" || it.Status != "final" {
				t.Errorf("identity = %q %q %q %q %q", it.Ref, it.Subject, it.ID, it.VersionID, it.Status)
			}
			if !it.LastUpdated.Equal(time.Date(2025, 3, 1, 10, 20, 0, 0, time.UTC)) {
				t.Errorf("LastUpdated = %v", it.LastUpdated)
			}
			if it.Original != (Original{Value: "40.0", Unit: "mmHg", System: codes.UCUM, Code: "mm[Hg]"}) {
				t.Errorf("Original = %+v", it.Original)
			}
			if it.Priority != 20 || it.Conversion.Source != "code" {
				t.Errorf("Priority %d, Conversion %+v", it.Priority, it.Conversion)
			}
		}},
		// 5.3 kPa = 39.75337903721817 mm[Hg]: measured with ucum-lhc 7.1.10
		// convertUnitTo.
		{name: "PaCO2 in kPa", line: abg(set("valueQuantity", quantity("5.3", "kPa", "kPa"))), typ: ItemReading,
			check: func(t *testing.T, it Item) {
				if !near(it.Reading.Value, 39.75337903721817) || it.Conversion.Text != "5.3 kPa × 7.50064 = 39.7534 mm[Hg]" {
					t.Errorf("value %v, conversion %q", it.Reading.Value, it.Conversion.Text)
				}
			}},
		// Blood gas carries the patient's temperature as a component: the
		// temperature is given in Also at the gas's time, citing the gas.
		{name: "blood gas carries the patient's temperature as a component", line: abg(set("component", []any{
			map[string]any{"code": coding("http://loinc.org", "8310-5", "Body temperature"), "valueQuantity": quantity("33.0", "C", "Cel")},
		})), typ: ItemReading, check: func(t *testing.T, it Item) {
			want := []derive.Reading{{Ref: "Observation/abg-55/_history/3", Encounter: "Encounter/e1",
				AtMillis: time.Date(2025, 3, 1, 10, 15, 0, 0, time.UTC).UnixMilli(), Value: 33, Kind: derive.KindBodyTemperature, Priority: 20}}
			if !reflect.DeepEqual(it.Also, want) || it.Reading.Kind != derive.KindPaCO2 || it.Reading.Value != 40 {
				t.Errorf("Also = %+v, Reading %+v; want %+v beside the PaCO2 of 40", it.Also, it.Reading, want)
			}
		}},
		// 96.8 [degF] = 36 Cel: UCUM defines [degF] by the function degF
		// with unit 5 K/9, that is Cel = ([degF] − 32) × 5/9.
		{name: "blood gas carries the patient's temperature in degF", line: abg(set("component", []any{
			map[string]any{"code": coding("http://loinc.org", "8310-5", "Body temperature"), "valueQuantity": quantity("96.8", "F", "[degF]")},
		})), typ: ItemReading, check: func(t *testing.T, it Item) {
			if len(it.Also) != 1 || !near(it.Also[0].Value, 36) {
				t.Errorf("Also = %+v, want one temperature of 36 Cel", it.Also)
			}
		}},
		{name: "blood gas with an implausible component temperature keeps only the PaCO2", line: abg(set("component", []any{
			map[string]any{"code": coding("http://loinc.org", "8310-5", "Body temperature"), "valueQuantity": quantity("370", "C", "Cel")},
		})), typ: ItemReading, check: func(t *testing.T, it Item) {
			if it.Also != nil || it.Reading.Value != 40 {
				t.Errorf("Also = %+v, Reading %+v; want the PaCO2 alone", it.Also, it.Reading)
			}
		}},
		{name: "blood gas with a component that is not a temperature", line: abg(set("component", []any{
			map[string]any{"code": coding("http://loinc.org", "2019-8", "PaCO2"), "valueQuantity": quantity("35", "mmHg", "mm[Hg]")},
		})), typ: ItemReading, check: func(t *testing.T, it Item) {
			if it.Also != nil {
				t.Errorf("Also = %+v, want none", it.Also)
			}
		}},
		// An arterial blood gas panel whose PaCO2 is a component: the
		// reading cites the panel's own version (a component has no id),
		// and a temperature component comes with it as for a lone PaCO2.
		{name: "panel: PaCO2 and temperature components", line: panel(panelPaO2, panelPaCO2("41", "mmHg", "mm[Hg]"), panelTemperature),
			typ: ItemReading, check: func(t *testing.T, it Item) {
				at := time.Date(2025, 3, 1, 10, 15, 0, 0, time.UTC).UnixMilli()
				want := derive.Reading{Ref: "Observation/abg-55/_history/3", Encounter: "Encounter/e1", AtMillis: at, Value: 41, Kind: derive.KindPaCO2}
				if it.Reading != want || it.Ref != want.Ref || it.Subject != "Patient/p1" || it.Priority != 20 {
					t.Errorf("Reading %+v (item %q %q, priority %d), want %+v", it.Reading, it.Ref, it.Subject, it.Priority, want)
				}
				wantAlso := []derive.Reading{{Ref: want.Ref, Encounter: "Encounter/e1", AtMillis: at, Value: 38, Kind: derive.KindBodyTemperature, Priority: 20}}
				if !reflect.DeepEqual(it.Also, wantAlso) {
					t.Errorf("Also = %+v, want %+v", it.Also, wantAlso)
				}
				if it.Original != (Original{Value: "41", Unit: "mmHg", System: codes.UCUM, Code: "mm[Hg]"}) {
					t.Errorf("Original = %+v, want the component's value", it.Original)
				}
			}},
		{name: "panel: PaCO2 component alone, in kPa", line: panel(panelPaCO2("5.3", "kPa", "kPa")), typ: ItemReading,
			check: func(t *testing.T, it Item) {
				if !near(it.Reading.Value, 39.75337903721817) || it.Also != nil {
					t.Errorf("Reading %+v, Also %+v", it.Reading, it.Also)
				}
			}},
		{name: "panel: the arterial component wins over a venous one before it", line: panel(panelVenous, panelPaCO2("41", "mmHg", "mm[Hg]")), typ: ItemReading,
			check: func(t *testing.T, it Item) {
				if it.Reading.Value != 41 {
					t.Errorf("Reading %+v, want the arterial 41", it.Reading)
				}
			}},
		// A panel that groups separate results by hasMember carries no
		// value: its members are read on their own.
		{name: "panel: members by reference, no components", line: abg(set("code", coding("http://loinc.org", "24336-0", "Gas panel - Arterial blood")), del("valueQuantity"),
			set("hasMember", []any{map[string]any{"reference": "Observation/abg-56"}})), typ: ItemUnrelated},
		{name: "panel: no PaCO2 among its components", line: panel(panelPaO2, panelTemperature), typ: ItemUnrelated},
		{name: "specimen-not-arterial: a panel's venous PCO2 component", line: panel(panelVenous), typ: ItemOmitted, reason: derive.ReasonNotArterial,
			check: func(t *testing.T, it Item) {
				if !strings.Contains(it.Omission.Detail, "component code http://loinc.org|2021-4") || it.Omission.Ref != "Observation/abg-55/_history/3" {
					t.Errorf("omission %+v", it.Omission)
				}
			}},
		{name: "value-absent: a panel's PaCO2 component without a value", line: panel(map[string]any{"code": coding("http://loinc.org", "2019-8", "PaCO2")}),
			typ: ItemOmitted, reason: derive.ReasonNoValue},
		{name: "value-absent: a panel's PaCO2 component with a dataAbsentReason", line: panel(map[string]any{"code": coding("http://loinc.org", "2019-8", "PaCO2"),
			"dataAbsentReason": coding("http://terminology.hl7.org/CodeSystem/data-absent-reason", "error", "Error")}),
			typ: ItemOmitted, reason: derive.ReasonNoValue},
		{name: "value-implausible: a panel's PaCO2 component of 400 mm[Hg]", line: panel(panelPaCO2("400", "mmHg", "mm[Hg]")), typ: ItemOmitted, reason: derive.ReasonImplausible},
		{name: "entered-in-error: a panel", line: abg(set("code", coding("http://loinc.org", "24336-0", "Gas panel - Arterial blood")), del("valueQuantity"),
			set("component", []any{panelPaCO2("41", "mmHg", "mm[Hg]")}), set("status", "entered-in-error")), typ: ItemOmitted, reason: derive.ReasonEnteredInError,
			check: func(t *testing.T, it Item) {
				if it.Ref != "Observation/abg-55/_history/3" || it.Reading.Kind != derive.KindPaCO2 {
					t.Errorf("a withdrawn panel must name itself and its kind: %q %v", it.Ref, it.Reading.Kind)
				}
			}},
		// 5.0 %, PB 760: 35.65 wet, own arithmetic on the published formula
		// of the Intensive Care Med 2004 dead-space review (doi
		// 10.1007/s00134-004-2194-8), PCO2 = FCO2 × (PB − 47); 38.0 dry,
		// FCO2 × PB (common practice).
		{name: "EtCO2 in percent, default dry basis", line: fetco2("5.0"), typ: ItemReading, check: func(t *testing.T, it Item) {
			if !near(it.Reading.Value, 38.0) || it.Reading.Kind != derive.KindEtCO2 || it.Priority != 10 {
				t.Errorf("Reading %+v, priority %d", it.Reading, it.Priority)
			}
		}},
		{name: "EtCO2 in percent, site wet basis", line: fetco2("5.0"), opts: Options{Units: wet}, typ: ItemReading,
			check: func(t *testing.T, it Item) {
				if !near(it.Reading.Value, 35.65) {
					t.Errorf("value %v, want 35.65 (wet basis)", it.Reading.Value)
				}
			}},
		{name: "EtCO2 in percent, code row says wet", line: fetco2("5.0"), opts: Options{Table: percentRow}, typ: ItemReading,
			check: func(t *testing.T, it Item) {
				if !near(it.Reading.Value, 35.65) || !strings.Contains(it.Conversion.Text, "wet basis") {
					t.Errorf("value %v, text %q; want 35.65 (wet basis)", it.Reading.Value, it.Conversion.Text)
				}
			}},
		{name: "EtCO2 with timezone offset", line: etco2(), typ: ItemReading, check: func(t *testing.T, it Item) {
			if want := time.Date(2025, 3, 1, 9, 15, 0, 0, time.UTC).UnixMilli(); it.Reading.AtMillis != want || it.Reading.Encounter != "" {
				t.Errorf("Reading = %+v", it.Reading)
			}
		}},
		{name: "no versionId gives an unversioned Ref", line: abg(del("meta.versionId")), typ: ItemReading, check: func(t *testing.T, it Item) {
			if it.Ref != "Observation/abg-55" || it.Reading.Ref != it.Ref || it.VersionID != "" {
				t.Errorf("Ref %q, Reading.Ref %q", it.Ref, it.Reading.Ref)
			}
		}},
		{name: "effectiveInstant", line: abg(del("effectiveDateTime"), set("effectiveInstant", "2025-03-01T10:15:00.250Z")), typ: ItemReading,
			check: func(t *testing.T, it Item) {
				if want := time.Date(2025, 3, 1, 10, 15, 0, 250e6, time.UTC).UnixMilli(); it.Reading.AtMillis != want {
					t.Errorf("AtMillis = %d, want %d", it.Reading.AtMillis, want)
				}
			}},
		{name: "effectivePeriod start", line: abg(del("effectiveDateTime"), set("effectivePeriod", map[string]any{"start": "2025-03-01T10:14:00Z", "end": "2025-03-01T10:16:00Z"})),
			typ: ItemReading, check: func(t *testing.T, it Item) {
				if want := time.Date(2025, 3, 1, 10, 14, 0, 0, time.UTC).UnixMilli(); it.Reading.AtMillis != want {
					t.Errorf("AtMillis = %d, want %d", it.Reading.AtMillis, want)
				}
			}},
		{name: "an arterial and a venous coding contradict each other: refused", line: abg(set("code", map[string]any{"coding": []any{
			map[string]any{"system": "http://lab.example/codes", "code": "PCO2A"},
			map[string]any{"system": "http://loinc.org", "code": "2019-8"},
			map[string]any{"system": "http://loinc.org", "code": "2021-4"}}})), typ: ItemOmitted, reason: derive.ReasonNotArterial},
		{name: "a blood PCO2 of unspecified specimen beside an arterial coding: arterial", line: abg(set("code", map[string]any{"coding": []any{
			map[string]any{"system": "http://loinc.org", "code": "11557-6"},
			map[string]any{"system": "http://loinc.org", "code": "2019-8"}}})), typ: ItemReading},
		{name: "a blood PCO2 of unspecified specimen alone: refused", line: abg(set("code", map[string]any{"coding": []any{
			map[string]any{"system": "http://loinc.org", "code": "11557-6"}}})), typ: ItemOmitted, reason: derive.ReasonNotArterial},
		{name: "unit from Quantity.unit when no code", line: abg(set("valueQuantity", map[string]any{"value": 40, "unit": "mm[Hg]"})), typ: ItemReading,
			check: func(t *testing.T, it Item) {
				if it.Conversion.Source != "unit" {
					t.Errorf("Source = %q", it.Conversion.Source)
				}
			}},
		{name: "absolute and versioned subject", line: abg(set("subject.reference", "https://ehr.example/fhir/Patient/p1/_history/4")), typ: ItemReading,
			check: func(t *testing.T, it Item) {
				if it.Subject != "https://ehr.example/fhir/Patient/p1" {
					t.Errorf("Subject = %q", it.Subject)
				}
			}},
		{name: "measured tidal volume carries its priority", line: etco2(set("code", coding("http://loinc.org", "76007-4", "Tidal volume expired")),
			set("valueQuantity", quantity("0.48", "L", "L"))), typ: ItemReading, check: func(t *testing.T, it Item) {
			if !near(it.Reading.Value, 480) || it.Reading.Kind != derive.KindTidalVolume || it.Priority != 30 {
				t.Errorf("Reading %+v, priority %d", it.Reading, it.Priority)
			}
		}},
		{name: "set tidal volume has lower priority", line: etco2(set("code", coding("http://loinc.org", "20112-9", "Tidal volume setting")),
			set("valueQuantity", quantity("450", "mL", "mL"))), typ: ItemReading, check: func(t *testing.T, it Item) {
			if it.Priority != 10 {
				t.Errorf("priority %d", it.Priority)
			}
		}},
		{name: "respiratory rate with annotation", line: etco2(set("code", coding("http://loinc.org", "9279-1", "Respiratory rate")),
			set("valueQuantity", quantity("18", "breaths/min", "{breaths}/min"))), typ: ItemReading, check: func(t *testing.T, it Item) {
			if it.Reading.Value != 18 || it.Reading.Kind != derive.KindRespRate {
				t.Errorf("Reading %+v", it.Reading)
			}
		}},
		// 70 [in_i] = 177.8 cm: ucum-lhc 7.1.10.
		{name: "height in inches", line: abg(set("code", coding("http://loinc.org", "8302-2", "Body height")),
			set("valueQuantity", quantity("70", "in", "[in_i]"))), typ: ItemReading, check: func(t *testing.T, it Item) {
			if !near(it.Reading.Value, 177.8) || it.Reading.Kind != derive.KindHeight {
				t.Errorf("Reading %+v", it.Reading)
			}
		}},
		{name: "site row for mixed-expired CO2", line: etco2(set("code", coding("urn:oid:1.2.3.4", "PECO2", "mixed expired")),
			set("valueQuantity", quantity("27", "mmHg", "mm[Hg]"))), opts: Options{Table: mixedRow}, typ: ItemReading,
			check: func(t *testing.T, it Item) {
				if it.Reading.Kind != derive.KindMixedExpiredCO2 {
					t.Errorf("Kind %v", it.Reading.Kind)
				}
			}},

		// Unrelated.
		{name: "heart rate is unrelated", line: etco2(set("code", coding("http://loinc.org", "8867-4", "Heart rate"))), typ: ItemUnrelated,
			check: func(t *testing.T, it Item) {
				if !reflect.DeepEqual(it, Item{Type: ItemUnrelated, ResourceType: "Observation", ID: "etco2-77"}) {
					t.Errorf("unrelated item carries more than its type and id: %+v", it)
				}
			}},
		{name: "unrelated: an id that is not a FHIR id is left out", line: etco2(set("code", coding("http://loinc.org", "8867-4", "Heart rate")), set("id", "no spaces allowed")),
			typ: ItemUnrelated, check: func(t *testing.T, it Item) {
				if it.ID != "" {
					t.Errorf("ID %q, want none", it.ID)
				}
			}},
		{name: "unrelated: an id spelled otherwise is read as encoding/json reads it", line: []byte(`{"resourceType":"Observation","id":"a","ID":"b","status":"final","code":{"coding":[{"system":"http://loinc.org","code":"8867-4"}]}}`),
			typ: ItemUnrelated, check: func(t *testing.T, it Item) {
				if it.ID != "b" {
					t.Errorf("ID %q, want the last member encoding/json matches, b", it.ID)
				}
			}},
		{name: "unrelated: an id that is not a string", line: []byte(`{"resourceType":"Observation","id":7,"status":"final","code":{"coding":[{"system":"http://loinc.org","code":"8867-4"}]}}`),
			typ: ItemUnrelated, check: func(t *testing.T, it Item) {
				if it.ID != "" {
					t.Errorf("ID %q, want none", it.ID)
				}
			}},
		{name: "PaCO2 code under another system is unrelated", line: abg(set("code", coding("http://snomed.info/sct", "2019-8", ""))), typ: ItemUnrelated},
		{name: "ignored by the site", line: etco2(set("code", coding("http://loinc.org", "9279-1", "Respiratory rate"))),
			opts: Options{Table: siteTable(t, `{"rows": [{"system": "http://loinc.org", "code": "9279-1", "action": "ignore"}]}`)}, typ: ItemUnrelated},

		// One case per reason.
		{name: "resource-malformed: no id", line: abg(del("id")), typ: ItemOmitted, reason: derive.ReasonMalformed, check: func(t *testing.T, it Item) {
			if it.Omission.Detail != "no id" {
				t.Errorf("detail %q", it.Omission.Detail)
			}
		}},
		{name: "resource-malformed: id not a FHIR id", line: abg(set("id", "a/b")), typ: ItemOmitted, reason: derive.ReasonMalformed},
		{name: "resource-malformed: member of the wrong type", line: abg(set("status", 5)), typ: ItemOmitted, reason: derive.ReasonMalformed},
		{name: "resource-malformed: two value[x]", line: abg(set("valueString", "40")), typ: ItemOmitted, reason: derive.ReasonMalformed},
		{name: "resource-malformed: two effective[x]", line: abg(set("effectiveInstant", "2025-03-01T10:15:00Z")), typ: ItemOmitted, reason: derive.ReasonMalformed},
		{name: "entered-in-error keeps identity", line: abg(set("status", "entered-in-error")), typ: ItemOmitted, reason: derive.ReasonEnteredInError,
			check: func(t *testing.T, it Item) {
				if it.ID != "abg-55" || it.VersionID != "3" || it.Subject != "Patient/p1" || it.Omission.Ref != "Observation/abg-55/_history/3" {
					t.Errorf("identity lost: %+v", it)
				}
			}},
		{name: "status-not-usable: preliminary", line: abg(set("status", "preliminary")), typ: ItemOmitted, reason: derive.ReasonStatus},
		{name: "status-not-usable: absent", line: abg(del("status")), typ: ItemOmitted, reason: derive.ReasonStatus},
		{name: "specimen-not-arterial: venous", line: abg(set("code", coding("http://loinc.org", "2021-4", "Carbon dioxide [Partial pressure] in Venous blood"))),
			typ: ItemOmitted, reason: derive.ReasonNotArterial},
		{name: "value-absent: no value", line: abg(del("valueQuantity")), typ: ItemOmitted, reason: derive.ReasonNoValue},
		{name: "value-absent: dataAbsentReason", line: abg(del("valueQuantity"), set("dataAbsentReason", coding("http://terminology.hl7.org/CodeSystem/data-absent-reason", "error", "Error"))),
			typ: ItemOmitted, reason: derive.ReasonNoValue, check: func(t *testing.T, it Item) {
				if !strings.Contains(it.Omission.Detail, "error") {
					t.Errorf("detail %q", it.Omission.Detail)
				}
			}},
		{name: "value-absent: valueString", line: abg(del("valueQuantity"), set("valueString", "40")), typ: ItemOmitted, reason: derive.ReasonNoValue},
		{name: "value-absent: quantity without value", line: abg(del("valueQuantity.value")), typ: ItemOmitted, reason: derive.ReasonNoValue},
		{name: "value-censored: comparator", line: abg(set("valueQuantity.comparator", "<")), typ: ItemOmitted, reason: derive.ReasonCensored},
		{name: "unit-not-recognised: mmHg as code", line: abg(set("valueQuantity.code", "mmHg")), typ: ItemOmitted, reason: derive.ReasonUnitUnknown},
		{name: "unit-not-recognised: non-UCUM system", line: abg(set("valueQuantity.system", "http://lab.example/units")), typ: ItemOmitted, reason: derive.ReasonUnitUnknown},
		{name: "unit-wrong-dimension: mL for PaCO2", line: abg(set("valueQuantity", quantity("40", "mL", "mL"))), typ: ItemOmitted, reason: derive.ReasonUnitMismatch},
		{name: "unit-wrong-dimension: percent PaCO2", line: abg(set("valueQuantity", quantity("5", "%", "%"))), typ: ItemOmitted, reason: derive.ReasonUnitMismatch},
		{name: "time-absent: date only", line: abg(set("effectiveDateTime", "2025-03-01")), typ: ItemOmitted, reason: derive.ReasonNoTime},
		{name: "time-absent: no timezone", line: abg(set("effectiveDateTime", "2025-03-01T10:15:00")), typ: ItemOmitted, reason: derive.ReasonNoTime,
			check: func(t *testing.T, it Item) {
				if !strings.Contains(it.Omission.Detail, "timezone") {
					t.Errorf("detail %q", it.Omission.Detail)
				}
			}},
		{name: "time-absent: only issued", line: abg(del("effectiveDateTime")), typ: ItemOmitted, reason: derive.ReasonNoTime},
		{name: "time-absent: period without start", line: abg(del("effectiveDateTime"), set("effectivePeriod", map[string]any{"end": "2025-03-01T10:16:00Z"})),
			typ: ItemOmitted, reason: derive.ReasonNoTime},
		{name: "subject-absent: none", line: abg(del("subject")), typ: ItemOmitted, reason: derive.ReasonNoSubject},
		{name: "subject-absent: Group", line: abg(set("subject.reference", "Group/g1")), typ: ItemOmitted, reason: derive.ReasonNoSubject},
		{name: "subject-absent: contained", line: abg(set("subject.reference", "#p1")), typ: ItemOmitted, reason: derive.ReasonNoSubject},
		{name: "subject-absent: conditional", line: abg(set("subject.reference", "Patient?identifier=urn:mrn|123")), typ: ItemOmitted, reason: derive.ReasonNoSubject},
		{name: "subject-absent: urn:uuid", line: abg(set("subject.reference", "urn:uuid:0f8a11aa-0000-4000-8000-000000000000")), typ: ItemOmitted, reason: derive.ReasonNoSubject},
		{name: "subject-absent: relative with a prefix", line: abg(set("subject.reference", "fhir/Patient/p1")), typ: ItemOmitted, reason: derive.ReasonNoSubject},
		{name: "subject-absent: identifier only", line: abg(set("subject", map[string]any{"identifier": map[string]any{"system": "urn:mrn", "value": "123"}})),
			typ: ItemOmitted, reason: derive.ReasonNoSubject},
		{name: "value-implausible: 400 mm[Hg]", line: abg(set("valueQuantity", quantity("400", "mmHg", "mm[Hg]"))), typ: ItemOmitted, reason: derive.ReasonImplausible,
			check: func(t *testing.T, it Item) {
				if !strings.Contains(it.Omission.Detail, "range") {
					t.Errorf("detail %q", it.Omission.Detail)
				}
			}},

		// Patients.
		{name: "Patient", line: patient(), typ: ItemPatient, check: func(t *testing.T, it Item) {
			want := derive.Patient{Ref: "Patient/p1/_history/2", Sex: derive.SexMale, BirthDate: time.Date(1960, 5, 17, 0, 0, 0, 0, time.UTC)}
			if it.Patient != want || it.Subject != "Patient/p1" {
				t.Errorf("Patient = %+v, subject %q; want %+v", it.Patient, it.Subject, want)
			}
		}},
		{name: "Patient birth year only is 1 July", line: patient(set("birthDate", "1960"), set("gender", "female")), typ: ItemPatient, check: func(t *testing.T, it Item) {
			if !it.Patient.BirthDate.Equal(time.Date(1960, 7, 1, 0, 0, 0, 0, time.UTC)) || it.Patient.Sex != derive.SexFemale {
				t.Errorf("Patient = %+v", it.Patient)
			}
		}},
		{name: "Patient birth month only is the 15th", line: patient(set("birthDate", "1960-02"), set("gender", "other")), typ: ItemPatient, check: func(t *testing.T, it Item) {
			if !it.Patient.BirthDate.Equal(time.Date(1960, 2, 15, 0, 0, 0, 0, time.UTC)) || it.Patient.Sex != derive.SexUnknown {
				t.Errorf("Patient = %+v", it.Patient)
			}
		}},
		{name: "Patient without birth date", line: patient(del("birthDate")), typ: ItemPatient, check: func(t *testing.T, it Item) {
			if !it.Patient.BirthDate.IsZero() {
				t.Errorf("BirthDate = %v", it.Patient.BirthDate)
			}
		}},
		{name: "Patient without id", line: patient(del("id")), typ: ItemOmitted, reason: derive.ReasonMalformed},
	}
	return append(fs, rawFixtures...)
}

func TestDecode(t *testing.T) {
	for _, fx := range fixtures(t) {
		t.Run(fx.name, func(t *testing.T) {
			it, err := New(fx.opts).Decode(fx.line)
			if fx.err != nil {
				if !errors.Is(err, fx.err) {
					t.Fatalf("err = %v, want %v", err, fx.err)
				}
				return
			}
			if err != nil {
				t.Fatal(err)
			}
			if fx.typ != 0 && it.Type != fx.typ {
				t.Fatalf("Type = %v (%+v), want %v", it.Type, it.Omission, fx.typ)
			}
			if fx.reason != "" && it.Omission.Reason != fx.reason {
				t.Fatalf("Reason = %s (%s), want %s", it.Omission.Reason, it.Omission.Detail, fx.reason)
			}
			if it.Type == ItemOmitted && (it.Omission.Reason == "" || it.Omission.Detail == "") {
				t.Errorf("omission without reason or detail: %+v", it.Omission)
			}
			if fx.check != nil {
				fx.check(t, it)
			}
		})
	}
}

// Every reason the decoder can give has a named case above.
func TestEveryInputReasonHasACase(t *testing.T) {
	seen := map[derive.Reason]bool{}
	for _, fx := range fixtures(t) {
		seen[fx.reason] = true
	}
	for _, r := range []derive.Reason{derive.ReasonMalformed, derive.ReasonStatus, derive.ReasonEnteredInError,
		derive.ReasonNotArterial, derive.ReasonNoValue, derive.ReasonCensored, derive.ReasonUnitUnknown,
		derive.ReasonUnitMismatch, derive.ReasonNoTime, derive.ReasonNoSubject, derive.ReasonImplausible} {
		if !seen[r] {
			t.Errorf("no fixture for %s", r)
		}
	}
}

// sameItem compares two items, times by instant (parsing an offset makes a
// new *time.Location each time).
func sameItem(a, b Item) bool {
	if !a.LastUpdated.Equal(b.LastUpdated) || !a.Patient.BirthDate.Equal(b.Patient.BirthDate) {
		return false
	}
	a.LastUpdated, b.LastUpdated = time.Time{}, time.Time{}
	a.Patient.BirthDate, b.Patient.BirthDate = time.Time{}, time.Time{}
	return reflect.DeepEqual(a, b)
}

// decodeBoth decodes with and without the prefilter.
func decodeBoth(opts Options, line []byte) (fast, full Item, fastErr, fullErr error) {
	d := New(opts)
	fast, fastErr = d.Decode(line)
	d.noPrefilter = true
	full, fullErr = d.Decode(line)
	return
}

// The prefilter must never change a result.
func TestPrefilterMatchesFullDecode(t *testing.T) {
	for _, fx := range fixtures(t) {
		t.Run(fx.name, func(t *testing.T) {
			fast, full, fastErr, fullErr := decodeBoth(fx.opts, fx.line)
			if (fastErr == nil) != (fullErr == nil) || !sameItem(fast, full) {
				t.Errorf("prefilter: %+v, %v\nfull:      %+v, %v", fast, fastErr, full, fullErr)
			}
		})
	}
}

// The prefilter validates JSON exactly as encoding/json does.
func TestScanMaxDepth(t *testing.T) {
	for _, tc := range []struct {
		name  string
		depth int
		ok    bool
	}{{"at encoding/json's limit", maxDepth, true}, {"one past it", maxDepth + 1, false}} {
		t.Run(tc.name, func(t *testing.T) {
			line := []byte(strings.Repeat("[", tc.depth) + strings.Repeat("]", tc.depth))
			_, err := scan(line, nil)
			if (err == nil) != tc.ok || (err == nil) != jsonValid(line) {
				t.Errorf("scan err = %v, json.Valid = %v", err, jsonValid(line))
			}
		})
	}
}

// TestRecoded: an Observation with no code this service uses is read, on
// request, as a version of a resource that may have been one (a blood gas
// re-coded as glucose): its id, version, time and subject, and the reason.
func TestRecoded(t *testing.T) {
	d := New(Options{})
	glucose := func(extra string) []byte {
		return []byte(`{"resourceType":"Observation","id":"g1","meta":{"versionId":"2","lastUpdated":"2026-03-01T01:21:00Z"},"status":"amended",` +
			`"code":{"coding":[{"system":"http://loinc.org","code":"2345-7"}]}` + extra + `,"effectiveDateTime":"2026-03-01T01:00:00Z",` +
			`"valueQuantity":{"value":100,"unit":"mg/dL","system":"http://unitsofmeasure.org","code":"mg/dL"}}`)
	}
	for _, tc := range []struct {
		name string
		line []byte
		ok   bool
	}{
		{"glucose with a patient", glucose(`,"subject":{"reference":"Patient/p1"}`), true},
		{"no subject", glucose(``), false},
		{"a group", glucose(`,"subject":{"reference":"Group/g"}`), false},
		{"no id", []byte(`{"resourceType":"Observation","status":"final","code":{"coding":[{"system":"http://loinc.org","code":"2345-7"}]},"subject":{"reference":"Patient/p1"}}`), false},
	} {
		t.Run(tc.name, func(t *testing.T) {
			if it, err := d.Decode(tc.line); err != nil || it.Type != ItemUnrelated {
				t.Fatalf("Decode: %v, %v; want unrelated", it.Type, err)
			}
			it, ok := d.Recoded(tc.line)
			if ok != tc.ok {
				t.Fatalf("ok = %v, want %v (%+v)", ok, tc.ok, it)
			}
			if !ok {
				return
			}
			want := "Observation/g1/_history/2"
			if it.Type != ItemOmitted || it.Ref != want || it.ID != "g1" || it.VersionID != "2" || it.Subject != "Patient/p1" ||
				!it.LastUpdated.Equal(time.Date(2026, 3, 1, 1, 21, 0, 0, time.UTC)) ||
				it.Omission.Reason != derive.ReasonRecoded || it.Omission.Ref != want || !strings.Contains(it.Omission.Detail, "2345-7") {
				t.Errorf("Recoded = %+v", it)
			}
		})
	}
}
