// Package pgstore keeps the live service's state in PostgreSQL, so that
// several `deadspace serve` replicas can share it: any replica accepts
// input, one evaluates a given patient at a time (claims), one runs each
// singleton job (polling, catch-up, subscription registration) at a time
// (leases), and writes whose replica died are taken over.
//
// Open connects from a postgres:// URL and brings the schema up to date
// before anything else: the migrations are embedded in the binary
// (migrations/NNNN_name.sql), applied in order under an advisory lock so
// that replicas starting together do not race, and a database whose schema
// is newer than the binary knows is refused (ErrSchemaTooNew) rather than
// misread.
//
// Time of record: instants the service passes in are stored exactly, as
// nanoseconds; lease and claim expiry use the database's clock, so the
// replicas' clocks need not agree for one replica to take over another's
// work.
package pgstore

import (
	"context"
	"crypto/rand"
	"encoding/hex"
	"errors"
	"fmt"
	"math"
	"net/url"
	"os"
	"strings"
	"time"

	"github.com/jackc/pgx/v5/pgxpool"
)

// Options tune Open.
type Options struct {
	// Holder names this replica in leases and claims. Empty means
	// host name, process id and a random suffix, which differs across
	// restarts: a restarted replica does not inherit its old claims, it
	// waits for them to expire like any other replica.
	Holder string
	// WriteLease is how long a replica's claim on the outbox writes it is
	// sending lasts (DefaultWriteLease when zero): a write whose replica
	// died is sent by another after it. It must exceed the longest a send
	// takes, retries included, or a slow write is sent twice (the
	// conditional creates still keep it to one resource).
	WriteLease time.Duration
	// MaxConns caps the connection pool (DefaultMaxConns when zero, unless
	// the URL sets pool_max_conns).
	MaxConns int32
}

// DefaultMaxConns is the pool size when neither Options nor the URL set
// one. pgxpool's own default (four on this two-core machine) would make
// webhook requests queue for a connection while each waits on a round trip
// to the database; sixteen per replica stays far below PostgreSQL's default
// max_connections of 100 for a few replicas.
const DefaultMaxConns = 16

// DefaultWriteLease is Options.WriteLease when unset.
const DefaultWriteLease = 2 * time.Minute

// Store is the PostgreSQL store. It is safe for concurrent use, and
// several Stores (replicas) may share one database.
type Store struct {
	pool       *pgxpool.Pool
	holder     string
	writeLease time.Duration
}

// Open connects to the database at dsn (a postgres:// URL or key=value
// string, with the usual PG* environment variables as defaults), applies
// the schema migrations this binary carries, and returns the store.
func Open(ctx context.Context, dsn string, opts Options) (*Store, error) {
	cfg, err := pgxpool.ParseConfig(dsn)
	if err != nil {
		// The parse error may echo the DSN, password included.
		return nil, fmt.Errorf("pgstore: the database URL %s does not parse", redactDSN(dsn))
	}
	switch {
	case opts.MaxConns > 0:
		cfg.MaxConns = opts.MaxConns
	case !strings.Contains(dsn, "pool_max_conns"):
		cfg.MaxConns = DefaultMaxConns
	}
	pool, err := pgxpool.NewWithConfig(ctx, cfg)
	if err != nil {
		return nil, fmt.Errorf("pgstore: connect to %s: %w", redactDSN(dsn), err)
	}
	if err := pool.Ping(ctx); err != nil {
		pool.Close()
		return nil, fmt.Errorf("pgstore: connect to %s: %w", redactDSN(dsn), err)
	}
	if _, err := Migrate(ctx, pool); err != nil {
		pool.Close()
		return nil, err
	}
	holder := opts.Holder
	if holder == "" {
		holder = defaultHolder()
	}
	lease := opts.WriteLease
	if lease <= 0 {
		lease = DefaultWriteLease
	}
	return &Store{pool: pool, holder: holder, writeLease: lease}, nil
}

// Holder is the name this replica holds leases and claims under.
func (s *Store) Holder() string { return s.holder }

// Ping checks that the database answers, for readiness.
func (s *Store) Ping(ctx context.Context) error {
	if err := s.pool.Ping(ctx); err != nil {
		return fmt.Errorf("pgstore: ping: %w", err)
	}
	return nil
}

// Close closes the connection pool.
func (s *Store) Close() error {
	s.pool.Close()
	return nil
}

func defaultHolder() string {
	host, err := os.Hostname()
	if err != nil || host == "" {
		host = "replica"
	}
	var b [4]byte
	_, _ = rand.Read(b[:])
	return fmt.Sprintf("%s/%d/%s", host, os.Getpid(), hex.EncodeToString(b[:]))
}

// redactDSN names the server without the password, for error messages.
func redactDSN(dsn string) string {
	u, err := url.Parse(dsn)
	if err != nil || u.Host == "" {
		return "(the configured database)"
	}
	return (&url.URL{Scheme: u.Scheme, Host: u.Host, Path: u.Path}).String()
}

// errTimeout turns a context deadline into a readable cause.
func wrap(op string, err error) error {
	if errors.Is(err, context.DeadlineExceeded) {
		return fmt.Errorf("pgstore: %s: the database did not answer in time: %w", op, err)
	}
	return fmt.Errorf("pgstore: %s: %w", op, err)
}

// Instants outside what int64 nanoseconds since 1970 hold (1678 to 2262)
// are clamped to its ends: callers use such instants only as "before
// everything" or "after everything" (DueWrites with a far-future now).
var (
	latestNanos   = time.Unix(0, math.MaxInt64)
	earliestNanos = time.Unix(0, math.MinInt64+1)
)

// nanos and fromNanos keep instants exactly (see the package comment); the
// zero time is 0.
func nanos(t time.Time) int64 {
	switch {
	case t.IsZero():
		return 0
	case t.After(latestNanos):
		return math.MaxInt64
	case t.Before(earliestNanos):
		return math.MinInt64 + 1
	}
	return t.UnixNano()
}

func fromNanos(n int64) time.Time {
	if n == 0 {
		return time.Time{}
	}
	return time.Unix(0, n).UTC()
}
