package boltstore

import (
	"bytes"
	"fmt"
	"log/slog"
	"slices"
	"time"

	bolt "go.etcd.io/bbolt"
)

// The move of schema 4 (see migrate) in batches. Variables so that a test
// can watch a small store move in several batches with a line for each.
var (
	// moveBatch is about how many inputs one transaction moves: a few MB
	// of pages held until its commit. A patient's inputs move together, so
	// its rows are written in key order and fill their pages as a fresh
	// store's do.
	moveBatch = 20000
	// moveReportEvery is how often a long move logs its progress.
	moveReportEvery = 5 * time.Second
)

// moveInputs moves the inputs of a file of schema 3 or earlier from the
// inputs bucket into input_rows and input_place, a batch of patients per
// transaction, and drops the old buckets when the last batch is moved. A
// move cut short (the process killed, the disk full) leaves the moved
// patients in the new buckets and the rest in the old one, so the next
// Open carries on; the file says schema 5 from the start, so an older
// build never opens it half moved. Log lines carry counts only.
func moveInputs(db *bolt.DB, log *slog.Logger) error {
	return runMove(db, log, inputsMove)
}

var inputsMove = move{
	schema: 4,
	pending: func(tx *bolt.Tx) int {
		if b := tx.Bucket(bOldInputs); b != nil {
			return b.Stats().KeyN
		}
		return -1
	},
	batch:    moveInputBatch,
	starting: "boltstore: moving inputs into their time order (schema 4), once",
	progress: "boltstore: moving inputs",
	finished: "boltstore: inputs moved",
}

// move is one of the moves of inputs that a migration leaves to be done in
// batches after it (see runMove).
type move struct {
	schema int
	// pending counts the inputs left to move, -1 when the move is done.
	pending func(tx *bolt.Tx) int
	// batch moves about limit inputs and says how many it moved and
	// whether the move is now complete.
	batch                        func(tx *bolt.Tx, limit int) (int, bool, error)
	starting, progress, finished string
}

// runMove runs m a batch (moveBatch) per transaction until it is done,
// logging its start, its progress every moveReportEvery and its end with
// counts only. A move cut short leaves what it moved moved, and the next
// Open carries on from there.
func runMove(db *bolt.DB, log *slog.Logger, m move) error {
	total := -1
	if err := db.View(func(tx *bolt.Tx) error {
		total = m.pending(tx)
		return nil
	}); err != nil {
		return fmt.Errorf("migrate to schema %d: %w", m.schema, err)
	}
	if total < 0 {
		return nil // nothing left to move
	}
	start := time.Now()
	if total > 0 {
		log.Info(m.starting, "inputs", total)
	}
	moved, reported := 0, start
	for {
		var n int
		var done bool
		err := db.Update(func(tx *bolt.Tx) error {
			var err error
			n, done, err = m.batch(tx, moveBatch)
			return err
		})
		if err != nil {
			return fmt.Errorf("migrate to schema %d, %d of %d inputs moved: %w", m.schema, moved, total, err)
		}
		moved += n
		if done {
			break
		}
		if now := time.Now(); now.Sub(reported) >= moveReportEvery {
			log.Info(m.progress, "moved", moved, "of", total, "elapsed", now.Sub(start).Round(time.Millisecond))
			reported = now
		}
	}
	if total > 0 {
		log.Info(m.finished, "inputs", moved, "elapsed", time.Since(start).Round(time.Millisecond))
	}
	return nil
}

// moveInputBatch moves whole patients, at least limit inputs when there
// are that many left, and deletes the old buckets once they hold nothing.
// It returns how many inputs it moved and whether the move is complete.
func moveInputBatch(tx *bolt.Tx, limit int) (int, bool, error) {
	old := tx.Bucket(bOldInputs)
	rows := tx.Bucket(bInputRows)
	rows.FillPercent = appendFill
	type kv struct{ k, v []byte }
	var moving, pointers []kv
	var subject []byte // the prefix (subject 0) of the patient being read
	c := old.Cursor()
	for k, v := c.First(); k != nil; k, v = c.Next() {
		if !bytes.HasPrefix(k, subject) || subject == nil {
			if len(moving) >= limit {
				break
			}
			i := bytes.IndexByte(k, sep)
			if i < 0 {
				return 0, false, fmt.Errorf("%w: input key without a subject", ErrCorrupt)
			}
			subject = bytes.Clone(k[:i+1])
		}
		_, _, eff, err := decodeInputHead(v)
		if err != nil {
			return 0, false, err
		}
		t := appendTimeKey(nil, eff)
		moving = append(moving, kv{rowKey(subject, t, k[len(subject):]), bytes.Clone(v)})
		pointers = append(pointers, kv{bytes.Clone(k), t})
	}
	// In key order, each patient's rows go in as appends.
	slices.SortFunc(moving, func(a, b kv) int { return bytes.Compare(a.k, b.k) })
	for _, r := range moving {
		if err := rows.Put(r.k, r.v); err != nil {
			return 0, false, err
		}
	}
	for _, p := range pointers {
		if err := addPlace(tx, p.k, p.v); err != nil {
			return 0, false, err
		}
		if err := old.Delete(p.k); err != nil {
			return 0, false, err
		}
	}
	if k, _ := old.Cursor().First(); k != nil {
		return len(moving), false, nil
	}
	if err := tx.DeleteBucket(bOldInputs); err != nil {
		return 0, false, err
	}
	if tx.Bucket(bOldInputsByTime) != nil {
		if err := tx.DeleteBucket(bOldInputsByTime); err != nil {
			return 0, false, err
		}
	}
	return len(moving), true, nil
}

// addPlace records, in input_place, the row of the input keyed subject 0
// logical (as input_at and the inputs of schema 3 were) at time key t,
// and makes the subject the owner when input_owner says it is.
func addPlace(tx *bolt.Tx, key, t []byte) error {
	i := bytes.IndexByte(key, sep)
	if i < 0 {
		return fmt.Errorf("%w: input key without a subject", ErrCorrupt)
	}
	if len(t) != timeKeyLen {
		return fmt.Errorf("%w: input time key of %d bytes", ErrCorrupt, len(t))
	}
	subject, logical := string(key[:i]), key[i+1:]
	pl, err := getPlaces(tx, logical)
	if err != nil {
		return err
	}
	pl.set(subject, bytes.Clone(t))
	if owners := tx.Bucket(bOldInputOwner); owners != nil && string(owners.Get(logical)) == subject {
		pl.own(subject)
	}
	return putPlaces(tx, logical, pl)
}

// movePlaces moves the indexes of schema 4, input_at and input_owner,
// into input_place (schema 5), in batches as moveInputs does, and drops
// them when the last batch is moved; moveInputs, which runs first, has by
// then put every input of an older file in its place. Log lines carry
// counts only.
func movePlaces(db *bolt.DB, log *slog.Logger) error {
	return runMove(db, log, placesMove)
}

var placesMove = move{
	schema: 5,
	pending: func(tx *bolt.Tx) int {
		if b := tx.Bucket(bOldInputAt); b != nil {
			return b.Stats().KeyN
		}
		if tx.Bucket(bOldInputOwner) != nil {
			return 0 // a schema-3 file's owner index, dropped by the one batch
		}
		return -1
	},
	batch:    movePlaceBatch,
	starting: "boltstore: merging the input indexes (schema 5), once",
	progress: "boltstore: merging the input indexes",
	finished: "boltstore: input indexes merged",
}

// movePlaceBatch moves up to limit entries of input_at into input_place
// and drops input_at and input_owner once input_at is empty.
func movePlaceBatch(tx *bolt.Tx, limit int) (int, bool, error) {
	n := 0
	if at := tx.Bucket(bOldInputAt); at != nil {
		type kv struct{ k, v []byte }
		var batch []kv
		c := at.Cursor()
		for k, v := c.First(); k != nil && len(batch) < limit; k, v = c.Next() {
			batch = append(batch, kv{bytes.Clone(k), bytes.Clone(v)})
		}
		for _, e := range batch {
			if err := addPlace(tx, e.k, e.v); err != nil {
				return 0, false, err
			}
			if err := at.Delete(e.k); err != nil {
				return 0, false, err
			}
		}
		if k, _ := at.Cursor().First(); k != nil {
			return len(batch), false, nil
		}
		n = len(batch)
		if err := tx.DeleteBucket(bOldInputAt); err != nil {
			return 0, false, err
		}
	}
	if tx.Bucket(bOldInputOwner) != nil {
		if err := tx.DeleteBucket(bOldInputOwner); err != nil {
			return 0, false, err
		}
	}
	return n, true, nil
}
