package notify_test

import (
	"testing"

	"github.com/deadspace-fhir/deadspace/fhir/notify"
)

// The reference forms are those of FHIR R4 "References between resources"
// (https://hl7.org/fhir/R4/references.html): relative [type]/[id], absolute
// URLs, version-specific [type]/[id]/_history/[vid], contained "#id" and, in
// Bundles, urn:uuid/urn:oid; the id syntax is the R4 id datatype
// ([A-Za-z0-9\-\.]{1,64}, https://hl7.org/fhir/R4/datatypes.html#id).
func TestRelativeRef(t *testing.T) {
	t.Parallel()
	cases := []struct {
		name, ref, base string
		typ, id         string
		ok              bool
	}{
		{"relative", "Observation/123", "", "Observation", "123", true},
		{"relative versioned", "Observation/123/_history/2", "", "Observation", "123", true},
		{"absolute, no base", "https://x/fhir/Observation/123", "", "Observation", "123", true},
		{"absolute versioned, no base", "https://x/fhir/Observation/123/_history/2", "", "Observation", "123", true},
		{"IG focus", igEnc, "", "Encounter", "86009987-eabe-42bf-8c02-b112b18cb616", true},
		{"under base", "https://x/fhir/Observation/123", "https://x/fhir", "Observation", "123", true},
		{"under base with slash", "https://x/fhir/Observation/123/_history/2", "https://x/fhir/", "Observation", "123", true},
		{"relative with base", "Patient/p.1-a", "https://x/fhir", "Patient", "p.1-a", true},
		{"other server", "https://y/fhir/Observation/123", "https://x/fhir", "", "", false},
		{"deeper than base", "https://x/fhir/extra/Observation/123", "https://x/fhir", "", "", false},
		{"contained", "#obs1", "", "", "", false},
		{"conditional", "Observation?identifier=a|b", "", "", "", false},
		{"urn:uuid", "urn:uuid:292d3c72-edc1-4d8a-afaa-d85e19c7f563", "", "", "", false},
		{"type only", "Observation", "", "", "", false},
		{"lower-case type", "observation/1", "", "", "", false},
		{"id too long", "Observation/" + string(make([]byte, 65)), "", "", "", false},
		{"id with slash noise", "Observation/1/extra", "", "", "", false},
		{"history without version", "Observation/1/_history", "", "", "", false},
		{"bad version", "Observation/1/_history/a_b", "", "", "", false},
		{"empty", "", "", "", "", false},
		{"host only", "https://x/", "", "", "", false},
		{"space", "Observation/1 2", "", "", "", false},
	}
	for _, tc := range cases {
		t.Run(tc.name, func(t *testing.T) {
			t.Parallel()
			typ, id, ok := notify.RelativeRef(tc.ref, tc.base)
			if typ != tc.typ || id != tc.id || ok != tc.ok {
				t.Errorf("RelativeRef(%q, %q) = %q, %q, %v; want %q, %q, %v", tc.ref, tc.base, typ, id, ok, tc.typ, tc.id, tc.ok)
			}
		})
	}
}
