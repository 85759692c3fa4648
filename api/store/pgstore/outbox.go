package pgstore

import (
	"cmp"
	"context"
	"errors"
	"fmt"
	"slices"
	"strconv"
	"time"

	"github.com/jackc/pgx/v5"

	"github.com/deadspace-fhir/deadspace/api/store"
)

func scanWrite(row pgx.CollectableRow) (store.Write, error) {
	var w store.Write
	var id, nb, created int64
	var wait *int64
	err := row.Scan(&id, &w.Subject, &w.Series, &w.Body, &w.Attempts, &nb, &created, &w.LastError, &wait)
	w.ID, w.NotBefore, w.CreatedAt = uint64(id), fromNanos(nb), fromNanos(created)
	if wait != nil {
		w.StoreClock, w.Wait = true, max(time.Duration(*wait)*time.Microsecond, 0)
	}
	if len(w.Series) == 0 {
		w.Series = nil
	}
	return w, err
}

// outboxClaimLock serializes claims on the outbox ("deadclai" in ASCII),
// so that the check for an earlier write of the same series held by
// another replica sees every claim made before it.
const outboxClaimLock int64 = 0x64656164636c6169

// DueWrites claims for this replica, for the write lease
// (Options.WriteLease), up to limit writes due at now, oldest first, and
// returns them. Writes another replica claimed are skipped while its lease
// runs; a write whose replica died is due again once the lease lapses, and
// is then sent by whichever replica claims it (the conditional creates keep
// a write sent twice from creating twice). A write is not claimed while an
// earlier write of one of its series is held by another replica: writes of
// one series go in the order they were queued, on one replica at a time.
// This replica's own claims stay due to it.
func (s *Store) DueWrites(ctx context.Context, now time.Time, limit int) ([]store.Write, error) {
	if err := checkLimit(limit); err != nil {
		return nil, fmt.Errorf("pgstore.DueWrites: %w", err)
	}
	var out []store.Write
	err := s.inTx(ctx, "DueWrites", func(tx pgx.Tx) error {
		if _, err := tx.Exec(ctx, `SELECT pg_advisory_xact_lock($1)`, outboxClaimLock); err != nil {
			return err
		}
		rows, err := tx.Query(ctx, `
			WITH picked AS (
				SELECT id FROM outbox o
				 WHERE o.not_before_ns <= $1
				   AND (o.claimed_by IS NULL OR o.claimed_by = $2 OR o.claim_expires <= clock_timestamp())
				   AND NOT EXISTS (
				       SELECT 1 FROM outbox e
				        WHERE e.id < o.id AND e.series && o.series
				          AND e.claimed_by <> $2 AND e.claim_expires > clock_timestamp())
				 ORDER BY id
				 LIMIT $3
				 FOR UPDATE SKIP LOCKED)
			UPDATE outbox o
			   SET claimed_by = $2, claim_expires = clock_timestamp() + $4 * interval '1 microsecond'
			  FROM picked
			 WHERE o.id = picked.id
			RETURNING o.id, o.subject, o.series, o.body, o.attempts, o.not_before_ns, o.created_ns, o.last_error,
			          (EXTRACT(EPOCH FROM o.due_at - clock_timestamp()) * 1e6)::bigint`,
			nanos(now), s.holder, limit, s.writeLease.Microseconds())
		if err != nil {
			return err
		}
		out, err = pgx.CollectRows(rows, scanWrite)
		return err
	})
	if err != nil {
		return nil, err
	}
	slices.SortFunc(out, func(a, b store.Write) int { return cmp.Compare(a.ID, b.ID) })
	return out, nil
}

// WriteLease is how long a claim on an outbox write lasts.
func (s *Store) WriteLease() time.Duration { return s.writeLease }

// RenewWriteClaim extends this replica's claim on a write by the write
// lease. A claim that lapsed is still renewed when no other replica took
// the write meanwhile.
func (s *Store) RenewWriteClaim(ctx context.Context, writeID uint64) (bool, error) {
	var ok bool
	err := s.run(ctx, "RenewWriteClaim", func(q querier) error {
		tag, err := q.Exec(ctx, `UPDATE outbox SET claim_expires = clock_timestamp() + $3 * interval '1 microsecond'
			WHERE id = $1 AND claimed_by = $2`, int64(writeID), s.holder, s.writeLease.Microseconds())
		ok = err == nil && tag.RowsAffected() == 1
		return err
	})
	return ok, err
}

func writeNotFound(id uint64) error { return notFound(fmt.Sprintf("write %d", id)) }

// Acknowledge removes the write and records server ids. A series that is
// not in the ledger fails the whole call, as in the embedded store. A
// replica whose lease lapsed while its write was in flight may find the
// write already acknowledged by the replica that took it over: that is
// ErrNotFound, and nothing changes.
func (s *Store) Acknowledge(ctx context.Context, writeID uint64, server map[string][2]string) error {
	return s.inTx(ctx, "Acknowledge", func(tx pgx.Tx) error {
		tag, err := tx.Exec(ctx, `DELETE FROM outbox WHERE id = $1`, int64(writeID))
		if err != nil {
			return err
		}
		if tag.RowsAffected() == 0 {
			return writeNotFound(writeID)
		}
		for series, ids := range server {
			tag, err := tx.Exec(ctx, `UPDATE ledger SET server_id = $2, server_version = $3 WHERE series = $1`, series, ids[0], ids[1])
			if err != nil {
				return err
			}
			if tag.RowsAffected() == 0 {
				return fmt.Errorf("server ids for write %d: %w", writeID, notFound("ledger entry"))
			}
		}
		return nil
	})
}

// Reschedule records a failed attempt and gives the claim up, so the
// retry goes to whichever replica is free when it is due. It changes the
// write only while this replica holds its claim, or no replica holds an
// unexpired one: a replica that stalled past its write lease, and whose
// write another replica took over and is sending, gets
// store.ErrClaimedElsewhere and changes nothing (as its late Acknowledge
// of a write the other already acknowledged is ErrNotFound).
func (s *Store) Reschedule(ctx context.Context, writeID uint64, notBefore time.Time, lastErr string) error {
	return s.reschedule(ctx, "Reschedule", writeID, nil, notBefore, lastErr)
}

// RescheduleIn is Reschedule with the next attempt due wait from now by
// the database's clock (due_at; store.Write.Wait).
func (s *Store) RescheduleIn(ctx context.Context, writeID uint64, wait time.Duration, notBefore time.Time, lastErr string) error {
	us := max(wait, 0).Microseconds()
	return s.reschedule(ctx, "RescheduleIn", writeID, &us, notBefore, lastErr)
}

// reschedule records a failed attempt, with the wait on the database's
// clock when waitUS (microseconds) is set.
func (s *Store) reschedule(ctx context.Context, op string, writeID uint64, waitUS *int64, notBefore time.Time, lastErr string) error {
	return s.inTx(ctx, op, func(tx pgx.Tx) error {
		if err := s.holdsWrite(ctx, tx, writeID); err != nil {
			return err
		}
		_, err := tx.Exec(ctx, `UPDATE outbox SET attempts = attempts + 1, not_before_ns = $2, last_error = $3,
			due_at = clock_timestamp() + $4::bigint * interval '1 microsecond',
			claimed_by = NULL, claim_expires = NULL WHERE id = $1`, int64(writeID), nanos(notBefore), lastErr, waitUS)
		return err
	})
}

// holdsWrite locks the write's row for the transaction and checks that no
// other replica holds an unexpired claim on it (by the database's clock,
// as DueWrites hands it out): store.ErrClaimedElsewhere when one does,
// ErrNotFound when the write left the outbox.
func (s *Store) holdsWrite(ctx context.Context, tx pgx.Tx, writeID uint64) error {
	var elsewhere bool
	err := tx.QueryRow(ctx, `SELECT claimed_by IS NOT NULL AND claimed_by <> $2 AND claim_expires > clock_timestamp()
		FROM outbox WHERE id = $1 FOR UPDATE`, int64(writeID), s.holder).Scan(&elsewhere)
	if errors.Is(err, pgx.ErrNoRows) {
		return writeNotFound(writeID)
	}
	if err != nil {
		return err
	}
	if elsewhere {
		return fmt.Errorf("write %d: %w", writeID, store.ErrClaimedElsewhere)
	}
	return nil
}

// Bury moves a write to the dead letters, in burial order; the attempt
// that was refused counts among its attempts. Like Reschedule, it leaves
// a write another replica holds an unexpired claim on as it is
// (store.ErrClaimedElsewhere): that replica may be sending it, and the
// send may well land.
func (s *Store) Bury(ctx context.Context, writeID uint64, reason string, now time.Time) error {
	return s.inTx(ctx, "Bury", func(tx pgx.Tx) error {
		if err := s.holdsWrite(ctx, tx, writeID); err != nil {
			return err
		}
		_, err := tx.Exec(ctx, `
			WITH gone AS (DELETE FROM outbox WHERE id = $1 RETURNING *)
			INSERT INTO dead_letters (write_id, subject, series, body, attempts, not_before_ns, created_ns, last_error, reason, at_ns)
			SELECT id, subject, series, body, attempts + 1, not_before_ns, created_ns, last_error, $2, $3 FROM gone`,
			int64(writeID), reason, nanos(now))
		return err
	})
}

// DeadLetters lists dead letters in burial order.
func (s *Store) DeadLetters(ctx context.Context, limit int) ([]store.DeadLetter, error) {
	if err := checkLimit(limit); err != nil {
		return nil, fmt.Errorf("pgstore.DeadLetters: %w", err)
	}
	var out []store.DeadLetter
	err := s.run(ctx, "DeadLetters", func(q querier) error {
		rows, err := q.Query(ctx, `SELECT `+deadLetterColumns+` FROM dead_letters ORDER BY seq LIMIT $1`, limit)
		if err != nil {
			return err
		}
		out, err = pgx.CollectRows(rows, func(row pgx.CollectableRow) (store.DeadLetter, error) { return scanDeadLetter(row) })
		return err
	})
	if err != nil {
		return nil, err
	}
	return out, nil
}

// Stats counts in one statement, so the figures are of one snapshot.
func (s *Store) Stats(ctx context.Context) (store.Stats, error) {
	var st store.Stats
	err := s.run(ctx, "Stats", func(q querier) error {
		var oldest *int64
		err := q.QueryRow(ctx, `SELECT (SELECT count(*) FROM outbox), (SELECT min(created_ns) FROM outbox),
			(SELECT count(*) FROM dead_letters), (SELECT count(*) FROM dirty)`).
			Scan(&st.OutboxDepth, &oldest, &st.DeadLetters, &st.DirtyPatients)
		if oldest != nil {
			st.OldestWrite = fromNanos(*oldest)
		}
		return err
	})
	return st, err
}

// Cursor returns a named value, "" when unset.
func (s *Store) Cursor(ctx context.Context, name string) (string, error) {
	var v string
	err := s.run(ctx, "Cursor", func(q querier) error {
		err := q.QueryRow(ctx, `SELECT value FROM cursors WHERE name = $1`, name).Scan(&v)
		if errors.Is(err, pgx.ErrNoRows) {
			return nil
		}
		return err
	})
	return v, err
}

// SetCursor sets a named value; "" removes it, which reads back the same.
func (s *Store) SetCursor(ctx context.Context, name, value string) error {
	if name == "" {
		return errors.New("pgstore.SetCursor: empty cursor name")
	}
	return s.run(ctx, "SetCursor", func(q querier) error {
		if value == "" {
			_, err := q.Exec(ctx, `DELETE FROM cursors WHERE name = $1`, name)
			return err
		}
		_, err := q.Exec(ctx, `INSERT INTO cursors (name, value) VALUES ($1, $2) ON CONFLICT (name) DO UPDATE SET value = EXCLUDED.value`,
			name, value)
		return err
	})
}

// SeenEvent keeps the highest number seen; a lower or repeated number (a
// redelivery, possibly to another replica) leaves it alone, unless the
// numbering started again (store.EventsRestarted). The row lock makes two
// replicas receiving the same event agree on which saw it first.
func (s *Store) SeenEvent(ctx context.Context, subscription string, number uint64) (uint64, error) {
	return s.setEvents(ctx, "SeenEvent", subscription, number, func(prev uint64) bool {
		return number > prev || store.EventsRestarted(prev, number)
	})
}

// RestartEvents sets the subscription's highest event number to number.
func (s *Store) RestartEvents(ctx context.Context, subscription string, number uint64) (uint64, error) {
	return s.setEvents(ctx, "RestartEvents", subscription, number, func(uint64) bool { return true })
}

// setEvents sets the subscription's highest event number to number when
// set says so of the one it replaces, which it returns.
func (s *Store) setEvents(ctx context.Context, op, subscription string, number uint64, set func(prev uint64) bool) (uint64, error) {
	if subscription == "" {
		return 0, fmt.Errorf("pgstore.%s: empty subscription", op)
	}
	var prev uint64
	err := s.inTx(ctx, op, func(tx pgx.Tx) error {
		if _, err := tx.Exec(ctx, `INSERT INTO subscription_events (subscription, highest) VALUES ($1, 0) ON CONFLICT DO NOTHING`,
			subscription); err != nil {
			return err
		}
		var highest string
		if err := tx.QueryRow(ctx, `SELECT highest::text FROM subscription_events WHERE subscription = $1 FOR UPDATE`,
			subscription).Scan(&highest); err != nil {
			return err
		}
		var err error
		if prev, err = strconv.ParseUint(highest, 10, 64); err != nil {
			return fmt.Errorf("stored event number %q: %w", highest, err)
		}
		if number == prev || !set(prev) {
			return nil
		}
		_, err = tx.Exec(ctx, `UPDATE subscription_events SET highest = $2::numeric WHERE subscription = $1`,
			subscription, strconv.FormatUint(number, 10))
		return err
	})
	if err != nil {
		return 0, err
	}
	return prev, nil
}
