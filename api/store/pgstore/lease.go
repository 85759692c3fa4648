package pgstore

import (
	"context"
	"errors"
	"fmt"
	"time"

	"github.com/jackc/pgx/v5"
)

// ErrLeaseHeld means another replica holds the lease and it has not
// expired.
var ErrLeaseHeld = errors.New("pgstore: lease held by another replica")

// Lease is a named right to run a job that only one replica may run at a
// time (polling, catch-up, subscription registration).
type Lease struct {
	Name   string
	Holder string
	// Expires is when the lease lapses unless renewed, on the database's
	// clock.
	Expires time.Time
	// Epoch rises every time the lease changes hands. A job can carry it
	// as a fencing token: work stamped with an older epoch was done by a
	// holder that has since lost the lease.
	Epoch int64
}

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
