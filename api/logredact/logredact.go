// Package logredact keeps patient and resource identifiers out of the logs
// in one place. [NewHandler] wraps any slog.Handler; main installs it for
// every command, so whatever text reaches a log line (a message, an
// attribute, an error wrapped five times over) is rewritten before it is
// written:
//
//   - FHIR references lose their id and version: "Patient/[redacted]",
//     also inside URLs ("…/Observation/[redacted]");
//   - urn:uuid values: "urn:uuid:[redacted]";
//   - search parameters that carry identifiers (identifier=, subject=,
//     patient=, _id=, _tag=, encounter=) lose their value;
//   - JSON members and attributes with a key that holds an identifier
//     ("id", "reference", "patient", "subject", …) lose their value;
//   - a FHIR server's answer quoted in an error (the OperationOutcome text
//     after "HTTP 422 Unprocessable Entity: ") is withheld whole, since
//     servers write identifiers in free text ("resource 123 not found").
//
// [Text] applies the same rules except the last, with one more for free
// text: any token that looks like an id (six or more letters, digits, dots
// and dashes with a digit among them). The dead-letter view uses it to
// show an operator the server's answer without the identifiers in it.
package logredact

import (
	"context"
	"io"
	"log/slog"
	"regexp"
	"strings"
)

// Redacted replaces what was removed.
const Redacted = "[redacted]"

// withheld replaces a server's answer in a log line.
const withheld = "[server text withheld]"

var (
	// references: a capitalised resource type, a slash and an R4 id
	// (https://hl7.org/fhir/R4/datatypes.html#id), optionally a version.
	references = regexp.MustCompile(`\b([A-Z][A-Za-z]{1,63})/[A-Za-z0-9\-.]{1,64}(?:/_history/[A-Za-z0-9\-.]{1,64})?`)
	uuids      = regexp.MustCompile(`(?i)\burn:uuid:[0-9a-f\-]{1,64}`)
	params     = regexp.MustCompile(`\b(identifier|subject|patient|_id|_tag|encounter|focus)(=|%3D)[^&\s"',;)]+`)
	// jsonMembers: "key":"value" inside quoted JSON, also when escaped.
	jsonMembers = regexp.MustCompile(`(\\?"(?:id|reference|patient|subject|encounter|focus|fullUrl|value|birthDate|versionId)\\?"\s*:\s*\\?")[^"\\]*(\\?")`)
	// serverText: the tail of a fhir/client error after the status.
	serverText = regexp.MustCompile(`(?m)(HTTP \d{3}(?: [A-Za-z][A-Za-z' -]*)?): [^\n]*?( \(after \d+ attempts\))?$`)
	// idTokens: free-text words that look like identifiers.
	idTokens = regexp.MustCompile(`\b[A-Za-z0-9][A-Za-z0-9\-.]{5,63}\b`)
)

// identifierKeys are attribute keys whose value is an identifier whole.
var identifierKeys = map[string]bool{
	"id": true, "patient": true, "subject": true, "encounter": true, "reference": true, "ref": true,
	"focus": true, "identifier": true, "resource_id": true, "observation": true, "full_url": true,
	"birth_date": true, "version_id": true,
}

// String removes identifiers from s with the rules of a log line.
func String(s string) string {
	if s == "" {
		return s
	}
	s = serverText.ReplaceAllString(s, "$1: "+withheld+"$2")
	return common(s)
}

func common(s string) string {
	s = uuids.ReplaceAllString(s, "urn:uuid:"+Redacted)
	s = references.ReplaceAllString(s, "$1/"+Redacted)
	s = params.ReplaceAllString(s, "$1$2"+Redacted)
	s = jsonMembers.ReplaceAllString(s, "${1}"+Redacted+"${2}")
	return s
}

// Text removes identifiers from a server's answer or other free text while
// keeping its wording, for showing to an operator.
func Text(s string) string {
	s = common(s)
	return idTokens.ReplaceAllStringFunc(s, func(tok string) string {
		if tok == Redacted || !strings.ContainsAny(tok, "0123456789") {
			return tok
		}
		return Redacted
	})
}

// Handler rewrites every record's message and attributes, then passes it on.
type Handler struct{ inner slog.Handler }

// NewHandler wraps inner.
func NewHandler(inner slog.Handler) *Handler { return &Handler{inner: inner} }

// NewLogger writes JSON lines at level to w, redacted: the logger of every
// command.
func NewLogger(w io.Writer, level slog.Level) *slog.Logger {
	return slog.New(NewHandler(slog.NewJSONHandler(w, &slog.HandlerOptions{Level: level})))
}

// Enabled reports whether inner takes records at level.
func (h *Handler) Enabled(ctx context.Context, level slog.Level) bool {
	return h.inner.Enabled(ctx, level)
}

// Handle redacts r and passes it on.
func (h *Handler) Handle(ctx context.Context, r slog.Record) error {
	out := slog.NewRecord(r.Time, r.Level, String(r.Message), r.PC)
	r.Attrs(func(a slog.Attr) bool {
		out.AddAttrs(Attr(a))
		return true
	})
	return h.inner.Handle(ctx, out)
}

// WithAttrs redacts attrs before the inner handler keeps them.
func (h *Handler) WithAttrs(attrs []slog.Attr) slog.Handler {
	red := make([]slog.Attr, len(attrs))
	for i, a := range attrs {
		red[i] = Attr(a)
	}
	return &Handler{inner: h.inner.WithAttrs(red)}
}

// WithGroup passes the group on.
func (h *Handler) WithGroup(name string) slog.Handler {
	return &Handler{inner: h.inner.WithGroup(name)}
}

// Attr redacts one attribute, groups included.
func Attr(a slog.Attr) slog.Attr {
	v := a.Value.Resolve()
	if identifierKeys[strings.ToLower(a.Key)] && v.Kind() != slog.KindGroup {
		if v.Kind() == slog.KindString && v.String() == "" {
			return slog.Attr{Key: a.Key, Value: v}
		}
		return slog.String(a.Key, Redacted)
	}
	switch v.Kind() {
	case slog.KindString:
		return slog.String(a.Key, String(v.String()))
	case slog.KindGroup:
		group := v.Group()
		red := make([]slog.Attr, len(group))
		for i, g := range group {
			red[i] = Attr(g)
		}
		return slog.Attr{Key: a.Key, Value: slog.GroupValue(red...)}
	case slog.KindAny:
		switch x := v.Any().(type) {
		case error:
			return slog.String(a.Key, String(x.Error()))
		case interface{ String() string }:
			return slog.String(a.Key, String(x.String()))
		case []byte:
			return slog.String(a.Key, String(string(x)))
		case []string:
			red := make([]string, len(x))
			for i, s := range x {
				red[i] = String(s)
			}
			return slog.Any(a.Key, red)
		default:
			// Structured values are rendered by the inner handler in ways this
			// cannot see into; render them here as text and redact that.
			return slog.String(a.Key, String(v.String()))
		}
	}
	return slog.Attr{Key: a.Key, Value: v}
}
