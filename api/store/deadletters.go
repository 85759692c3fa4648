package store

import (
	"context"
	"time"
)

// DeadLetterStore is what an operator needs of the dead letters: list
// them, read one, and send one again. A dead letter is named by the id the
// write had in the outbox, the id the engine's log line names when it
// buries a write.
type DeadLetterStore interface {
	// DeadLetters lists dead letters, oldest first, at most limit.
	DeadLetters(ctx context.Context, limit int) ([]DeadLetter, error)
	// DeadLetter returns the dead letter of write writeID, or ErrNotFound.
	DeadLetter(ctx context.Context, writeID uint64) (DeadLetter, error)
	// RetryDeadLetter moves the dead letter of write writeID back to the
	// outbox, in one transaction, as a new write (a new id, due at now, no
	// attempts, created at now: it is the newest write, so the writer's
	// per-series order sends it after anything queued before it) and
	// returns it. ErrNotFound when there is no such dead letter.
	RetryDeadLetter(ctx context.Context, writeID uint64, now time.Time) (Write, error)
}
