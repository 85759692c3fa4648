package boltstore

import (
	"bytes"
	"context"
	"encoding/binary"
	"fmt"
	"math"
	"time"

	bolt "go.etcd.io/bbolt"

	"github.com/deadspace-fhir/deadspace/api/store"
)

// Commit applies one evaluation in one transaction. Entries are checked
// one by one inside it, so an invalid entry after valid ones rolls back
// everything before it.
func (s *Store) Commit(ctx context.Context, change store.Change, now time.Time) error {
	if emptyChange(change) {
		// Nothing but the dirty mark to clear: no fsync of its own.
		if done, err := s.clearLater(ctx, change); err != nil || done {
			return err
		}
	}
	return s.batch(ctx, "Commit", func(tx *bolt.Tx) error {
		if err := checkSubject(change.Subject); err != nil {
			return err
		}
		if err := checkExpected(tx, change); err != nil {
			return err
		}
		feed := tx.Bucket(bFeed)
		feed.FillPercent = appendFill
		tx.Bucket(bLedgerExpiry).FillPercent = appendFill
		tx.Bucket(bResultsByTime).FillPercent = appendFill
		for i, en := range change.Entries {
			switch {
			case en.Subject == "":
				en.Subject = change.Subject
			case en.Subject != change.Subject:
				return fmt.Errorf("entry %d: subject differs from the change's", i)
			}
			if en.Series == "" || en.Key == "" {
				return fmt.Errorf("entry %d: empty series or key", i)
			}
			en, err := upsertEntry(tx, en, now)
			if err != nil {
				return fmt.Errorf("entry %d: %w", i, err)
			}
			seq, err := feed.NextSequence()
			if err != nil {
				return fmt.Errorf("feed sequence: %w", err)
			}
			ev := store.Event{Seq: seq, Series: en.Series, Subject: en.Subject, Key: en.Key, Status: en.Status, At: now}
			if err := feed.Put(u64(seq), encodeEvent(ev)); err != nil {
				return err
			}
		}
		for i, r := range change.Results {
			if r.ID == "" || r.Version == "" {
				return fmt.Errorf("result %d: empty id or version", i)
			}
			if err := storeResult(tx, r, change.Subject); err != nil {
				return fmt.Errorf("result %d: %w", i, err)
			}
		}
		outbox := tx.Bucket(bOutbox)
		for _, w := range change.Writes {
			id, err := outbox.NextSequence()
			if err != nil {
				return fmt.Errorf("write id: %w", err)
			}
			w.ID, w.CreatedAt = id, now
			if w.NotBefore.IsZero() {
				w.NotBefore = now
			}
			if w.Subject == "" {
				w.Subject = change.Subject
			}
			if err := outbox.Put(u64(id), encodeWrite(w)); err != nil {
				return err
			}
		}
		if err := addCounter(tx, kOutboxN, len(change.Writes)); err != nil {
			return err
		}
		dirty := tx.Bucket(bDirty)
		v := dirty.Get([]byte(change.Subject))
		if v == nil {
			return nil
		}
		dt, err := decodeDirty(change.Subject, v)
		if err != nil {
			return err
		}
		if dt.Generation != change.Generation {
			// A change arrived after the evaluation read its generation:
			// the patient stays dirty so that change is evaluated too. Its
			// Since restarts now, because Since means "first dirty after the
			// last evaluation": keeping the old one would make a patient
			// with a steady feed due at once, forever, and the settle delay
			// would never coalesce anything.
			dt.Since = now
			return dirty.Put([]byte(change.Subject), encodeDirty(dt))
		}
		if err := dirty.Delete([]byte(change.Subject)); err != nil {
			return err
		}
		return addCounter(tx, kDirtyN, -1)
	})
}

// checkExpected compares every series the change expects with the ledger.
// With an expectation map, every entry written must have an expectation:
// an entry without one would be written blind.
func checkExpected(tx *bolt.Tx, change store.Change) error {
	if change.Expect == nil {
		return nil
	}
	for i, en := range change.Entries {
		if _, ok := change.Expect[en.Series]; !ok {
			return fmt.Errorf("entry %d: no expectation for its series", i)
		}
	}
	for series, want := range change.Expect {
		var got store.Expect
		if v := tx.Bucket(bLedger).Get([]byte(series)); v != nil {
			en, err := decodeEntry(series, v)
			if err != nil {
				return err
			}
			got = store.Expect{Key: en.Key, Status: en.Status}
		}
		if got != want {
			return store.ErrConflict
		}
	}
	return nil
}

// upsertEntry stores en and its index keys, replacing those of the version
// it supersedes. The store keeps what it already knows: previous keys the
// caller left out of Revisions are kept (EntryByKey must still find them),
// and server ids stay until a caller sets new ones, since a corrected
// value is an update of the same server resource.
func upsertEntry(tx *bolt.Tx, en store.Entry, now time.Time) (store.Entry, error) {
	ledger := tx.Bucket(bLedger)
	bySubj, byTime, byKey := tx.Bucket(bLedgerBySubj), tx.Bucket(bLedgerByTime), tx.Bucket(bLedgerByKey)
	if en.UpdatedAt.IsZero() {
		en.UpdatedAt = now
	}
	if v := ledger.Get([]byte(en.Series)); v != nil {
		old, err := decodeEntry(en.Series, v)
		if err != nil {
			return en, err
		}
		en.Revisions = store.MergeRevisions(old, en)
		if en.ServerID == "" {
			en.ServerID, en.ServerVersion = old.ServerID, old.ServerVersion
		}
		if old.Key != en.Key {
			// Keep the entry as it stood under its last key, for
			// explanations of the value it superseded.
			v := append(append([]byte(old.Series), sep), encodeEntry(old)...)
			if err := tx.Bucket(bLedgerVersions).Put([]byte(old.Key), v); err != nil {
				return en, err
			}
		}
		if err := tx.Bucket(bLedgerExpiry).Delete(ledgerExpiryKey(old)); err != nil {
			return en, err
		}
		if err := bySubj.Delete(subjectKey(old.Subject, old.Series)); err != nil {
			return en, err
		}
		if err := byTime.Delete(ledgerTimeKey(old)); err != nil {
			return en, err
		}
	}
	if err := ledger.Put([]byte(en.Series), encodeEntry(en)); err != nil {
		return en, err
	}
	if err := bySubj.Put(subjectKey(en.Subject, en.Series), nil); err != nil {
		return en, err
	}
	if err := byTime.Put(ledgerTimeKey(en), nil); err != nil {
		return en, err
	}
	if err := tx.Bucket(bLedgerExpiry).Put(ledgerExpiryKey(en), nil); err != nil {
		return en, err
	}
	for _, k := range append([]string{en.Key}, en.Revisions...) {
		if err := byKey.Put([]byte(k), []byte(en.Series)); err != nil {
			return en, err
		}
	}
	return en, nil
}

func ledgerTimeKey(en store.Entry) []byte {
	k := appendTimeKey(subjectPrefix(en.Subject), en.EffectiveAt)
	return append(k, en.Series...)
}

func ledgerExpiryKey(en store.Entry) []byte {
	return append(appendTimeKey(nil, en.EffectiveAt), en.Series...)
}

func resultKey(id, version string) []byte {
	return append(append([]byte(id), sep), version...)
}

// storeResult stores a result version unless it is already there.
func storeResult(tx *bolt.Tx, r store.Result, subject string) error {
	if r.Subject == "" {
		r.Subject = subject
	}
	k := resultKey(r.ID, r.Version)
	b := tx.Bucket(bResults)
	if b.Get(k) != nil {
		return nil
	}
	var e encoder
	e.str(r.Subject)
	e.time(r.EffectiveAt)
	e.rest(r.Payload)
	if err := b.Put(k, e.b); err != nil {
		return err
	}
	return tx.Bucket(bResultsByTime).Put(append(appendTimeKey(nil, r.EffectiveAt), k...), nil)
}

// Result returns one version of a result.
func (s *Store) Result(ctx context.Context, id, version string) (store.Result, error) {
	var r store.Result
	err := s.view(ctx, "Result", func(tx *bolt.Tx) error {
		v := tx.Bucket(bResults).Get(resultKey(id, version))
		if v == nil {
			return notFound("result")
		}
		d := decoder{b: v}
		r = store.Result{ID: id, Version: version}
		r.Subject = d.str()
		r.EffectiveAt = d.time()
		r.Payload = d.rest()
		return d.done("result")
	})
	return r, err
}

// EntryVersion returns the entry as it stood under key.
func (s *Store) EntryVersion(ctx context.Context, key string) (store.Entry, error) {
	var en store.Entry
	err := s.view(ctx, "EntryVersion", func(tx *bolt.Tx) error {
		if series := tx.Bucket(bLedgerByKey).Get([]byte(key)); series != nil {
			cur, err := getEntry(tx, series)
			if err != nil {
				return err
			}
			if cur.Key == key {
				en = cur
				return nil
			}
		}
		v := tx.Bucket(bLedgerVersions).Get([]byte(key))
		if v == nil {
			return notFound("ledger entry version")
		}
		i := bytes.IndexByte(v, sep)
		if i < 0 {
			return fmt.Errorf("%w: entry version without a series", ErrCorrupt)
		}
		var err error
		en, err = decodeEntry(string(v[:i]), v[i+1:])
		return err
	})
	return en, err
}

func getEntry(tx *bolt.Tx, series []byte) (store.Entry, error) {
	v := tx.Bucket(bLedger).Get(series)
	if v == nil {
		return store.Entry{}, notFound("ledger entry")
	}
	return decodeEntry(string(series), v)
}

// Ledger returns the patient's entries in Series order.
func (s *Store) Ledger(ctx context.Context, subject string) ([]store.Entry, error) {
	var out []store.Entry
	err := s.view(ctx, "Ledger", func(tx *bolt.Tx) error {
		prefix := subjectPrefix(subject)
		c := tx.Bucket(bLedgerBySubj).Cursor()
		for k, _ := c.Seek(prefix); k != nil && bytes.HasPrefix(k, prefix); k, _ = c.Next() {
			en, err := getEntry(tx, k[len(prefix):])
			if err != nil {
				return fmt.Errorf("index points to a missing entry: %w: %w", ErrCorrupt, err)
			}
			out = append(out, en)
		}
		return nil
	})
	if err != nil {
		return nil, err
	}
	return out, nil
}

// Entry returns one entry by series, or ErrNotFound.
func (s *Store) Entry(ctx context.Context, series string) (store.Entry, error) {
	var en store.Entry
	err := s.view(ctx, "Entry", func(tx *bolt.Tx) error {
		var err error
		en, err = getEntry(tx, []byte(series))
		return err
	})
	return en, err
}

// EntryByKey finds an entry by its current or a previous key.
func (s *Store) EntryByKey(ctx context.Context, key string) (store.Entry, error) {
	var en store.Entry
	err := s.view(ctx, "EntryByKey", func(tx *bolt.Tx) error {
		series := tx.Bucket(bLedgerByKey).Get([]byte(key))
		if series == nil {
			return notFound("ledger key")
		}
		var err error
		en, err = getEntry(tx, series)
		return err
	})
	return en, err
}

// EntriesBetween pages through the (subject, EffectiveAt, series) index.
// The page token is a series, so the position is found again from that
// entry's current EffectiveAt; an unknown series (or one of another
// patient) is ErrNotFound rather than a silent restart from the top.
func (s *Store) EntriesBetween(ctx context.Context, subject string, from, to time.Time, after string, limit int) ([]store.Entry, error) {
	if err := checkLimit(limit); err != nil {
		return nil, fmt.Errorf("boltstore.EntriesBetween: %w", err)
	}
	var out []store.Entry
	err := s.view(ctx, "EntriesBetween", func(tx *bolt.Tx) error {
		prefix := subjectPrefix(subject)
		start := appendTimeKey(bytes.Clone(prefix), from)
		end := appendTimeKey(bytes.Clone(prefix), to)
		var skip []byte
		if after != "" {
			last, err := getEntry(tx, []byte(after))
			if err != nil {
				return fmt.Errorf("paging series: %w", err)
			}
			if last.Subject != subject {
				return fmt.Errorf("paging series belongs to another patient: %w", store.ErrNotFound)
			}
			if k := ledgerTimeKey(last); bytes.Compare(k, start) >= 0 {
				start, skip = k, k
			}
		}
		c := tx.Bucket(bLedgerByTime).Cursor()
		for k, _ := c.Seek(start); k != nil && bytes.Compare(k, end) < 0 && len(out) < limit; k, _ = c.Next() {
			if skip != nil && bytes.Equal(k, skip) {
				continue
			}
			en, err := getEntry(tx, k[len(prefix)+timeKeyLen:])
			if err != nil {
				return fmt.Errorf("index points to a missing entry: %w: %w", ErrCorrupt, err)
			}
			out = append(out, en)
		}
		return nil
	})
	if err != nil {
		return nil, err
	}
	return out, nil
}

// Events reads the feed from after+1.
func (s *Store) Events(ctx context.Context, after uint64, limit int) ([]store.Event, error) {
	if err := checkLimit(limit); err != nil {
		return nil, fmt.Errorf("boltstore.Events: %w", err)
	}
	if after == math.MaxUint64 {
		if err := ctx.Err(); err != nil {
			return nil, fmt.Errorf("boltstore.Events: %w", err)
		}
		return nil, nil
	}
	var out []store.Event
	err := s.view(ctx, "Events", func(tx *bolt.Tx) error {
		c := tx.Bucket(bFeed).Cursor()
		for k, v := c.Seek(u64(after + 1)); k != nil && len(out) < limit; k, v = c.Next() {
			if len(k) != 8 {
				return fmt.Errorf("%w: feed key of %d bytes", ErrCorrupt, len(k))
			}
			ev, err := decodeEvent(binary.BigEndian.Uint64(k), v)
			if err != nil {
				return err
			}
			out = append(out, ev)
		}
		return nil
	})
	if err != nil {
		return nil, err
	}
	return out, nil
}

// LastEvent is the feed bucket's sequence: the last Seq handed out, which
// is also the last key because events are only ever appended.
func (s *Store) LastEvent(ctx context.Context) (uint64, error) {
	var seq uint64
	err := s.view(ctx, "LastEvent", func(tx *bolt.Tx) error {
		seq = tx.Bucket(bFeed).Sequence()
		return nil
	})
	return seq, err
}
