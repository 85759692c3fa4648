package pgstore

import (
	"context"
	"errors"
	"time"

	"github.com/jackc/pgx/v5"

	"github.com/deadspace-fhir/deadspace/api/store"
)

// EntryVersion returns the entry as it stood while key was its Key: the
// current entry when key is current, else the version it superseded.
func (s *Store) EntryVersion(ctx context.Context, key string) (store.Entry, error) {
	var en store.Entry
	err := s.run(ctx, "EntryVersion", func(q querier) error {
		cur, err := getEntry(ctx, q, `SELECT l.series, l.subject, l.key, l.status, l.server_id, l.server_version, l.revisions,
			l.effective_ns, l.updated_ns, l.payload FROM ledger_keys k JOIN ledger l ON l.series = k.series WHERE k.key = $1`, key)
		if err == nil && cur.Key == key {
			en = cur
			return nil
		}
		if err != nil && !errors.Is(err, store.ErrNotFound) {
			return err
		}
		en, err = getEntry(ctx, q, `SELECT series, subject, key, status, server_id, server_version, revisions,
			effective_ns, updated_ns, payload FROM ledger_versions WHERE key = $1`, key)
		if errors.Is(err, store.ErrNotFound) {
			return notFound("ledger entry version")
		}
		return err
	})
	return en, err
}

// Result returns one version of a result, or ErrNotFound.
func (s *Store) Result(ctx context.Context, id, version string) (store.Result, error) {
	r := store.Result{ID: id, Version: version}
	err := s.run(ctx, "Result", func(q querier) error {
		var eff int64
		err := q.QueryRow(ctx, `SELECT subject, effective_ns, payload FROM results WHERE id = $1 AND version = $2`, id, version).
			Scan(&r.Subject, &eff, &r.Payload)
		if errors.Is(err, pgx.ErrNoRows) {
			return notFound("result")
		}
		r.EffectiveAt = fromNanos(eff)
		return err
	})
	return r, err
}

// PruneHistory removes, in one transaction, ledger entries (with their
// keys and earlier versions) and results whose EffectiveAt is before
// ledger, except entries whose series still has a write in the outbox or
// a dead letter that stays (an operator may retry it, and sending it
// reads the entry); feed events recorded before feed; dead letters buried before dead. The
// feed head stays, so resume tokens are never reused.
func (s *Store) PruneHistory(ctx context.Context, ledger, feed, dead time.Time) (store.Pruned, error) {
	var n store.Pruned
	err := s.inTx(ctx, "PruneHistory", func(tx pgx.Tx) error {
		n = store.Pruned{}
		err := tx.QueryRow(ctx, `
			WITH gone AS (
				DELETE FROM ledger l
				 WHERE l.effective_ns < $1
				   AND NOT EXISTS (SELECT 1 FROM outbox o WHERE l.series = ANY(o.series))
				   AND NOT EXISTS (SELECT 1 FROM dead_letters d WHERE d.at_ns >= $2 AND l.series = ANY(d.series))
				RETURNING l.series, l.key, l.revisions),
			keys AS (
				DELETE FROM ledger_keys k USING gone
				 WHERE k.series = gone.series AND (k.key = gone.key OR k.key = ANY(gone.revisions))),
			versions AS (
				DELETE FROM ledger_versions v USING gone WHERE v.series = gone.series)
			SELECT count(*) FROM gone`, nanos(ledger), nanos(dead)).Scan(&n.Entries)
		if err != nil {
			return err
		}
		for _, step := range []struct {
			sql   string
			at    time.Time
			count *int
		}{
			{`DELETE FROM results WHERE effective_ns < $1`, ledger, &n.Results},
			{`DELETE FROM feed WHERE at_ns < $1`, feed, &n.Events},
			{`DELETE FROM dead_letters WHERE at_ns < $1`, dead, &n.DeadLetters},
		} {
			tag, err := tx.Exec(ctx, step.sql, nanos(step.at))
			if err != nil {
				return err
			}
			*step.count = int(tag.RowsAffected())
		}
		return nil
	})
	if err != nil {
		return store.Pruned{}, err
	}
	return n, nil
}
