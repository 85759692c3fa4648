package webhook

import (
	"context"
	"encoding/json"
	"errors"
	"time"

	"github.com/deadspace-fhir/deadspace/fhir/notify"
)

// Sink receives what the webhook accepted. Every method returns only after
// what it was given is durably stored, so a 2xx answer means nothing is lost.
//
// Senders retry whatever was not acknowledged, and a request may fail after
// some of its calls succeeded, so every method must accept the same content
// again without harm.
//
// The raw resources a method is given (and the Resource of a
// notification's events and entries) are slices of the request body, which
// the webhook reuses for another request once the method has returned: a
// Sink that keeps them past the call must copy them. Strings are the
// Sink's to keep.
type Sink interface {
	// Resources takes FHIR resources (raw JSON, each an object with a
	// resourceType) delivered in full.
	Resources(ctx context.Context, src Source, resources []json.RawMessage) (Receipt, error)
	// Fetch records references to resources that must be read from the
	// FHIR server (id-only content). References are as the sender wrote
	// them, possibly absolute or versioned; see [notify.RelativeRef].
	Fetch(ctx context.Context, src Source, refs []string) error
	// Status records a notification's status part (counters, type) for gap
	// detection.
	Status(ctx context.Context, src Source, n notify.Notification) error
	// Notification takes a notification whose events carry their resources
	// in full: Resources and then Status in one step, so that the answer
	// waits for one durable commit instead of two. As with the two calls,
	// the status is never recorded without the resources.
	Notification(ctx context.Context, src Source, resources []json.RawMessage, n notify.Notification) (Receipt, error)
	// Changed records that something changed without saying what (classic
	// empty rest-hook POST).
	Changed(ctx context.Context, src Source) error
	// Deleted records resources the server deleted (the DELETE entries of
	// a Bundle it forwarded).
	Deleted(ctx context.Context, src Source, deleted []Deletion) error
}

// Deletion is a resource the server deleted.
type Deletion struct {
	// Ref is "Type/id".
	Ref string
	// At is when it was deleted, when the Bundle said so
	// (entry.response.lastModified); zero otherwise.
	At time.Time
}

// Source says how a request arrived.
type Source struct {
	// Mode is ModeNotification, ModeRestHook or ModeRestHookPut.
	Mode string
	// RequestID is the request's id, echoed in X-Request-Id.
	RequestID string
}

// Delivery modes.
const (
	// ModeNotification: a topic-based notification Bundle (R4 backport,
	// R4B, R5).
	ModeNotification = "notification"
	// ModeRestHook: a classic R4 rest-hook POST to the endpoint itself:
	// empty, a single resource, or a non-notification Bundle.
	ModeRestHook = "rest-hook"
	// ModeRestHookPut: a classic R4 rest-hook with payload, addressed to
	// [endpoint]/[type]/[id].
	ModeRestHookPut = "rest-hook-put"
)

// Receipt is what [Sink.Resources] did with the resources it was given.
type Receipt struct {
	Accepted int
	Rejected []Rejection
}

// Rejection is a resource the sink will not use. Rejections are permanent:
// the webhook still answers 200, because sending the same resource again
// would not change the answer.
type Rejection struct {
	// Index is the resource's position in the slice given to Resources.
	Index int
	// Reason is a short code from the engine's vocabulary.
	Reason string
	// Detail is a human explanation. It is sent back to the FHIR server
	// but never logged.
	Detail string
}

// ErrInvalid is wrapped by a Sink error that blames the request: the
// webhook answers 400 with the error's text, and the sender should not
// retry. Any other Sink error is taken as transient and answered 503.
var ErrInvalid = errors.New("invalid content")

// RetryLater is a Sink error that says when the content can be taken: a
// resource the notification names could not be read from the FHIR server
// in time (it throttled, or did not answer). The webhook answers 503 with
// Retry-After: After, in whole seconds rounded up (at least 1), so the
// sender delivers the notification again then.
type RetryLater struct {
	After time.Duration
	Err   error
}

func (e *RetryLater) Error() string { return e.Err.Error() }

func (e *RetryLater) Unwrap() error { return e.Err }
