package boltstore

import (
	"context"
	"encoding/binary"
	"errors"
	"fmt"
	"time"

	bolt "go.etcd.io/bbolt"

	"github.com/deadspace-fhir/deadspace/api/store"
)

// DueWrites scans the outbox in id order (see the package comment for why
// there is no NotBefore index) and decodes only the writes that are due.
func (s *Store) DueWrites(ctx context.Context, now time.Time, limit int) ([]store.Write, error) {
	if err := checkLimit(limit); err != nil {
		return nil, fmt.Errorf("boltstore.DueWrites: %w", err)
	}
	var out []store.Write
	err := s.view(ctx, "DueWrites", func(tx *bolt.Tx) error {
		c := tx.Bucket(bOutbox).Cursor()
		for k, v := c.First(); k != nil && len(out) < limit; k, v = c.Next() {
			nb, err := decodeWriteNotBefore(v)
			if err != nil {
				return err
			}
			if nb.After(now) {
				continue
			}
			w, err := decodeWrite(binary.BigEndian.Uint64(k), v)
			if err != nil {
				return err
			}
			out = append(out, w)
		}
		return nil
	})
	if err != nil {
		return nil, err
	}
	return out, nil
}

func getWrite(tx *bolt.Tx, id uint64) (store.Write, error) {
	v := tx.Bucket(bOutbox).Get(u64(id))
	if v == nil {
		return store.Write{}, notFound(fmt.Sprintf("write %d", id))
	}
	return decodeWrite(id, v)
}

func deleteWrite(tx *bolt.Tx, id uint64) error {
	if err := tx.Bucket(bOutbox).Delete(u64(id)); err != nil {
		return err
	}
	return addCounter(tx, kOutboxN, -1)
}

// Acknowledge, Reschedule and Bury go through the group commit (batch),
// like ingest: a commit of their own would hold the file's single writer
// for a whole sync, during which no webhook answer can be made durable.

// Acknowledge removes the write and records server ids. A series that is
// not in the ledger fails the whole call: the ledger and the outbox are
// written together, so it means the caller mixed up writes, and dropping
// the ids silently would lose the link to the server's resource.
func (s *Store) Acknowledge(ctx context.Context, writeID uint64, server map[string][2]string) error {
	return s.batch(ctx, "Acknowledge", func(tx *bolt.Tx) error {
		if _, err := getWrite(tx, writeID); err != nil {
			return err
		}
		if err := deleteWrite(tx, writeID); err != nil {
			return err
		}
		ledger := tx.Bucket(bLedger)
		for series, ids := range server {
			en, err := getEntry(tx, []byte(series))
			if err != nil {
				return fmt.Errorf("server ids for write %d: %w", writeID, err)
			}
			en.ServerID, en.ServerVersion = ids[0], ids[1]
			if err := ledger.Put([]byte(series), encodeEntry(en)); err != nil {
				return err
			}
		}
		return nil
	})
}

// Reschedule records a failed attempt. One replica owns the embedded
// store and so holds the claim on every write: it never answers
// store.ErrClaimedElsewhere (nor does Bury).
func (s *Store) Reschedule(ctx context.Context, writeID uint64, notBefore time.Time, lastErr string) error {
	return s.batch(ctx, "Reschedule", func(tx *bolt.Tx) error {
		w, err := getWrite(tx, writeID)
		if err != nil {
			return err
		}
		w.Attempts++
		w.NotBefore, w.LastError = notBefore, lastErr
		return tx.Bucket(bOutbox).Put(u64(writeID), encodeWrite(w))
	})
}

// Bury moves a write to the dead letters, keyed by burial order; the
// attempt that was refused counts among its attempts.
func (s *Store) Bury(ctx context.Context, writeID uint64, reason string, now time.Time) error {
	return s.batch(ctx, "Bury", func(tx *bolt.Tx) error {
		w, err := getWrite(tx, writeID)
		if err != nil {
			return err
		}
		w.Attempts++
		if err := deleteWrite(tx, writeID); err != nil {
			return err
		}
		dead := tx.Bucket(bDead)
		seq, err := dead.NextSequence()
		if err != nil {
			return fmt.Errorf("dead letter sequence: %w", err)
		}
		if err := dead.Put(u64(seq), encodeDead(store.DeadLetter{Write: w, Reason: reason, At: now})); err != nil {
			return err
		}
		return addCounter(tx, kDeadN, 1)
	})
}

// DeadLetters lists dead letters in burial order.
func (s *Store) DeadLetters(ctx context.Context, limit int) ([]store.DeadLetter, error) {
	if err := checkLimit(limit); err != nil {
		return nil, fmt.Errorf("boltstore.DeadLetters: %w", err)
	}
	var out []store.DeadLetter
	err := s.view(ctx, "DeadLetters", func(tx *bolt.Tx) error {
		c := tx.Bucket(bDead).Cursor()
		for k, v := c.First(); k != nil && len(out) < limit; k, v = c.Next() {
			dl, err := decodeDead(v)
			if err != nil {
				return err
			}
			out = append(out, dl)
		}
		return nil
	})
	if err != nil {
		return nil, err
	}
	return out, nil
}

// Stats reads the counters kept in meta; OldestWrite is the CreatedAt of
// the lowest write id, the first one committed.
func (s *Store) Stats(ctx context.Context) (store.Stats, error) {
	var st store.Stats
	err := s.view(ctx, "Stats", func(tx *bolt.Tx) error {
		meta := tx.Bucket(bMeta)
		st.OutboxDepth = int(getU64(meta, kOutboxN))
		st.DeadLetters = int(getU64(meta, kDeadN))
		st.DirtyPatients = int(getU64(meta, kDirtyN))
		for subject, gen := range s.clears.snapshot() {
			if v := tx.Bucket(bDirty).Get([]byte(subject)); v != nil {
				if dt, err := decodeDirty(subject, v); err == nil && dt.Generation == gen {
					st.DirtyPatients = max(st.DirtyPatients-1, 0)
				}
			}
		}
		k, v := tx.Bucket(bOutbox).Cursor().First()
		if k == nil {
			return nil
		}
		// CreatedAt is the second field: read up to it, not the body.
		d := decoder{b: v}
		d.time()
		st.OldestWrite = d.time()
		return d.done("outbox write")
	})
	return st, err
}

// Cursor returns a named value, "" when unset.
func (s *Store) Cursor(ctx context.Context, name string) (string, error) {
	var v string
	err := s.view(ctx, "Cursor", func(tx *bolt.Tx) error {
		v = string(tx.Bucket(bCursors).Get([]byte(name)))
		return nil
	})
	return v, err
}

// SetCursor sets a named value; "" removes it, which reads back the same.
func (s *Store) SetCursor(ctx context.Context, name, value string) error {
	return s.update(ctx, "SetCursor", func(tx *bolt.Tx) error {
		if name == "" {
			return errors.New("empty cursor name")
		}
		b := tx.Bucket(bCursors)
		if value == "" {
			return b.Delete([]byte(name))
		}
		return b.Put([]byte(name), []byte(value))
	})
}

// SeenEvent keeps the highest number seen; a lower or repeated number
// (a redelivery) leaves it alone, unless the numbering started again
// (store.EventsRestarted).
func (s *Store) SeenEvent(ctx context.Context, subscription string, number uint64) (uint64, error) {
	var prev uint64
	err := s.batch(ctx, "SeenEvent", func(tx *bolt.Tx) error {
		var err error
		prev, err = seenEvent(tx, subscription, number)
		return err
	})
	if err != nil {
		return 0, err
	}
	return prev, nil
}

// RestartEvents sets the subscription's highest event number to number.
func (s *Store) RestartEvents(ctx context.Context, subscription string, number uint64) (uint64, error) {
	var prev uint64
	err := s.batch(ctx, "RestartEvents", func(tx *bolt.Tx) error {
		if subscription == "" {
			return errors.New("empty subscription")
		}
		b := tx.Bucket(bSubs)
		prev = getU64(b, []byte(subscription))
		return b.Put([]byte(subscription), u64(number))
	})
	if err != nil {
		return 0, err
	}
	return prev, nil
}

// seenEvent raises the subscription's highest event number to number, or
// lowers it to number when the numbering started again, and returns the
// one it replaces.
func seenEvent(tx *bolt.Tx, subscription string, number uint64) (uint64, error) {
	if subscription == "" {
		return 0, errors.New("empty subscription")
	}
	b := tx.Bucket(bSubs)
	prev := getU64(b, []byte(subscription))
	if number <= prev && !store.EventsRestarted(prev, number) {
		return prev, nil
	}
	return prev, b.Put([]byte(subscription), u64(number))
}
