package notify

import (
	"strings"

	"github.com/deadspace-fhir/deadspace/fhir/ref"
)

// RelativeRef turns a FHIR reference into its type and id:
// "Observation/123", "Observation/123/_history/2",
// "https://ehr.example/fhir/Observation/123" and
// "https://ehr.example/fhir/Observation/123/_history/2" all give
// ("Observation", "123").
//
// base is the FHIR server's base URL. When it is set, an absolute reference
// must lie under it, so that a focus on another server is not read from
// ours; the comparison is on the exact text, trailing slash aside. When base
// is empty, any http(s) URL is accepted and its last path segments are read.
// Contained ("#x"), conditional ("Observation?code=...") and urn:uuid/urn:oid
// references give ok=false: none of them names a resource the server can
// read.
//
// Only the URL is handled here: what remains, "Type/id" or
// "Type/id/_history/version", is read by the one reference parser,
// [ref.Parse].
func RelativeRef(s, base string) (typ, id string, ok bool) {
	r, b, err := ref.ParseAny(s)
	if err != nil || (base != "" && b != "" && strings.TrimRight(b, "/") != strings.TrimRight(base, "/")) {
		return "", "", false
	}
	return r.Type, r.ID, true
}
