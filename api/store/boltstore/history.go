package boltstore

import (
	"bytes"
	"context"
	"time"

	bolt "go.etcd.io/bbolt"

	"github.com/deadspace-fhir/deadspace/api/store"
)

// PruneHistory walks the time indexes of the ledger and the results, and
// the feed and the dead letters from their oldest, each up to its horizon.
// The feed and the dead letters are in the order they were written, and
// their times only grow, so each walk stops at the first record that stays.
func (s *Store) PruneHistory(ctx context.Context, ledger, feed, dead time.Time) (store.Pruned, error) {
	var n store.Pruned
	err := s.update(ctx, "PruneHistory", func(tx *bolt.Tx) error {
		n = store.Pruned{}
		// The ledger entries of writes still to send, or that an operator
		// may retry (dead letters outlive the history), stay: sending a
		// write reads them and records the server's ids in them.
		pending := map[string]bool{}
		if err := tx.Bucket(bOutbox).ForEach(func(k, v []byte) error {
			w, err := decodeWrite(0, v)
			if err != nil {
				return err
			}
			for _, s := range w.Series {
				pending[s] = true
			}
			return nil
		}); err != nil {
			return err
		}
		if err := tx.Bucket(bDead).ForEach(func(_, v []byte) error {
			dl, err := decodeDead(v)
			if err != nil {
				return err
			}
			// Dead letters older than their horizon go below, and their
			// entries with the next prune.
			if dl.At.Before(dead) {
				return nil
			}
			for _, s := range dl.Series {
				pending[s] = true
			}
			return nil
		}); err != nil {
			return err
		}
		var stale [][]byte
		c := tx.Bucket(bLedgerExpiry).Cursor()
		for k, _ := c.First(); len(k) >= timeKeyLen && parseTimeKey(k).Before(ledger); k, _ = c.Next() {
			stale = append(stale, bytes.Clone(k))
		}
		for _, k := range stale {
			series := k[timeKeyLen:]
			if pending[string(series)] {
				continue
			}
			if err := deleteEntry(tx, series, k); err != nil {
				return err
			}
			n.Entries++
		}
		stale = stale[:0]
		c = tx.Bucket(bResultsByTime).Cursor()
		for k, _ := c.First(); len(k) >= timeKeyLen && parseTimeKey(k).Before(ledger); k, _ = c.Next() {
			stale = append(stale, bytes.Clone(k))
		}
		for _, k := range stale {
			if err := tx.Bucket(bResultsByTime).Delete(k); err != nil {
				return err
			}
			if err := tx.Bucket(bResults).Delete(k[timeKeyLen:]); err != nil {
				return err
			}
			n.Results++
		}
		stale = stale[:0]
		fc := tx.Bucket(bFeed).Cursor()
		for k, v := fc.First(); k != nil; k, v = fc.Next() {
			ev, err := decodeEvent(0, v)
			if err != nil {
				return err
			}
			if !ev.At.Before(feed) {
				break
			}
			stale = append(stale, bytes.Clone(k))
		}
		for _, k := range stale {
			if err := tx.Bucket(bFeed).Delete(k); err != nil {
				return err
			}
			n.Events++
		}
		stale = stale[:0]
		dc := tx.Bucket(bDead).Cursor()
		for k, v := dc.First(); k != nil; k, v = dc.Next() {
			dl, err := decodeDead(v)
			if err != nil {
				return err
			}
			if !dl.At.Before(dead) {
				break
			}
			stale = append(stale, bytes.Clone(k))
		}
		for _, k := range stale {
			if err := tx.Bucket(bDead).Delete(k); err != nil {
				return err
			}
			n.DeadLetters++
		}
		return addCounter(tx, kDeadN, -n.DeadLetters)
	})
	if err != nil {
		return store.Pruned{}, err
	}
	return n, nil
}

// deleteEntry removes a ledger entry, its index keys and its earlier
// versions.
func deleteEntry(tx *bolt.Tx, series, expiryKey []byte) error {
	if err := tx.Bucket(bLedgerExpiry).Delete(expiryKey); err != nil {
		return err
	}
	en, err := getEntry(tx, series)
	if err != nil {
		return nil // the index outlived its entry: nothing more to remove
	}
	for _, b := range []struct {
		name []byte
		key  []byte
	}{
		{bLedger, series},
		{bLedgerBySubj, subjectKey(en.Subject, en.Series)},
		{bLedgerByTime, ledgerTimeKey(en)},
		{bLedgerByKey, []byte(en.Key)},
	} {
		if err := tx.Bucket(b.name).Delete(b.key); err != nil {
			return err
		}
	}
	for _, k := range en.Revisions {
		if err := tx.Bucket(bLedgerByKey).Delete([]byte(k)); err != nil {
			return err
		}
		if err := tx.Bucket(bLedgerVersions).Delete([]byte(k)); err != nil {
			return err
		}
	}
	return nil
}

// UsedBytes is the size of the pages in use up to the highest one: about
// what the file would be after compaction (the file itself grows in steps
// of up to 16 MB). Benchmarks report it per stored record.
func (s *Store) UsedBytes(ctx context.Context) (int64, error) {
	var n int64
	err := s.view(ctx, "UsedBytes", func(tx *bolt.Tx) error {
		n = tx.Size()
		return nil
	})
	return n, err
}
