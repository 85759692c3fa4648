package client

import (
	"errors"
	"fmt"
	"net/http"
	"strings"
	"time"
)

// Sentinels for errors.Is. An [*Error] matches the sentinel of its HTTP status.
var (
	ErrBadRequest         = errors.New("fhir: bad request")                 // 400
	ErrUnauthorized       = errors.New("fhir: unauthorized")                // 401
	ErrForbidden          = errors.New("fhir: forbidden")                   // 403
	ErrNotFound           = errors.New("fhir: not found")                   // 404
	ErrMethodNotAllowed   = errors.New("fhir: method not allowed")          // 405
	ErrConflict           = errors.New("fhir: conflict")                    // 409
	ErrGone               = errors.New("fhir: gone")                        // 410
	ErrPreconditionFailed = errors.New("fhir: precondition failed")         // 412
	ErrUnprocessable      = errors.New("fhir: unprocessable entity")        // 422
	ErrThrottled          = errors.New("fhir: too many requests")           // 429
	ErrUnavailable        = errors.New("fhir: service unavailable")         // 503
	ErrNetwork            = errors.New("fhir: no response from the server") // transport failure
)

// sentinelStatus is a list, not a map: a map lookup would panic on a target whose dynamic type
// is not comparable, and errors.Is passes any target through.
var sentinelStatus = []struct {
	err    error
	status int
}{
	{ErrBadRequest, http.StatusBadRequest},
	{ErrUnauthorized, http.StatusUnauthorized},
	{ErrForbidden, http.StatusForbidden},
	{ErrNotFound, http.StatusNotFound},
	{ErrMethodNotAllowed, http.StatusMethodNotAllowed},
	{ErrConflict, http.StatusConflict},
	{ErrGone, http.StatusGone},
	{ErrPreconditionFailed, http.StatusPreconditionFailed},
	{ErrUnprocessable, http.StatusUnprocessableEntity},
	{ErrThrottled, http.StatusTooManyRequests},
	{ErrUnavailable, http.StatusServiceUnavailable},
}

// Error is a failed FHIR interaction: an HTTP error status, an error status inside a batch or
// transaction response entry, or a transport failure (Status 0, Err set).
type Error struct {
	// Op is the operation ("read", "search", "transaction", ...), with the entry index for an
	// entry of a batch response ("batch entry 2").
	Op string
	// ResourceType is the type the operation addressed, empty for whole-system operations.
	ResourceType string
	// Status is the HTTP status, 0 when no response arrived.
	Status int
	// Code is the first OperationOutcome issue.code (not-found, throttled, ...), if any.
	Code string
	// Outcome is the OperationOutcome text when the body was FHIR JSON, otherwise a short
	// cleaned prefix of the body. It is the server's wording and may be empty.
	Outcome string
	// Retryable reports that the failure is transient (429, 503, transport errors, and 5xx on
	// operations that are safe to repeat). It stays true after retries ran out: the caller may
	// try again later.
	Retryable bool
	// RetryAfter is the wait the server asked for, 0 if it did not ask.
	RetryAfter time.Duration
	// Date is the server's clock when it answered (its Date header, RFC
	// 9110), zero when it sent none or an unreadable one: what a caller
	// dates by the server's clock (a deletion learned from a 404 or 410)
	// must not use its own, which may be ahead.
	Date time.Time
	// Attempts is how many requests were made.
	Attempts int
	// Err is the transport error when Status is 0. It never contains the request URL.
	Err error

	hasRetryAfter bool
}

func (e *Error) Error() string {
	var b strings.Builder
	b.WriteString("fhir ")
	b.WriteString(e.Op)
	if e.ResourceType != "" {
		b.WriteString(" ")
		b.WriteString(e.ResourceType)
	}
	b.WriteString(": ")
	if e.Status == 0 {
		b.WriteString("no response")
		if e.Err != nil {
			b.WriteString(": ")
			b.WriteString(e.Err.Error())
		}
	} else {
		fmt.Fprintf(&b, "HTTP %d", e.Status)
		if t := http.StatusText(e.Status); t != "" {
			b.WriteString(" ")
			b.WriteString(t)
		}
		if e.Outcome != "" {
			b.WriteString(": ")
			b.WriteString(e.Outcome)
		}
	}
	if e.Attempts > 1 {
		fmt.Fprintf(&b, " (after %d attempts)", e.Attempts)
	}
	return b.String()
}

// Unwrap exposes the transport error, so errors.Is(err, context.DeadlineExceeded) and net error
// checks work.
func (e *Error) Unwrap() error { return e.Err }

// Is matches the status sentinels and [ErrNetwork].
func (e *Error) Is(target error) bool {
	if target == ErrNetwork {
		return e.Status == 0
	}
	for _, s := range sentinelStatus {
		if target == s.err {
			return s.status == e.Status
		}
	}
	return false
}

// IsRetryable reports whether err is, or wraps, an [*Error] marked transient.
func IsRetryable(err error) bool {
	var fe *Error
	return errors.As(err, &fe) && fe.Retryable
}
