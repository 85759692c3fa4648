package encode_test

import (
	"encoding/json"
	"fmt"
	"sort"
	"strings"
	"testing"

	"github.com/deadspace-fhir/deadspace/derive"
	"github.com/deadspace-fhir/deadspace/fhir/encode"
	"github.com/deadspace-fhir/deadspace/fhir/fhirvalidate"
)

// TestValidates runs every resource the encoder produces through the
// google/fhir v0.7.4 R4 validating unmarshaller plus the invariants
// fhirvalidate adds (qty-3, obs-6, obs-7, no empty elements).
func TestValidates(t *testing.T) {
	cases := goldenCases(t)
	names := make([]string, 0, len(cases))
	for n := range cases {
		names = append(names, n)
	}
	sort.Strings(names)
	for _, name := range names {
		for i, r := range cases[name] {
			t.Run(fmt.Sprintf("%s/%d", name, i), func(t *testing.T) {
				b, err := json.Marshal(r)
				if err != nil {
					t.Fatal(err)
				}
				if err := fhirvalidate.Resource(b); err != nil {
					t.Errorf("invalid %T:\n%v\n%s", r, err, b)
				}
			})
		}
	}
}

// TestCodeSystemValidates checks the project's CodeSystem (rule 14 of
// issue 8) against FHIR R4 with the same validator, and that it defines
// every code the encoder may write, each with a definition and a unit.
func TestCodeSystemValidates(t *testing.T) {
	e := newEncoder(t)
	b, err := e.CodeSystem()
	if err != nil {
		t.Fatal(err)
	}
	if err := fhirvalidate.Resource(b); err != nil {
		t.Fatalf("invalid CodeSystem: %v\n%s", err, b)
	}
	var cs struct {
		URL     string
		Count   int
		Concept []struct {
			Code, Display, Definition string
			Property                  []struct{ Code, ValueString string }
		}
	}
	if err := json.Unmarshal(b, &cs); err != nil {
		t.Fatal(err)
	}
	if cs.URL != e.Options().CodeSystem || cs.Count != len(encode.Codes()) || len(cs.Concept) != cs.Count {
		t.Errorf("url %q count %d concepts %d", cs.URL, cs.Count, len(cs.Concept))
	}
	for i, c := range cs.Concept {
		p, ok := encode.PrecisionOf(derive.Code(c.Code))
		if !ok || c.Code != string(encode.Codes()[i]) || c.Definition == "" || c.Display != p.Text ||
			len(c.Property) != 1 || c.Property[0].ValueString != p.Unit {
			t.Errorf("concept %+v", c)
		}
		if strings.Contains(c.Definition, "memory") || strings.Contains(c.Definition, "believed") {
			t.Errorf("%s: definition carries an uncertain attribution", c.Code)
		}
	}
}
