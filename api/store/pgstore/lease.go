package pgstore

import (
	"context"
	"errors"
	"fmt"
	"time"

	"github.com/jackc/pgx/v5"

	"github.com/deadspace-fhir/deadspace/api/store"
)

// ErrLeaseHeld means another replica holds the lease and it has not
// expired (store.ErrLeaseHeld).
var ErrLeaseHeld = store.ErrLeaseHeld

// Lease is a named right to run a job that only one replica may run at a
// time (polling, catch-up, subscription registration); see store.Lease.
type Lease = store.Lease

// The store offers what replicas need to share work.
var _ store.Replicated = (*Store)(nil)

// AcquireLease takes the named lease for this replica for ttl, or renews it
// when this replica already holds it. A lease another replica holds is
// taken over only once it has expired; until then the answer wraps
// ErrLeaseHeld and names the holder and expiry. A holder whose lease was
// taken over gets ErrLeaseHeld on its next renewal, and must stop the job.
func (s *Store) AcquireLease(ctx context.Context, name string, ttl time.Duration) (Lease, error) {
	if ttl <= 0 {
		return Lease{}, fmt.Errorf("pgstore: lease %q: ttl must be positive, got %v", name, ttl)
	}
	l := Lease{Name: name, Holder: s.holder}
	// One statement: the row lock taken by ON CONFLICT makes two replicas
	// racing for an expired lease see each other, and only one wins.
	err := s.pool.QueryRow(ctx, `
		INSERT INTO leases AS l (name, holder, expires_at, epoch)
		VALUES ($1, $2, clock_timestamp() + $3 * interval '1 microsecond', 1)
		ON CONFLICT (name) DO UPDATE
		   SET holder = EXCLUDED.holder,
		       expires_at = EXCLUDED.expires_at,
		       epoch = CASE WHEN l.holder = EXCLUDED.holder THEN l.epoch ELSE l.epoch + 1 END
		 WHERE l.holder = EXCLUDED.holder OR l.expires_at <= clock_timestamp()
		RETURNING expires_at, epoch`,
		name, s.holder, ttl.Microseconds()).Scan(&l.Expires, &l.Epoch)
	if errors.Is(err, pgx.ErrNoRows) {
		held, err := s.Lease(ctx, name)
		if err != nil {
			return Lease{}, err
		}
		return held, fmt.Errorf("%w: %q is held by %s until %s", ErrLeaseHeld, name, held.Holder, held.Expires.Format(time.RFC3339Nano))
	}
	if err != nil {
		return Lease{}, wrap(fmt.Sprintf("acquire lease %q", name), err)
	}
	return l, nil
}

// Lease returns the named lease as it stands, whoever holds it (the zero
// Lease with the name when none was ever taken).
func (s *Store) Lease(ctx context.Context, name string) (Lease, error) {
	l := Lease{Name: name}
	err := s.pool.QueryRow(ctx, `SELECT holder, expires_at, epoch FROM leases WHERE name = $1`, name).
		Scan(&l.Holder, &l.Expires, &l.Epoch)
	if err != nil && !errors.Is(err, pgx.ErrNoRows) {
		return Lease{}, wrap(fmt.Sprintf("read lease %q", name), err)
	}
	return l, nil
}

// ReleaseLease gives the lease up at once if this replica holds it, so
// another replica need not wait for it to expire (on shutdown). Releasing a
// lease held by another replica does nothing.
func (s *Store) ReleaseLease(ctx context.Context, name string) error {
	// Expire rather than delete, so the epoch keeps rising across holders.
	_, err := s.pool.Exec(ctx, `UPDATE leases SET expires_at = clock_timestamp() WHERE name = $1 AND holder = $2`, name, s.holder)
	if err != nil {
		return wrap(fmt.Sprintf("release lease %q", name), err)
	}
	return nil
}

// SetCursorUnderLease sets a cursor only while this replica holds the
// lease in the epoch l names and it has not expired, in one statement, so
// a holder that lost the lease (a stalled replica whose lease was taken
// over) cannot move a cursor its successor now owns.
func (s *Store) SetCursorUnderLease(ctx context.Context, l Lease, name, value string) error {
	if name == "" || value == "" {
		return fmt.Errorf("pgstore.SetCursorUnderLease: cursor name %q and value %q must not be empty", name, value)
	}
	tag, err := s.pool.Exec(ctx, `
		INSERT INTO cursors (name, value)
		SELECT $1, $2 FROM leases
		 WHERE name = $3 AND holder = $4 AND epoch = $5 AND expires_at > clock_timestamp()
		ON CONFLICT (name) DO UPDATE SET value = EXCLUDED.value`,
		name, value, l.Name, s.holder, l.Epoch)
	if err != nil {
		return wrap(fmt.Sprintf("set cursor %q under lease %q", name, l.Name), err)
	}
	if tag.RowsAffected() == 0 {
		return fmt.Errorf("%w: cursor %q not set: lease %q (epoch %d) is no longer this replica's", ErrLeaseHeld, name, l.Name, l.Epoch)
	}
	return nil
}
