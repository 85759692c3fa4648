package pgstore

import (
	"context"
	"errors"
	"fmt"
	"time"

	"github.com/jackc/pgx/v5"

	"github.com/deadspace-fhir/deadspace/api/store"
)

var _ store.DeadLetterStore = (*Store)(nil)

// deadLetterColumns are read by scanDeadLetter, in this order.
const deadLetterColumns = `write_id, subject, series, body, attempts, not_before_ns, created_ns, last_error, reason, at_ns`

func scanDeadLetter(row pgx.Row) (store.DeadLetter, error) {
	var dl store.DeadLetter
	var id, nb, created, at int64
	err := row.Scan(&id, &dl.Subject, &dl.Series, &dl.Body, &dl.Attempts, &nb, &created, &dl.LastError, &dl.Reason, &at)
	dl.ID, dl.NotBefore, dl.CreatedAt, dl.At = uint64(id), fromNanos(nb), fromNanos(created), fromNanos(at)
	if len(dl.Series) == 0 {
		dl.Series = nil
	}
	return dl, err
}

func deadLetterNotFound(writeID uint64) error {
	return notFound(fmt.Sprintf("dead letter of write %d", writeID))
}

// DeadLetter returns the dead letter of write writeID. The table is not
// indexed by write id: dead letters are few (each is a write the server
// refused for good, which an operator clears), as in the embedded store.
func (s *Store) DeadLetter(ctx context.Context, writeID uint64) (store.DeadLetter, error) {
	var out store.DeadLetter
	err := s.run(ctx, "DeadLetter", func(q querier) error {
		dl, err := scanDeadLetter(q.QueryRow(ctx, `SELECT `+deadLetterColumns+` FROM dead_letters
			WHERE write_id = $1 ORDER BY seq LIMIT 1`, int64(writeID)))
		if errors.Is(err, pgx.ErrNoRows) {
			return deadLetterNotFound(writeID)
		}
		out = dl
		return err
	})
	return out, err
}

// RetryDeadLetter moves a dead letter back to the outbox as a new write, in
// one transaction. The new row takes the next id of the outbox's identity
// column, so it is the newest write: DueWrites, which never hands out a
// write while an earlier write of one of its series is held elsewhere,
// sends it after anything of its series queued before it. It starts
// unclaimed, so whichever replica is free sends it. Two operators retrying
// one letter at once cannot both succeed: the DELETE takes the row, and the
// second finds nothing.
func (s *Store) RetryDeadLetter(ctx context.Context, writeID uint64, now time.Time) (store.Write, error) {
	var w store.Write
	err := s.inTx(ctx, "RetryDeadLetter", func(tx pgx.Tx) error {
		dl, err := scanDeadLetter(tx.QueryRow(ctx, `
			DELETE FROM dead_letters
			 WHERE seq = (SELECT seq FROM dead_letters WHERE write_id = $1 ORDER BY seq LIMIT 1)
			RETURNING `+deadLetterColumns, int64(writeID)))
		if errors.Is(err, pgx.ErrNoRows) {
			return deadLetterNotFound(writeID)
		}
		if err != nil {
			return err
		}
		w = dl.Write
		w.Attempts, w.NotBefore, w.CreatedAt = 0, now, now
		w.LastError = "retried by an operator after: " + dl.Reason
		series := w.Series
		if series == nil {
			series = []string{}
		}
		body := w.Body
		if body == nil {
			body = []byte{}
		}
		var id int64
		if err := tx.QueryRow(ctx, `
			INSERT INTO outbox (subject, series, body, attempts, not_before_ns, created_ns, last_error)
			VALUES ($1, $2, $3, 0, $4, $4, $5)
			RETURNING id`,
			w.Subject, series, body, nanos(now), w.LastError).Scan(&id); err != nil {
			return err
		}
		w.ID = uint64(id)
		return nil
	})
	if err != nil {
		return store.Write{}, err
	}
	return w, nil
}
