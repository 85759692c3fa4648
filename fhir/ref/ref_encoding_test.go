package ref

import "testing"

// RFC 3986 section 6.2.2: URIs that differ only in the percent-encoding of
// an unreserved character ("%7E" for "~", "%69" for "i"; section 2.3: such
// URIs "are equivalent" and "should be normalized by decoding") or in the
// case of a percent-encoding's hex digits ("%7e" and "%7E", section
// 6.2.2.1) name the same resource. SameBase already normalises the
// scheme's and host's case and a default port by the same section; a
// subject written under the service's own base with its path spelled so
// must be the local patient (one key, the Patient's facts join, a
// correction that only respells the reference is no re-filing), not
// another server's.
func TestKeyPercentEncodedOwnBase(t *testing.T) {
	for _, tc := range []struct {
		name, in, own string
	}{
		{"tilde percent-encoded in the reference", "https://ehr.example/%7Eicu/fhir/Patient/p1", "https://ehr.example/~icu/fhir"},
		{"tilde percent-encoded in the base", "https://ehr.example/~icu/fhir/Patient/p1", "https://ehr.example/%7Eicu/fhir"},
		{"lower-case hex digits", "https://ehr.example/%7eicu/fhir/Patient/p1", "https://ehr.example/%7Eicu/fhir"},
		{"an unreserved letter percent-encoded", "https://ehr.example/fh%69r/Patient/p1", "https://ehr.example/fhir"},
	} {
		t.Run(tc.name, func(t *testing.T) {
			_, key, err := Key(tc.in, tc.own)
			if err != nil || key != "Patient/p1" {
				t.Errorf("Key(%q, %q) = %q, %v; want Patient/p1 (the same server, RFC 3986 6.2.2)", tc.in, tc.own, key, err)
			}
		})
	}
}
