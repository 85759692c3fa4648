// Package ref is the one place where relative FHIR references
// ("Observation/x", "Observation/x/_history/2") are parsed and where two
// versions of one resource are ordered. Replay, the live store, the engine
// and the encoder all use it, so they cannot disagree about which version
// of an input is the latest or what a reference names.
package ref

import (
	"cmp"
	"fmt"
	"net/url"
	"strings"
	"time"
)

// Ref is a parsed relative literal reference, optionally versioned.
type Ref struct {
	Type, ID, Version string
}

// Parse reads "Type/id" or "Type/id/_history/version". Type is a FHIR
// resource type name (an upper-case letter, then letters); id and version
// follow FHIR's id type, [A-Za-z0-9\-\.]{1,64} (R4 datatypes.html#id).
func Parse(s string) (Ref, error) {
	typ, rest, ok := strings.Cut(s, "/")
	if !ok || !IsType(typ) {
		return Ref{}, fmt.Errorf("reference %q is not of the form Type/id[/_history/version]", s)
	}
	id, vid, versioned := strings.Cut(rest, "/_history/")
	if !IsID(id) || (versioned && !IsID(vid)) {
		return Ref{}, fmt.Errorf("reference %q is not of the form Type/id[/_history/version]", s)
	}
	return Ref{Type: typ, ID: id, Version: vid}, nil
}

// ParseAny reads a reference that may be absolute: "Type/id[/_history/v]"
// exactly, or an http(s) URL whose path ends in those segments (FHIR R4
// references.html#literal: the server base may have any number of
// segments). base is what precedes the Type segment, with its trailing
// slash ("https://ehr.example/fhir/"), or "" for a relative reference, so
// base+r.String() == s. Contained ("#x"), conditional ("Type?query"),
// urn:uuid and urn:oid references, and anything with white space, are
// errors: none of them names a resource a server can read.
func ParseAny(s string) (r Ref, base string, err error) {
	if strings.ContainsAny(s, "?# \t\r\n") {
		return Ref{}, "", fmt.Errorf("reference %q is not a literal reference to a resource", s)
	}
	rest, ok := strings.CutPrefix(s, "https://")
	if !ok {
		rest, ok = strings.CutPrefix(s, "http://")
	}
	if !ok {
		r, err = Parse(s)
		return r, "", err
	}
	host, path, ok := strings.Cut(rest, "/")
	if !ok || host == "" {
		return Ref{}, "", fmt.Errorf("reference %q has no host and path", s)
	}
	if u, perr := url.Parse(s); perr != nil || u.Hostname() == "" {
		return Ref{}, "", fmt.Errorf("reference %q is not a URL", s)
	}
	segs := strings.Split(path, "/")
	n := len(segs)
	var tail []string
	switch {
	case n >= 4 && segs[n-2] == "_history":
		tail = segs[n-4:]
	case n >= 2:
		tail = segs[n-2:]
	default:
		return Ref{}, "", fmt.Errorf("reference %q does not end in Type/id[/_history/version]", s)
	}
	t := strings.Join(tail, "/")
	if r, err = Parse(t); err != nil {
		return Ref{}, "", fmt.Errorf("reference %q does not end in Type/id[/_history/version]", s)
	}
	return r, s[:len(s)-len(t)], nil
}

// SameBase reports whether two FHIR server bases name the same server,
// compared after the normalisations of RFC 3986 §6.2.2 and §6.2.3: scheme
// and host without regard to case, the hex digits of a percent-encoding
// upper-cased, a percent-encoded unreserved character (ALPHA, DIGIT, "-",
// ".", "_", "~"; §2.3) decoded, a default port (80 for http, 443 for
// https) dropped, and a trailing slash ignored. An empty base names no
// server.
func SameBase(a, b string) bool {
	ca, oka := canonicalBase(a)
	cb, okb := canonicalBase(b)
	return oka && okb && ca == cb
}

func canonicalBase(s string) (string, bool) {
	u, err := url.Parse(strings.TrimSpace(s))
	if err != nil || u.Hostname() == "" || (u.Scheme != "http" && u.Scheme != "https") {
		return "", false
	}
	scheme := strings.ToLower(u.Scheme)
	host := strings.ToLower(u.Hostname())
	port := u.Port()
	if (scheme == "http" && port == "80") || (scheme == "https" && port == "443") {
		port = ""
	}
	if port != "" {
		host += ":" + port
	}
	return scheme + "://" + normalisePercent(host) + strings.TrimSuffix(normalisePercent(u.EscapedPath()), "/"), true
}

// normalisePercent decodes the percent-encodings of unreserved characters
// and upper-cases the hex digits of the others (RFC 3986 §6.2.2.1 and
// §6.2.2.2).
func normalisePercent(s string) string {
	if !strings.Contains(s, "%") {
		return s
	}
	var b strings.Builder
	b.Grow(len(s))
	for i := 0; i < len(s); i++ {
		if s[i] == '%' && i+2 < len(s) && isHex(s[i+1]) && isHex(s[i+2]) {
			c := unhex(s[i+1])<<4 | unhex(s[i+2])
			if isUnreserved(c) {
				b.WriteByte(c)
			} else {
				b.WriteByte('%')
				b.WriteString(strings.ToUpper(s[i+1 : i+3]))
			}
			i += 2
			continue
		}
		b.WriteByte(s[i])
	}
	return b.String()
}

func isHex(c byte) bool {
	return '0' <= c && c <= '9' || 'a' <= c && c <= 'f' || 'A' <= c && c <= 'F'
}

func unhex(c byte) byte {
	switch {
	case c <= '9':
		return c - '0'
	case c >= 'a':
		return c - 'a' + 10
	}
	return c - 'A' + 10
}

// isUnreserved: RFC 3986 §2.3, ALPHA / DIGIT / "-" / "." / "_" / "~".
func isUnreserved(c byte) bool {
	return 'a' <= c && c <= 'z' || 'A' <= c && c <= 'Z' || '0' <= c && c <= '9' || c == '-' || c == '.' || c == '_' || c == '~'
}

// Key reads a literal reference that may be absolute (see [ParseAny]) and
// returns it with the unversioned form this service keys the resource by:
// the relative "Type/id" when the reference is relative or its base is
// own, the FHIR server this service reads and writes ([SameBase]); else the
// absolute URL without its version, its base normalised as [SameBase]
// compares bases ("https://other.example/fhir/Type/id"),
// so that a resource of another server is never taken for the local one
// that happens to have the same id. own may be empty (no server known):
// then every absolute reference keeps its base.
func Key(s, own string) (r Ref, key string, err error) {
	r, base, err := ParseAny(s)
	if err != nil {
		return Ref{}, "", err
	}
	if base == "" || SameBase(base, own) {
		return r, r.Logical(), nil
	}
	// Another server's resource is keyed by its normalised base, so two
	// spellings of one server (host case, default port, percent-encoding)
	// give one key.
	if cb, ok := canonicalBase(base); ok {
		return r, cb + "/" + r.Logical(), nil
	}
	return r, base + r.Logical(), nil
}

// Split turns "Observation/x/_history/2" into ("Observation/x", "2") and
// leaves an unversioned reference whole. It does not validate: it is for
// references this service built itself.
func Split(s string) (logical, version string) {
	if i := strings.Index(s, "/_history/"); i >= 0 {
		return s[:i], s[i+len("/_history/"):]
	}
	return s, ""
}

// Versioned returns "Type/id/_history/version", or "Type/id" when version
// is empty.
func Versioned(logical, version string) string {
	if version == "" {
		return logical
	}
	return logical + "/_history/" + version
}

// String returns the reference as written.
func (r Ref) String() string { return Versioned(r.Logical(), r.Version) }

// Logical returns the unversioned reference.
func (r Ref) Logical() string { return r.Type + "/" + r.ID }

// IsID reports whether s is a FHIR id: [A-Za-z0-9\-\.]{1,64}.
func IsID(s string) bool {
	if len(s) == 0 || len(s) > 64 {
		return false
	}
	for i := range len(s) {
		c := s[i]
		if !(c >= 'A' && c <= 'Z' || c >= 'a' && c <= 'z' || c >= '0' && c <= '9' || c == '-' || c == '.') {
			return false
		}
	}
	return true
}

// IsType reports whether s has the form of a resource type name: an
// upper-case letter and 1 to 63 more letters.
func IsType(s string) bool {
	if len(s) < 2 || len(s) > 64 || s[0] < 'A' || s[0] > 'Z' {
		return false
	}
	for i := 1; i < len(s); i++ {
		c := s[i]
		if !(c >= 'A' && c <= 'Z' || c >= 'a' && c <= 'z') {
			return false
		}
	}
	return true
}

// Version is what orders two versions of one resource.
type Version struct {
	LastUpdated time.Time
	ID          string
	// Unusable and Content break a tie of LastUpdated and ID (two copies
	// without meta, say). Unusable says that no result can use the
	// version: a withdrawal, a refused status, specimen or code. Content
	// is what the version says in a canonical form that every caller
	// builds the same way for the same version (api/pipeline's
	// VersionContent for inputs, the stored facts for a Patient); it is
	// compared only at a tie, so a caller may leave it empty until
	// Compare without it answers 0.
	Unusable bool
	Content  string
}

// Compare orders versions of one resource: the later meta.lastUpdated is
// newer, to the nanosecond; at equal instants, version ids that are both
// decimal numbers compare as numbers of any length (servers that count
// versions write "9" before "10", and some ids exceed 64 bits), any others
// as strings. FHIR fixes no order for version ids, so the time decides
// first. Two versions with the same time and id are still told apart, so
// that the order does not depend on which arrived first: an unusable
// version is newer than a usable one (a tie never brings back what one
// copy withdraws), then the greater Content is newer. It returns +1 when a
// is newer than b, -1 when older, 0 when neither is.
func Compare(a, b Version) int {
	if c := a.LastUpdated.Compare(b.LastUpdated); c != 0 {
		return c
	}
	if c := compareIDs(a.ID, b.ID); c != 0 {
		return c
	}
	switch {
	case a.Unusable && !b.Unusable:
		return 1
	case b.Unusable && !a.Unusable:
		return -1
	}
	return strings.Compare(a.Content, b.Content)
}

func compareIDs(a, b string) int {
	if isDecimal(a) && isDecimal(b) {
		x, y := strings.TrimLeft(a, "0"), strings.TrimLeft(b, "0")
		if c := cmp.Compare(len(x), len(y)); c != 0 {
			return c
		}
		return strings.Compare(x, y)
	}
	return strings.Compare(a, b)
}

func isDecimal(s string) bool {
	if s == "" {
		return false
	}
	for i := range len(s) {
		if s[i] < '0' || s[i] > '9' {
			return false
		}
	}
	return true
}

// DeleteTarget names the resource a Bundle entry whose request is a DELETE
// deletes (FHIR R4 http.html#delete, in a transaction or batch, a history
// Bundle, or a Bulk Data export's deleted file): the resource its
// request.url names, relative or absolute, or failing that its fullUrl (a
// conditional delete's url names none). The version, if any, is dropped.
func DeleteTarget(requestURL, fullURL string) (Ref, bool) {
	for _, s := range []string{requestURL, fullURL} {
		if r, _, err := ParseAny(s); err == nil {
			return Ref{Type: r.Type, ID: r.ID}, true
		}
	}
	return Ref{}, false
}
