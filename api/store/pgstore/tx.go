package pgstore

import (
	"context"
	"errors"
	"fmt"

	"github.com/jackc/pgx/v5"
	"github.com/jackc/pgx/v5/pgconn"

	"github.com/deadspace-fhir/deadspace/api/store"
)

// txAttempts bounds the retries of a transaction the database rolled back
// to break a deadlock or a serialization conflict: both mean "try again",
// and neither left anything behind.
const txAttempts = 5

// inTx runs fn in one transaction after checking ctx, retrying it when the
// database asks for a retry, and prefixes errors with the operation name.
// fn may run more than once, so it must rebuild everything it returns.
func (s *Store) inTx(ctx context.Context, op string, fn func(tx pgx.Tx) error) error {
	if err := ctx.Err(); err != nil {
		return fmt.Errorf("pgstore.%s: %w", op, err)
	}
	var err error
	for range txAttempts {
		err = pgx.BeginFunc(ctx, s.pool, fn)
		if !retryable(err) {
			break
		}
	}
	if err != nil {
		return fmt.Errorf("pgstore.%s: %w", op, err)
	}
	return nil
}

func retryable(err error) bool {
	var pgErr *pgconn.PgError
	if !errors.As(err, &pgErr) {
		return false
	}
	switch pgErr.Code {
	case "40001", "40P01": // serialization_failure, deadlock_detected
		return true
	}
	return false
}

// run runs statements outside a transaction, with the same context check and
// error prefix as inTx.
func (s *Store) run(ctx context.Context, op string, fn func(q querier) error) error {
	if err := ctx.Err(); err != nil {
		return fmt.Errorf("pgstore.%s: %w", op, err)
	}
	if err := fn(s.pool); err != nil {
		return fmt.Errorf("pgstore.%s: %w", op, err)
	}
	return nil
}

// notFound names the kind of record only: errors reach logs, and subjects,
// references and series identify patients.
func notFound(what string) error { return fmt.Errorf("%s: %w", what, store.ErrNotFound) }

func checkLimit(limit int) error {
	if limit <= 0 {
		return fmt.Errorf("limit %d: must be positive", limit)
	}
	return nil
}
