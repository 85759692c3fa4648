package engine

import (
	"errors"
	"fmt"

	"github.com/deadspace-fhir/deadspace/fhir/client"
)

// errFailedEntries means a transaction was answered 200 while some of its
// entries carry an error status (entry.response.status 4xx or 5xx). R4
// makes a transaction all or nothing (http.html#transaction), so a server
// that answers this way kept part of it: the write is not acknowledged.
// What landed is found again by the resend, whose every request is
// conditional.
var errFailedEntries = errors.New("the server answered the transaction 200 but some of its entries failed")

// entryResends is how many attempts a write gets, counting the failed
// ones before, while a transaction of it comes back with a failed entry
// whose status would otherwise be a refusal for good (400, 422, ...):
// part of the transaction landed, and only a resend of the rest shows
// whether the server refuses it on its own. After that the write goes to
// the dead letters as any refused write does. Transient entry statuses
// (429, 503, other 5xx) are retried as a transient failure always is.
const entryResends = 2

// failedEntries returns [errFailedEntries] with each failed entry's error
// (a [*client.Error] per entry, so the writer's rules for statuses and
// Retry-After apply), or nil when every entry succeeded.
func failedEntries(resp client.TransactionResponse) error {
	if err := resp.Err(); err != nil {
		return fmt.Errorf("engine: %w: %w", errFailedEntries, err)
	}
	return nil
}

// resendFailedEntries reports whether a write refused for good only
// through failed entries of a transaction answered 200 is sent again
// rather than buried: while it has had fewer than [entryResends] attempts.
func resendFailedEntries(err error, attempts int) bool {
	return errors.Is(err, errFailedEntries) && attempts < entryResends
}
