package engine

import (
	"context"
	"errors"
	"fmt"
	"sync"
	"time"

	"github.com/deadspace-fhir/deadspace/fhir/client"
)

// The reads of an id-only notification are made while its sender waits
// for the webhook's answer, with a timeout of its own (commonly 10 to
// 30 s), and while the request holds one of the webhook's concurrent
// slots. So they have a budget of their own (Config.FetchBudget), retries
// and waits included: the client does not start a wait (backoff, or the
// server's Retry-After) that would outlast what is left of it, and an
// attempt that is still unanswered when it ends is abandoned. A read that
// fails so is deferred, not lost: Fetch returns a [*ReadDeferred] (the
// webhook answers 503 with its RetryAfter, so the sender delivers the
// notification again), and a catch-up search runs after that wait, in
// case the sender never does. Polling and catch-up have nobody waiting
// and keep honouring a long Retry-After.

// DefaultFetchBudget is Config.FetchBudget when unset: a few seconds, well
// within a sender's patience and the HTTP server's 60 s write timeout.
const DefaultFetchBudget = 5 * time.Second

// MaxFetchBudget is the longest fetch budget accepted: half the HTTP
// server's write timeout, and about the longest a sender waits.
const MaxFetchBudget = 30 * time.Second

// DeferredRetryAfter is the wait a deferred read asks of the sender when
// the FHIR server asked for none (it did not answer within the budget, or
// failed every retry without a Retry-After).
const DeferredRetryAfter = 30 * time.Second

// ReadDeferred is Fetch's error when a resource a notification named could
// not be read within the fetch budget: the FHIR server asked for a wait
// longer than what was left of it (429 or 503 with Retry-After), did not
// answer in time, or kept failing transiently. Nothing was stored; a
// catch-up search is scheduled after RetryAfter.
type ReadDeferred struct {
	// RetryAfter is when to deliver the notification again: the server's
	// Retry-After (at most 15 minutes), or DeferredRetryAfter when it gave
	// none.
	RetryAfter time.Duration
	// Err is the read's failure.
	Err error
}

func (e *ReadDeferred) Error() string {
	return fmt.Sprintf("engine: a read could not be made within the fetch budget; deliver again in %v: %v", e.RetryAfter, e.Err)
}

func (e *ReadDeferred) Unwrap() error { return e.Err }

// readFailed turns a failed read of Fetch into its error: a
// [*ReadDeferred] when the failure is transient or the budget (readCtx)
// ran out while the caller (ctx) still waits, with a catch-up search
// scheduled; the failure as it is otherwise.
func (e *Engine) readFailed(ctx, readCtx context.Context, err error) error {
	err = fmt.Errorf("engine: fetch focus: %w", err)
	if ctx.Err() != nil {
		// The sender went away: nobody to answer.
		return err
	}
	if readCtx.Err() == nil && !client.IsRetryable(err) {
		return err
	}
	wait := DeferredRetryAfter
	var fe *client.Error
	if errors.As(err, &fe) && fe.RetryAfter > 0 {
		wait = min(fe.RetryAfter, maxRetryAfter)
	}
	e.readsDeferred.catchUpAfter(e.now(), wait)
	e.log.WarnContext(ctx, "a resource a notification named could not be read within the fetch budget; the sender is asked to deliver it again, and a catch-up search looks for it then",
		"budget", e.cfg.FetchBudget, "retry_after", wait)
	return &ReadDeferred{RetryAfter: wait, Err: err}
}

// deferredCatchUp is the catch-up search owed to reads given up within the
// fetch budget: at most one is pending, at the earliest time asked for
// (one search finds every resource updated before it).
type deferredCatchUp struct {
	mu      sync.Mutex
	pending bool
	at      inMemoryWait
}

// catchUpAfter asks for a catch-up search wait from now, unless one is
// pending that comes sooner.
func (d *deferredCatchUp) catchUpAfter(now time.Time, wait time.Duration) {
	d.mu.Lock()
	defer d.mu.Unlock()
	if d.pending && d.at.left(now) <= wait {
		return
	}
	d.pending, d.at = true, waitFrom(now, wait)
}

// due reports, once, that the pending catch-up's time has come.
func (d *deferredCatchUp) due(now time.Time) bool {
	d.mu.Lock()
	defer d.mu.Unlock()
	if !d.pending || !d.at.over(now) {
		return false
	}
	d.pending = false
	return true
}
