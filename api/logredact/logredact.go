// Package logredact keeps patient and resource identifiers out of the logs
// in one place. [NewHandler] wraps any slog.Handler; main installs it for
// every command, so whatever text reaches a log line (a message, an
// attribute, an error wrapped five times over) is rewritten before it is
// written:
//
//   - FHIR references lose their id and version, whatever the id's length
//     or characters: "Patient/[redacted]", also inside URLs
//     ("…/Observation/[redacted]"), with the type in any case, glued to
//     what precedes it, or after an encoded slash ("Patient%2F[redacted]").
//     Only FHIR resource type names count ("/deadspace.v1.DeadSpace/Submit"
//     stays);
//   - urn:uuid values, UUIDs anywhere, and contained references ("#p1");
//   - search parameters that carry identifiers (identifier=, subject=,
//     patient=, _id=, …, with modifiers and chains, also percent-encoded)
//     lose their whole value, OR-lists included, and so does every
//     parameter of a query string but a few that never identify anyone
//     (_count=, code=, date=, …);
//   - what follows a word naming an id when it is quoted, in brackets, after
//     "=" or ":", or looks like an id: `invalid id "[redacted]"`,
//     "ID[redacted]";
//   - JSON members and attributes with a key that holds an identifier
//     ("id", "reference", "family", "birthDate", …) lose their value, in
//     JSON quoted to any depth; objects and arrays that hold one (a name, a
//     subject with its display, an identifier) lose every value in them;
//   - a server's answer quoted in an error (the text after "HTTP 422
//     Unprocessable Entity: ", "HTTP 400 invalid_client: " or "response
//     body: ") is withheld whole, since servers write identifiers in free
//     text ("resource 123 not found").
//
// [Text] applies the same rules except the last, with one more for free
// text: any word with a digit in it, however short ("48213", "ab12c"),
// except error codes ("HAPI-0989") and numbers that count (after "HTTP",
// "page", "line", …). The dead-letter view uses it to show an operator the
// server's answer without the identifiers in it.
//
// Attributes that name the call rather than a patient, a gRPC method and a
// request id, are left as they are.
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

// identifierKeys are attribute keys whose value is an identifier whole.
var identifierKeys = map[string]bool{
	"id": true, "patient": true, "subject": true, "encounter": true, "reference": true, "ref": true,
	"focus": true, "identifier": true, "resource_id": true, "observation": true, "full_url": true,
	"birth_date": true, "version_id": true, "patient_id": true, "subject_id": true, "mrn": true,
}

// String removes identifiers from s with the rules of a log line.
func String(s string) string {
	if s == "" {
		return s
	}
	var r ranges
	markWithheld(&r, s)
	mark(&r, s)
	return r.apply(s)
}

// Text removes identifiers from a server's answer or other free text while
// keeping its wording, for showing to an operator.
func Text(s string) string {
	var r ranges
	mark(&r, s)
	s = r.apply(s)
	r = r[:0]
	markWords(&r, s)
	return r.apply(s)
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

// grpcMethod is a gRPC method's full name, its service named with its
// package ("/deadspace.v1.DeadSpace/Submit"), which a FHIR path is not.
var grpcMethod = regexp.MustCompile(`^/[A-Za-z_]\w*(?:\.\w+)+/[A-Za-z_]\w*$`)

// requestID is a request id as the webhook and the gRPC server accept one.
var requestID = regexp.MustCompile(`^[\w.:\-]{1,128}$`)

// kept tells whether an attribute names the call rather than a patient: a
// gRPC method, or a request id (often a UUID, which is needed whole to find
// the call's other lines).
func kept(key string, v slog.Value) bool {
	if v.Kind() != slog.KindString {
		return false
	}
	switch key {
	case "method":
		return grpcMethod.MatchString(v.String())
	case "request_id":
		return requestID.MatchString(v.String())
	}
	return false
}

// Attr redacts one attribute, groups included.
func Attr(a slog.Attr) slog.Attr {
	v := a.Value.Resolve()
	if kept(a.Key, v) {
		return slog.Attr{Key: a.Key, Value: v}
	}
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
