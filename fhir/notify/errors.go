package notify

import (
	"errors"
	"strings"
)

// Sentinels for errors.Is. Every error from [Parse] wraps exactly one.
var (
	// ErrNotJSON: the body is not a JSON object.
	ErrNotJSON = errors.New("notify: not a JSON object")
	// ErrNotBundle: the body is JSON but not a Bundle, e.g. a single
	// resource delivered by a classic rest-hook.
	ErrNotBundle = errors.New("notify: not a Bundle")
	// ErrNotNotification: a Bundle, but not a subscription notification
	// (a transaction, batch, searchset, collection, or a history Bundle
	// whose first entry is no subscription status).
	ErrNotNotification = errors.New("notify: not a subscription notification")
	// ErrMalformed: a notification whose status part is broken: a missing
	// required element, a value of the wrong type, a counter that is not a
	// non-negative integer.
	ErrMalformed = errors.New("notify: malformed notification")
)

// Error says why and where a body was not accepted as a notification.
// Detail never quotes values from the body, so it is safe to log and to
// send back to the sender.
type Error struct {
	// Kind is one of the package sentinels.
	Kind error
	// Path is a FHIRPath-like location, e.g. "Bundle.entry[0].resource.parameter[3]".
	Path string
	// Detail is a short explanation.
	Detail string
	// ResourceType is the body's resourceType when Kind is ErrNotBundle,
	// so the caller can route a single resource without parsing it again.
	ResourceType string
}

func (e *Error) Error() string {
	var b strings.Builder
	b.WriteString(e.Kind.Error())
	if e.Path != "" {
		b.WriteString(": ")
		b.WriteString(e.Path)
	}
	if e.Detail != "" {
		b.WriteString(": ")
		b.WriteString(e.Detail)
	}
	return b.String()
}

func (e *Error) Unwrap() error { return e.Kind }

func malformed(path, detail string) error {
	return &Error{Kind: ErrMalformed, Path: path, Detail: detail}
}
