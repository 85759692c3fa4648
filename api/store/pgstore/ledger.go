package pgstore

import (
	"context"
	"errors"
	"fmt"
	"math"
	"slices"
	"time"

	"github.com/jackc/pgx/v5"

	"github.com/deadspace-fhir/deadspace/api/store"
)

const entryColumns = `series, subject, key, status, server_id, server_version, revisions, effective_ns, updated_ns, payload`

func scanEntry(row pgx.CollectableRow) (store.Entry, error) {
	var en store.Entry
	var eff, upd int64
	err := row.Scan(&en.Series, &en.Subject, &en.Key, &en.Status, &en.ServerID, &en.ServerVersion, &en.Revisions, &eff, &upd, &en.Payload)
	if len(en.Revisions) == 0 {
		en.Revisions = nil
	}
	en.EffectiveAt, en.UpdatedAt = fromNanos(eff), fromNanos(upd)
	return en, err
}

// Commit applies one evaluation in one transaction: it locks the ledger
// rows of the change's series (in series order, so overlapping commits
// cannot deadlock), checks what the change expected of them (ErrConflict,
// with nothing applied, when another evaluation on any replica committed
// first), writes entries, keys, outbox rows and the dirty mark,
// and appends the feed last, holding the feed head only for the end of the
// transaction.
func (s *Store) Commit(ctx context.Context, change store.Change, now time.Time) error {
	if err := checkSubject(change.Subject); err != nil {
		return fmt.Errorf("pgstore.Commit: %w", err)
	}
	entries := slices.Clone(change.Entries)
	series := make([]string, 0, len(entries))
	for i := range entries {
		en := &entries[i]
		switch {
		case en.Subject == "":
			en.Subject = change.Subject
		case en.Subject != change.Subject:
			return fmt.Errorf("pgstore.Commit: entry %d: subject differs from the change's", i)
		}
		if en.Series == "" || en.Key == "" {
			return fmt.Errorf("pgstore.Commit: entry %d: empty series or key", i)
		}
		if en.UpdatedAt.IsZero() {
			en.UpdatedAt = now
		}
		if change.Expect != nil {
			// With expectations, an entry without one would be written
			// blind.
			if _, ok := change.Expect[en.Series]; !ok {
				return fmt.Errorf("pgstore.Commit: entry %d: no expectation for its series", i)
			}
		}
		series = append(series, en.Series)
	}
	for se := range change.Expect {
		series = append(series, se)
	}
	empty := len(entries) == 0 && len(change.Results) == 0 && len(change.Writes) == 0 && len(change.Expect) == 0
	return s.inTx(ctx, "Commit", func(tx pgx.Tx) error {
		if empty {
			// Only the dirty mark to clear: losing that in a crash costs
			// one more evaluation, so the commit need not wait for the
			// write-ahead log to reach disk.
			if _, err := tx.Exec(ctx, `SET LOCAL synchronous_commit = off`); err != nil {
				return err
			}
		}
		old, err := lockEntries(ctx, tx, series)
		if err != nil {
			return err
		}
		for se, want := range change.Expect {
			var got store.Expect
			if en, ok := old[se]; ok {
				got = store.Expect{Key: en.Key, Status: en.Status}
			}
			if got != want {
				return store.ErrConflict
			}
		}
		for i, en := range entries {
			prev, exists := old[en.Series]
			if !exists {
				// No row to lock yet: a concurrent commit may create the
				// series first. Then this one conflicts if it expected the
				// series absent, or else builds on what that one wrote.
				tag, err := insertEntry(ctx, tx, en)
				if err != nil {
					return fmt.Errorf("entry %d: %w", i, err)
				}
				if tag {
					old[en.Series] = en
					if err := putKeys(ctx, tx, en); err != nil {
						return err
					}
					continue
				}
				if change.Expect != nil {
					return store.ErrConflict
				}
				again, err := lockEntries(ctx, tx, []string{en.Series})
				if err != nil {
					return err
				}
				prev = again[en.Series]
			}
			en.Revisions = store.MergeRevisions(prev, en)
			if en.ServerID == "" {
				en.ServerID, en.ServerVersion = prev.ServerID, prev.ServerVersion
			}
			if prev.Key != en.Key {
				if err := keepVersion(ctx, tx, prev); err != nil {
					return err
				}
			}
			if err := updateEntry(ctx, tx, en); err != nil {
				return fmt.Errorf("entry %d: %w", i, err)
			}
			old[en.Series] = en
			if err := putKeys(ctx, tx, en); err != nil {
				return err
			}
		}
		for i, r := range change.Results {
			if r.ID == "" || r.Version == "" {
				return fmt.Errorf("result %d: empty id or version", i)
			}
			if r.Subject == "" {
				r.Subject = change.Subject
			}
			payload := r.Payload
			if payload == nil {
				payload = []byte{}
			}
			// A version already stored is kept as it is.
			if _, err := tx.Exec(ctx, `INSERT INTO results (id, version, subject, effective_ns, payload) VALUES ($1, $2, $3, $4, $5)
				ON CONFLICT (id, version) DO NOTHING`, r.ID, r.Version, r.Subject, nanos(r.EffectiveAt), payload); err != nil {
				return fmt.Errorf("result %d: %w", i, err)
			}
		}
		for _, w := range change.Writes {
			if w.NotBefore.IsZero() {
				w.NotBefore = now
			}
			if w.Subject == "" {
				w.Subject = change.Subject
			}
			series := w.Series
			if series == nil {
				series = []string{}
			}
			body := w.Body
			if body == nil {
				body = []byte{}
			}
			if _, err := tx.Exec(ctx, `
				INSERT INTO outbox (subject, series, body, attempts, not_before_ns, created_ns, last_error)
				VALUES ($1, $2, $3, $4, $5, $6, $7)`,
				w.Subject, series, body, w.Attempts, nanos(w.NotBefore), nanos(now), w.LastError); err != nil {
				return err
			}
		}
		if err := settleDirty(ctx, tx, change, now); err != nil {
			return err
		}
		return appendFeed(ctx, tx, entries, now)
	})
}

// lockEntries reads and locks the ledger rows of the given series.
func lockEntries(ctx context.Context, tx pgx.Tx, series []string) (map[string]store.Entry, error) {
	rows, err := tx.Query(ctx, `SELECT `+entryColumns+` FROM ledger WHERE series = ANY($1) ORDER BY series FOR UPDATE`, series)
	if err != nil {
		return nil, err
	}
	list, err := pgx.CollectRows(rows, scanEntry)
	if err != nil {
		return nil, err
	}
	out := make(map[string]store.Entry, len(list))
	for _, en := range list {
		out[en.Series] = en
	}
	return out, nil
}

func entryArgs(en store.Entry) []any {
	revisions := en.Revisions
	if revisions == nil {
		revisions = []string{}
	}
	payload := en.Payload
	if payload == nil {
		payload = []byte{}
	}
	return []any{en.Series, en.Subject, en.Key, en.Status, en.ServerID, en.ServerVersion, revisions,
		nanos(en.EffectiveAt), nanos(en.UpdatedAt), payload}
}

// insertEntry creates a series, reporting false when it already exists.
func insertEntry(ctx context.Context, tx pgx.Tx, en store.Entry) (bool, error) {
	tag, err := tx.Exec(ctx, `INSERT INTO ledger (`+entryColumns+`) VALUES ($1, $2, $3, $4, $5, $6, $7, $8, $9, $10)
		ON CONFLICT (series) DO NOTHING`, entryArgs(en)...)
	return tag.RowsAffected() == 1, err
}

func updateEntry(ctx context.Context, tx pgx.Tx, en store.Entry) error {
	_, err := tx.Exec(ctx, `UPDATE ledger SET subject = $2, key = $3, status = $4, server_id = $5, server_version = $6,
		revisions = $7, effective_ns = $8, updated_ns = $9, payload = $10 WHERE series = $1`, entryArgs(en)...)
	return err
}

// keepVersion keeps an entry as it stood under its key, which the commit
// is about to replace.
func keepVersion(ctx context.Context, tx pgx.Tx, en store.Entry) error {
	args := entryArgs(en)
	_, err := tx.Exec(ctx, `INSERT INTO ledger_versions (series, subject, key, status, server_id, server_version, revisions,
		effective_ns, updated_ns, payload) VALUES ($1, $2, $3, $4, $5, $6, $7, $8, $9, $10)
		ON CONFLICT (key) DO UPDATE SET series = EXCLUDED.series, subject = EXCLUDED.subject, status = EXCLUDED.status,
		server_id = EXCLUDED.server_id, server_version = EXCLUDED.server_version, revisions = EXCLUDED.revisions,
		effective_ns = EXCLUDED.effective_ns, updated_ns = EXCLUDED.updated_ns, payload = EXCLUDED.payload`, args...)
	return err
}

// putKeys points the entry's current and previous keys at its series.
func putKeys(ctx context.Context, tx pgx.Tx, en store.Entry) error {
	_, err := tx.Exec(ctx, `
		INSERT INTO ledger_keys (key, series) SELECT k, $2 FROM unnest($1::text[]) AS k
		ON CONFLICT (key) DO UPDATE SET series = EXCLUDED.series`,
		append([]string{en.Key}, en.Revisions...), en.Series)
	return err
}

// settleDirty clears the patient's mark and claim when no change arrived
// since the generation the evaluation read; otherwise the patient stays
// dirty with Since restarting now (see store.Store.Commit) and its claim
// released, so any replica may evaluate what arrived meanwhile.
func settleDirty(ctx context.Context, tx pgx.Tx, change store.Change, now time.Time) error {
	var gen int64
	err := tx.QueryRow(ctx, `SELECT generation FROM dirty WHERE subject = $1 FOR UPDATE`, change.Subject).Scan(&gen)
	if errors.Is(err, pgx.ErrNoRows) {
		return nil
	}
	if err != nil {
		return err
	}
	if uint64(gen) != change.Generation {
		_, err = tx.Exec(ctx, `UPDATE dirty SET since_ns = $2, since_at = clock_timestamp(), claimed_by = NULL, claim_expires = NULL WHERE subject = $1`,
			change.Subject, nanos(now))
		return err
	}
	// The trigger of migration 0004 records the clear (store.Dirty.Cleared).
	_, err = tx.Exec(ctx, `DELETE FROM dirty WHERE subject = $1`, change.Subject)
	return err
}

// appendFeed numbers the events from the feed head, whose row lock it
// holds until the transaction ends: feed numbers become visible in order.
func appendFeed(ctx context.Context, tx pgx.Tx, entries []store.Entry, now time.Time) error {
	if len(entries) == 0 {
		return nil
	}
	var last int64
	if err := tx.QueryRow(ctx, `UPDATE feed_head SET seq = seq + $1 RETURNING seq`, len(entries)).Scan(&last); err != nil {
		return fmt.Errorf("feed sequence: %w", err)
	}
	first := last - int64(len(entries)) + 1
	batch := &pgx.Batch{}
	for i, en := range entries {
		batch.Queue(`INSERT INTO feed (seq, series, subject, key, status, at_ns) VALUES ($1, $2, $3, $4, $5, $6)`,
			first+int64(i), en.Series, en.Subject, en.Key, en.Status, nanos(now))
	}
	return tx.SendBatch(ctx, batch).Close()
}

// Ledger returns the patient's entries in Series order.
func (s *Store) Ledger(ctx context.Context, subject string) ([]store.Entry, error) {
	var out []store.Entry
	err := s.run(ctx, "Ledger", func(q querier) error {
		rows, err := q.Query(ctx, `SELECT `+entryColumns+` FROM ledger WHERE subject = $1 ORDER BY series`, subject)
		if err != nil {
			return err
		}
		out, err = pgx.CollectRows(rows, scanEntry)
		return err
	})
	if err != nil {
		return nil, err
	}
	return out, nil
}

func getEntry(ctx context.Context, q querier, sql string, arg string) (store.Entry, error) {
	rows, err := q.Query(ctx, sql, arg)
	if err != nil {
		return store.Entry{}, err
	}
	en, err := pgx.CollectExactlyOneRow(rows, scanEntry)
	if errors.Is(err, pgx.ErrNoRows) {
		return store.Entry{}, notFound("ledger entry")
	}
	return en, err
}

// Entry returns one entry by series, or ErrNotFound.
func (s *Store) Entry(ctx context.Context, series string) (store.Entry, error) {
	var en store.Entry
	err := s.run(ctx, "Entry", func(q querier) error {
		var err error
		en, err = getEntry(ctx, q, `SELECT `+entryColumns+` FROM ledger WHERE series = $1`, series)
		return err
	})
	return en, err
}

// EntryByKey finds an entry by its current or a previous key.
func (s *Store) EntryByKey(ctx context.Context, key string) (store.Entry, error) {
	var en store.Entry
	err := s.run(ctx, "EntryByKey", func(q querier) error {
		var err error
		en, err = getEntry(ctx, q, `SELECT l.series, l.subject, l.key, l.status, l.server_id, l.server_version, l.revisions,
			l.effective_ns, l.updated_ns, l.payload FROM ledger_keys k JOIN ledger l ON l.series = k.series WHERE k.key = $1`, key)
		return err
	})
	return en, err
}

// EntriesBetween pages through the (subject, EffectiveAt, series) index.
// The page token is a series; an unknown one, or one of another patient,
// is ErrNotFound rather than a silent restart from the top.
func (s *Store) EntriesBetween(ctx context.Context, subject string, from, to time.Time, after string, limit int) ([]store.Entry, error) {
	if err := checkLimit(limit); err != nil {
		return nil, fmt.Errorf("pgstore.EntriesBetween: %w", err)
	}
	var out []store.Entry
	err := s.run(ctx, "EntriesBetween", func(q querier) error {
		startEff, startSeries := nanos(from), ""
		if after != "" {
			last, err := getEntry(ctx, q, `SELECT `+entryColumns+` FROM ledger WHERE series = $1`, after)
			if err != nil {
				return fmt.Errorf("paging series: %w", err)
			}
			if last.Subject != subject {
				return fmt.Errorf("paging series belongs to another patient: %w", store.ErrNotFound)
			}
			if nanos(last.EffectiveAt) >= startEff {
				startEff, startSeries = nanos(last.EffectiveAt), last.Series
			}
		}
		start := `effective_ns >= $2 AND $3::text = ''`
		if startSeries != "" {
			start = `(effective_ns, series) > ($2, $3)`
		}
		rows, err := q.Query(ctx, `SELECT `+entryColumns+` FROM ledger
			WHERE subject = $1 AND `+start+` AND effective_ns < $4
			ORDER BY effective_ns, series LIMIT $5`, subject, startEff, startSeries, nanos(to), limit)
		if err != nil {
			return err
		}
		out, err = pgx.CollectRows(rows, scanEntry)
		return err
	})
	if err != nil {
		return nil, err
	}
	return out, nil
}

// Events reads the feed from after+1.
func (s *Store) Events(ctx context.Context, after uint64, limit int) ([]store.Event, error) {
	if err := checkLimit(limit); err != nil {
		return nil, fmt.Errorf("pgstore.Events: %w", err)
	}
	if after >= math.MaxInt64 {
		if err := ctx.Err(); err != nil {
			return nil, fmt.Errorf("pgstore.Events: %w", err)
		}
		return nil, nil
	}
	var out []store.Event
	err := s.run(ctx, "Events", func(q querier) error {
		rows, err := q.Query(ctx, `SELECT seq, series, subject, key, status, at_ns FROM feed WHERE seq > $1 ORDER BY seq LIMIT $2`,
			int64(after), limit)
		if err != nil {
			return err
		}
		out, err = pgx.CollectRows(rows, func(row pgx.CollectableRow) (store.Event, error) {
			var ev store.Event
			var seq, at int64
			err := row.Scan(&seq, &ev.Series, &ev.Subject, &ev.Key, &ev.Status, &at)
			ev.Seq, ev.At = uint64(seq), fromNanos(at)
			return ev, err
		})
		return err
	})
	if err != nil {
		return nil, err
	}
	return out, nil
}

// LastEvent is the feed head: the last Seq handed out by a committed
// transaction.
func (s *Store) LastEvent(ctx context.Context) (uint64, error) {
	var seq int64
	err := s.run(ctx, "LastEvent", func(q querier) error {
		return q.QueryRow(ctx, `SELECT seq FROM feed_head`).Scan(&seq)
	})
	return uint64(seq), err
}
