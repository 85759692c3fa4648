package boltstore

import (
	"context"
	"fmt"
	"time"

	bolt "go.etcd.io/bbolt"

	"github.com/deadspace-fhir/deadspace/api/store"
)

var _ store.DeadLetterStore = (*Store)(nil)

// findDead scans the dead letters for write id; they are few (each is a
// write the server refused for good, which an operator clears), so no
// index is kept.
func findDead(tx *bolt.Tx, writeID uint64) (key []byte, dl store.DeadLetter, err error) {
	c := tx.Bucket(bDead).Cursor()
	for k, v := c.First(); k != nil; k, v = c.Next() {
		d, err := decodeDead(v)
		if err != nil {
			return nil, dl, err
		}
		if d.ID == writeID {
			return append([]byte(nil), k...), d, nil
		}
	}
	return nil, dl, notFound(fmt.Sprintf("dead letter of write %d", writeID))
}

// DeadLetter returns the dead letter of write writeID.
func (s *Store) DeadLetter(ctx context.Context, writeID uint64) (store.DeadLetter, error) {
	var out store.DeadLetter
	err := s.view(ctx, "DeadLetter", func(tx *bolt.Tx) error {
		_, dl, err := findDead(tx, writeID)
		out = dl
		return err
	})
	return out, err
}

// RetryDeadLetter moves a dead letter back to the outbox as a new write.
func (s *Store) RetryDeadLetter(ctx context.Context, writeID uint64, now time.Time) (store.Write, error) {
	var w store.Write
	err := s.update(ctx, "RetryDeadLetter", func(tx *bolt.Tx) error {
		key, dl, err := findDead(tx, writeID)
		if err != nil {
			return err
		}
		if err := tx.Bucket(bDead).Delete(key); err != nil {
			return err
		}
		if err := addCounter(tx, kDeadN, -1); err != nil {
			return err
		}
		outbox := tx.Bucket(bOutbox)
		id, err := outbox.NextSequence()
		if err != nil {
			return fmt.Errorf("outbox sequence: %w", err)
		}
		w = dl.Write
		w.ID, w.Attempts, w.NotBefore, w.CreatedAt = id, 0, now, now
		w.LastError = "retried by an operator after: " + dl.Reason
		if err := outbox.Put(u64(id), encodeWrite(w)); err != nil {
			return err
		}
		return addCounter(tx, kOutboxN, 1)
	})
	if err != nil {
		return store.Write{}, err
	}
	return w, nil
}
