package notify

import (
	"net/url"
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
	if s == "" || strings.ContainsAny(s, "?# \t\r\n") {
		return "", "", false
	}
	rel := s
	switch {
	case strings.HasPrefix(s, "http://") || strings.HasPrefix(s, "https://"):
		if base != "" {
			b := strings.TrimRight(base, "/") + "/"
			if !strings.HasPrefix(s, b) {
				return "", "", false
			}
			rel = s[len(b):]
			break
		}
		u, err := url.Parse(s)
		if err != nil || u.Host == "" {
			return "", "", false
		}
		// The server base may have any number of segments: the reference
		// is the last two, or the last four when they end in a version.
		segs := strings.Split(strings.TrimPrefix(u.Path, "/"), "/")
		n := len(segs)
		switch {
		case n >= 4 && segs[n-2] == "_history":
			segs = segs[n-4:]
		case n >= 2:
			segs = segs[n-2:]
		}
		rel = strings.Join(segs, "/")
	case strings.Contains(s, ":"):
		return "", "", false // urn:uuid, urn:oid, other schemes
	}
	r, err := ref.Parse(rel)
	if err != nil {
		return "", "", false
	}
	return r.Type, r.ID, true
}
