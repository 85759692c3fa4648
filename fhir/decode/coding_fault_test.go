package decode

import (
	"strings"
	"testing"

	"github.com/deadspace-fhir/deadspace/derive"
)

// A PCO2 result whose code carries both the arterial LOINC code (2019-8)
// and the venous one (2021-4) does not say which blood was sampled: the
// codings of one CodeableConcept are meant to be translations of one
// concept, and these two contradict each other on the specimen. Venous
// PCO2 runs several mm[Hg] above arterial and its difference from arterial
// is unpredictable (Byrne et al. 2014 meta-analysis: 95 % prediction
// interval −10.7 to 2.4 mm Hg; Kelly 2013: limits of agreement up to about
// ±20 mm Hg), so a venous value taken as arterial gives a falsely wide
// gradient and a falsely high dead space. The service's rule is that venous
// PCO2 is never used as PaCO2; the conservative reading of an ambiguous
// specimen is "not shown to be arterial". Today the first coding in the
// table decides, so the same resource is refused or used depending only on
// the order its codings were written in. A clinician expects it refused
// with specimen-not-arterial in either order.
func TestArterialAndVenousCodingsTogetherAreNotArterial(t *testing.T) {
	t.Parallel()
	const gas = `{"resourceType":"Observation","id":"pco2-7","meta":{"versionId":"1"},"status":"final",
	"code":{"coding":[CODINGS]},"subject":{"reference":"Patient/p1"},
	"effectiveDateTime":"2025-03-01T10:15:00Z",
	"valueQuantity":{"value":52,"unit":"mmHg","system":"http://unitsofmeasure.org","code":"mm[Hg]"}}`
	const arterial = `{"system":"http://loinc.org","code":"2019-8"}`
	const venous = `{"system":"http://loinc.org","code":"2021-4"}`
	cases := []struct{ name, codings string }{
		{"arterial coding first, venous second", arterial + "," + venous},
		{"venous coding first, arterial second", venous + "," + arterial},
	}
	dec := New(Options{})
	for _, tc := range cases {
		t.Run(tc.name, func(t *testing.T) {
			t.Parallel()
			it, err := dec.Decode([]byte(strings.Replace(gas, "CODINGS", tc.codings, 1)))
			if err != nil {
				t.Fatal(err)
			}
			if it.Type != ItemOmitted || it.Omission.Reason != derive.ReasonNotArterial {
				t.Errorf("decoded as %s (kind %s, omission %+v); want omitted with %s: the specimen may be venous",
					it.Type, it.Reading.Kind, it.Omission, derive.ReasonNotArterial)
			}
		})
	}
}
