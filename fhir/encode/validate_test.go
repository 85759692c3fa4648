package encode_test

import (
	"encoding/json"
	"fmt"
	"sort"
	"testing"

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
