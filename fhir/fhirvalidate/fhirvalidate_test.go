package fhirvalidate_test

import (
	"strings"
	"testing"

	"github.com/deadspace-fhir/deadspace/fhir/fhirvalidate"
)

// The accepted resources are shaped after the R4 Observation and Provenance
// definitions (hl7.org/fhir/R4/observation.html, provenance.html). The
// rejected ones each break one rule, named beside the case with its source;
// want is a fragment of the message google/fhir v0.7.4 gives (measured on
// this project's machine) or of our own checks.
func TestResource(t *testing.T) {
	const valid = `{"resourceType":"Observation","status":"final","code":{"text":"x"}` // closed by each case
	cases := []struct {
		name string
		in   string
		want []string // empty: valid
	}{
		{"minimal observation", valid + `}`, nil},
		{"quantity with system and code", valid + `,"valueQuantity":{"value":40.0,"unit":"mmHg","system":"http://unitsofmeasure.org","code":"mm[Hg]"}}`, nil},
		{"versioned derivedFrom", valid + `,"derivedFrom":[{"reference":"Observation/a/_history/2"}]}`, nil},
		{"provenance", `{"resourceType":"Provenance","target":[{"reference":"Observation/a"}],"recorded":"2025-03-01T10:15:07Z","agent":[{"who":{"reference":"Device/d"}}],"entity":[{"role":"derivation","what":{"reference":"Observation/b/_history/1"}}]}`, nil},

		// Required elements: Observation.status 1..1 and code 1..1 (R4 observation.html).
		{"missing status", `{"resourceType":"Observation","code":{"text":"x"}}`, []string{`missing required field "status"`}},
		// Bound code: status must be an ObservationStatus code.
		{"bad status", `{"resourceType":"Observation","status":"done","code":{"text":"x"}}`, []string{"code type mismatch"}},
		// dateTime format (R4 datatypes.html#dateTime).
		{"bad dateTime", valid + `,"effectiveDateTime":"yesterday"}`, []string{"expected datetime"}},
		// Reference target types: subject is Patient | Group | Device | Location.
		{"subject is a Medication", valid + `,"subject":{"reference":"Medication/m"}}`, []string{"invalid reference to a Medication resource"}},
		// qty-3: "If a code for the unit is present, the system SHALL also be present".
		{"qty-3 code without system", valid + `,"valueQuantity":{"value":1,"code":"mL"}}`, []string{"qty-3"}},
		// obs-6: "dataAbsentReason SHALL only be present if Observation.value[x] is not present".
		{"obs-6", valid + `,"valueQuantity":{"value":1},"dataAbsentReason":{"text":"y"}}`, []string{"obs-6"}},
		// obs-7: a component repeating Observation.code forbids Observation.value[x].
		{"obs-7", `{"resourceType":"Observation","status":"final","code":{"coding":[{"system":"http://s","code":"c"}]},"valueString":"v","component":[{"code":{"coding":[{"system":"http://s","code":"c"}]},"valueString":"w"}]}`, []string{"obs-7"}},
		// ele-1 and the JSON format rules (from memory): no empty objects,
		// arrays or strings, no null.
		{"empty object", valid + `,"method":{}}`, []string{"empty object"}},
		{"empty array", valid + `,"note":[]}`, []string{"empty array"}},
		{"null", valid + `,"issued":null}`, []string{"null"}},
		{"two problems reported together", `{"resourceType":"Observation","code":{"text":"x"},"valueQuantity":{"value":1,"code":"mL"}}`,
			[]string{`missing required field "status"`, "qty-3"}},
		{"not json", `{"resourceType":`, []string{"invalid JSON"}},
	}
	for _, tc := range cases {
		t.Run(tc.name, func(t *testing.T) {
			err := fhirvalidate.Resource([]byte(tc.in))
			if len(tc.want) == 0 {
				if err != nil {
					t.Fatalf("Resource() = %v, want nil", err)
				}
				return
			}
			if err == nil {
				t.Fatalf("Resource() = nil, want an error containing %q", tc.want)
			}
			for _, w := range tc.want {
				if !strings.Contains(err.Error(), w) {
					t.Errorf("Resource() = %q, want it to contain %q", err, w)
				}
			}
		})
	}
}
