package notify

import (
	"net/url"
	"strings"
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
func RelativeRef(ref, base string) (typ, id string, ok bool) {
	if ref == "" || strings.ContainsAny(ref, "?# \t\r\n") {
		return "", "", false
	}
	var segs []string
	exact := true
	switch {
	case strings.HasPrefix(ref, "http://") || strings.HasPrefix(ref, "https://"):
		if base != "" {
			b := strings.TrimRight(base, "/") + "/"
			if !strings.HasPrefix(ref, b) {
				return "", "", false
			}
			segs = strings.Split(ref[len(b):], "/")
			break
		}
		u, err := url.Parse(ref)
		if err != nil || u.Host == "" {
			return "", "", false
		}
		segs = strings.Split(strings.TrimPrefix(u.Path, "/"), "/")
		exact = false // the server base may have any number of segments
	case strings.Contains(ref, ":"):
		return "", "", false // urn:uuid, urn:oid, other schemes
	default:
		segs = strings.Split(ref, "/")
	}
	n := len(segs)
	switch {
	case n >= 4 && segs[n-2] == "_history" && (!exact || n == 4):
		if !IsID(segs[n-1]) {
			return "", "", false
		}
		typ, id = segs[n-4], segs[n-3]
	case n >= 2 && (!exact || n == 2):
		typ, id = segs[n-2], segs[n-1]
	default:
		return "", "", false
	}
	if !isType(typ) || !IsID(id) {
		return "", "", false
	}
	return typ, id, true
}

// isType checks the shape of a FHIR resource type name, not membership of
// the R4 list: a server on a later version may send a type R4 lacks.
func isType(s string) bool {
	if len(s) == 0 || len(s) > 64 || s[0] < 'A' || s[0] > 'Z' {
		return false
	}
	for i := 1; i < len(s); i++ {
		c := s[i]
		if !(c >= 'a' && c <= 'z' || c >= 'A' && c <= 'Z') {
			return false
		}
	}
	return true
}

// IsID checks the R4 id datatype: [A-Za-z0-9\-\.]{1,64}
// (https://hl7.org/fhir/R4/datatypes.html#id).
func IsID(s string) bool {
	if len(s) == 0 || len(s) > 64 {
		return false
	}
	for i := 0; i < len(s); i++ {
		c := s[i]
		if !(c >= 'a' && c <= 'z' || c >= 'A' && c <= 'Z' || c >= '0' && c <= '9' || c == '-' || c == '.') {
			return false
		}
	}
	return true
}
