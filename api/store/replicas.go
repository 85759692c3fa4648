package store

import (
	"context"
	"errors"
	"time"
)

// ErrLeaseHeld is returned, wrapped, when another replica holds a lease
// that has not expired, or when a write made under a lease is refused
// because the lease has since changed hands.
var ErrLeaseHeld = errors.New("store: lease held by another replica")

// Lease is a named right to run a job that only one replica may run at a
// time (polling and catch-up, subscription registration).
type Lease struct {
	Name   string
	Holder string
	// Expires is when the lease lapses unless renewed, on the store's
	// clock.
	Expires time.Time
	// Epoch rises every time the lease changes hands. A job carries it as
	// a fencing token: work stamped with an older epoch was done by a
	// holder that has since lost the lease.
	Epoch int64
}

// Replicated is what a store shared by several replicas offers besides
// [Store], so that the jobs only one replica may run, and the evaluation
// of each patient, run on one replica at a time. The engine uses it when
// its store offers it; a store without it (the embedded one) serves a
// single replica, which runs everything itself.
type Replicated interface {
	// AcquireLease takes the named lease for ttl, or renews it when this
	// replica holds it already; a lease another replica holds is taken
	// over only once expired, and until then the answer wraps
	// ErrLeaseHeld.
	AcquireLease(ctx context.Context, name string, ttl time.Duration) (Lease, error)
	// ReleaseLease gives the lease up at once if this replica holds it.
	ReleaseLease(ctx context.Context, name string) error
	// SetCursorUnderLease sets a cursor only if this replica still holds
	// the lease, in the epoch given, unexpired; otherwise nothing changes
	// and the answer wraps ErrLeaseHeld.
	SetCursorUnderLease(ctx context.Context, l Lease, name, value string) error
	// ClaimPatient claims a dirty patient for this replica for ttl, unless
	// another replica holds an unexpired claim on it. ok is false when
	// another replica holds it, or when the patient is no longer dirty
	// (its evaluation was committed meanwhile); otherwise d is the
	// patient's mark as it stands now, with [Dirty.Cleared] set.
	// [Store.Commit] ends the claim.
	ClaimPatient(ctx context.Context, subject string, ttl time.Duration) (d Dirty, ok bool, err error)
	// RenewClaim extends this replica's claim on a dirty patient by ttl,
	// from now. ok is false when the claim is no longer this replica's:
	// it lapsed and another replica took the patient, or the patient's
	// evaluation was committed or its claim given up meanwhile. A
	// replica renews its claim while an evaluation runs, so that a slow
	// one (a slow read of the patient's facts) keeps the patient, and
	// abandons an evaluation whose claim it finds lost.
	RenewClaim(ctx context.Context, subject string, ttl time.Duration) (ok bool, err error)
	// ReleaseClaim ends this replica's claim on a patient that stays
	// dirty (an evaluation that failed or was abandoned), so that any
	// replica may take it at once.
	ReleaseClaim(ctx context.Context, subject string) error
	// RenewWriteClaim extends this replica's claim on an outbox write (see
	// DueWrites) by the write lease, from now. ok is false when the claim
	// is no longer this replica's: it lapsed and another replica took the
	// write (or the write left the outbox). A replica renews a claim
	// before it sends the write and while the send runs, so only a replica
	// that stalls for a whole lease can lose a write it is sending, and
	// one that finds its claim lost does not send the write a second time.
	RenewWriteClaim(ctx context.Context, writeID uint64) (ok bool, err error)
	// RescheduleIn is Store.Reschedule with the next attempt due wait
	// from now by the store's clock (Write.Wait), so that a replica whose
	// clock disagrees with this one's still waits as long; notBefore is
	// recorded as Write.NotBefore. The same claim rule holds:
	// ErrClaimedElsewhere while another replica holds the write.
	RescheduleIn(ctx context.Context, writeID uint64, wait time.Duration, notBefore time.Time, lastErr string) error
	// WriteLease is how long a claim on an outbox write lasts.
	WriteLease() time.Duration
	// KeepAlive says this replica is running, for ttl from now: while it
	// is, the other replicas leave the patients it evaluated last to it
	// ([Dirty.EvaluatedElsewhere]). A replica renews it well within ttl
	// and calls Depart when it stops.
	KeepAlive(ctx context.Context, ttl time.Duration) error
	// Depart says at once that this replica stopped, so that the others
	// take its patients without waiting.
	Depart(ctx context.Context) error
}
