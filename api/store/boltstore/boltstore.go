// Package boltstore is the embedded [store.Store]: one bbolt file, written
// by one process, every method one bbolt transaction, every change synced
// to disk before the method returns.
//
// # Layout
//
// Top-level buckets, with their keys (⧺ is concatenation, 0 the byte 0x00
// that ends a subject, t a 12-byte time key whose byte order is time
// order, n an 8-byte big-endian number):
//
//	meta            "schema" → n, and the counters Stats reads
//	input_rows      subject 0 t(EffectiveAt) ⧺ logical → input  (Inputs,
//	                InputsFrom: a range scan; Prune: each patient's head)
//	input_place     logical → the owner flag and, for each subject that
//	                holds a row of the input, subject and t(EffectiveAt),
//	                where the row is  (Input, Owner, the version rule;
//	                schema 5)
//	patients        subject → patient facts
//	dirty           subject → since, generation, from, urgent, until
//	                (bucket sequence = generation; until since schema 6)
//	ledger          series → entry
//	ledger_by_subj  subject 0 series → ∅             (Ledger)
//	ledger_by_time  subject 0 t(EffectiveAt) ⧺ series → ∅  (EntriesBetween)
//	ledger_by_key   key → series, for the current and every previous key
//	outbox          n(write id) → write  (bucket sequence = write ids)
//	dead            n(burial sequence) → dead letter
//	cursors         name → value
//	subscriptions   subscription → n(highest event number)
//	feed            n(Seq) → event  (bucket sequence = Seq)
//	results         id 0 version → result  (schema 3)
//	results_by_time t(EffectiveAt) ⧺ id 0 version → ∅  (PruneHistory)
//	ledger_versions key → series 0 entry, the entry as it stood under an
//	                earlier key  (EntryVersion)
//	ledger_expiry   t(EffectiveAt) ⧺ series → ∅  (PruneHistory)
//
// A patient's inputs are kept in the order of their effective time
// (schema 4), so that a read from a time on touches only the rows it
// returns, however long the retained history before it: the evaluation
// of a new reading reads a short recent span. The row holds the whole
// input; input_place holds the time key that finds the row and which
// subject holds the latest version, so a version check or an Input costs
// two lookups, and an ingest writes the row and one place record (see
// places for why the two indexes of schema 4 became one). Prune
// has no index across patients: it seeks each patient's first row in
// turn, one seek per patient, and deletes the rows before the horizon.
//
// DueWrites scans the outbox in id order instead of keeping an index by
// NotBefore: the outbox holds only unacknowledged writes, each record
// starts with its NotBefore, so writes that are not due are skipped
// without decoding their bodies, and the scan returns them in the order
// the spec asks for (oldest first) with no sort.
//
// Stats reads three counters kept in meta and updated in the same
// transaction as the change they count, so it costs three reads however
// large the outbox or the dead letters grow.
//
// Generations come from one sequence shared by all patients. They are
// therefore strictly increasing per patient, as [store.Dirty] asks, and a
// patient whose mark was cleared never gets back a generation an
// evaluation still in flight may hold.
package boltstore

import (
	"bytes"
	"context"
	"encoding/binary"
	"errors"
	"fmt"
	"log/slog"
	"os"
	"path/filepath"
	"time"

	bolt "go.etcd.io/bbolt"
	bolterrors "go.etcd.io/bbolt/errors"

	"github.com/deadspace-fhir/deadspace/api/store"
)

var (
	_ store.Store     = (*Store)(nil)
	_ store.Exclusive = (*Store)(nil)
)

// schemaVersion is the layout this build writes. Raise it with every
// change to a bucket or a record layout, and add the migration to
// migrate.
const schemaVersion = 6

// Errors of Open, to be matched with errors.Is.
var (
	// ErrLocked means another process holds the file open.
	ErrLocked = errors.New("boltstore: file is locked by another process")
	// ErrCorrupt means the file is not a readable store.
	ErrCorrupt = errors.New("boltstore: file is corrupt or not a store")
	// ErrNewerSchema means the file was written by a newer build.
	ErrNewerSchema = errors.New("boltstore: file has a newer schema version")
)

// DefaultTimeout is how long Open waits for the file lock when
// Options.Timeout is zero. It is short so that a second process started by
// mistake fails with ErrLocked instead of hanging.
const DefaultTimeout = 5 * time.Second

// Options tune Open.
type Options struct {
	// Timeout is how long to wait for the file lock (DefaultTimeout when
	// zero).
	Timeout time.Duration
	// Logger receives the progress of a migration at Open
	// (slog.Default() when nil). Its lines carry counts only.
	Logger *slog.Logger
	// NoSync skips fsync on commit. It breaks the durability the store
	// promises and exists only for benchmarks.
	NoSync bool
}

// Store is the bbolt implementation of [store.Store].
type Store struct {
	db     *bolt.DB
	group  *groupCommit
	clears pendingClears
}

var (
	bMeta = []byte("meta")
	// bInputRows replaces the inputs and inputs_by_time buckets of
	// schema 3 and earlier (schema 4).
	bInputRows = []byte("input_rows")
	// bInputPlace replaces input_at and input_owner (schema 5).
	bInputPlace   = []byte("input_place")
	bPatients     = []byte("patients")
	bDirty        = []byte("dirty")
	bLedger       = []byte("ledger")
	bLedgerBySubj = []byte("ledger_by_subj")
	bLedgerByTime = []byte("ledger_by_time")
	bLedgerByKey  = []byte("ledger_by_key")
	bOutbox       = []byte("outbox")
	bDead         = []byte("dead")
	bCursors      = []byte("cursors")
	bSubs         = []byte("subscriptions")
	bFeed         = []byte("feed")
	// Schema 3: results once per version, earlier entry versions, and the
	// expiry index of the ledger.
	bResults        = []byte("results")
	bResultsByTime  = []byte("results_by_time")
	bLedgerVersions = []byte("ledger_versions")
	bLedgerExpiry   = []byte("ledger_expiry")

	allBuckets = [][]byte{
		bMeta, bInputRows, bInputPlace, bPatients, bDirty, bLedger,
		bLedgerBySubj, bLedgerByTime, bLedgerByKey, bOutbox, bDead,
		bCursors, bSubs, bFeed,
		bResults, bResultsByTime, bLedgerVersions, bLedgerExpiry,
	}

	// The inputs of schema 3 and earlier: subject 0 logical → input, and
	// t(EffectiveAt) ⧺ subject 0 logical → ∅. Only the migration to
	// schema 4 reads them; it deletes them when it is done.
	bOldInputs       = []byte("inputs")
	bOldInputsByTime = []byte("inputs_by_time")
	// The indexes of schema 4 that input_place replaces: input_at
	// (subject 0 logical → t) and input_owner (logical → subject of the
	// latest version, since schema 2). Only the moves read them.
	bOldInputAt    = []byte("input_at")
	bOldInputOwner = []byte("input_owner")

	kSchema = []byte("schema")
	// Counters read by Stats.
	kOutboxN = []byte("outbox_n")
	kDeadN   = []byte("dead_n")
	kDirtyN  = []byte("dirty_n")
)

// Open opens or creates the store file at path, creating its directory
// (0700) and the file (0600) when missing.
func Open(path string, opts Options) (*Store, error) {
	if opts.Timeout <= 0 {
		opts.Timeout = DefaultTimeout
	}
	if err := os.MkdirAll(filepath.Dir(path), 0o700); err != nil {
		return nil, fmt.Errorf("boltstore.Open: %w", err)
	}
	db, err := openDB(path, opts)
	if err != nil {
		return nil, err
	}
	s := &Store{db: db}
	s.group = &groupCommit{db: db, begin: s.clears.begin}
	if err := s.init(); err != nil {
		_ = db.Close()
		return nil, fmt.Errorf("boltstore.Open: %s: %w", path, err)
	}
	log := opts.Logger
	if log == nil {
		log = slog.Default()
	}
	if err := moveInputs(db, log); err != nil {
		_ = db.Close()
		return nil, fmt.Errorf("boltstore.Open: %s: %w", path, err)
	}
	if err := movePlaces(db, log); err != nil {
		_ = db.Close()
		return nil, fmt.Errorf("boltstore.Open: %s: %w", path, err)
	}
	return s, nil
}

func openDB(path string, opts Options) (db *bolt.DB, err error) {
	// bbolt validates the meta pages on open but trusts the freelist,
	// and panics on a damaged one; a damaged file must be an error the
	// operator can read, not a crash loop.
	defer func() {
		if r := recover(); r != nil {
			db, err = nil, fmt.Errorf("boltstore.Open: %s: %w: %v", path, ErrCorrupt, r)
		}
	}()
	// NoFreelistSync: the free-page list is not written at every commit
	// but rebuilt from the pages when the file is opened. A commit then
	// writes one or two pages fewer, each at its own place in the file,
	// and on a virtual disk each scattered page lengthens the sync that
	// every webhook answer waits for. Files written either way open
	// either way.
	db, err = bolt.Open(path, 0o600, &bolt.Options{Timeout: opts.Timeout, NoSync: opts.NoSync, NoFreelistSync: true})
	switch {
	case err == nil:
		return db, nil
	case errors.Is(err, bolterrors.ErrTimeout):
		return nil, fmt.Errorf("boltstore.Open: %s (waited %v): %w: %w", path, opts.Timeout, ErrLocked, err)
	case errors.Is(err, bolterrors.ErrInvalid), errors.Is(err, bolterrors.ErrChecksum),
		errors.Is(err, bolterrors.ErrVersionMismatch), errors.Is(err, bolterrors.ErrInvalidMapping):
		return nil, fmt.Errorf("boltstore.Open: %s: %w: %w", path, ErrCorrupt, err)
	default:
		// bbolt reports a file too short to hold its meta pages with an
		// unexported error; it is damage too, but os errors (permission)
		// are not, so tell them apart.
		var pe *os.PathError
		if errors.As(err, &pe) {
			return nil, fmt.Errorf("boltstore.Open: %w", err)
		}
		return nil, fmt.Errorf("boltstore.Open: %s: %w: %w", path, ErrCorrupt, err)
	}
}

// init creates the buckets of a new file, or checks the schema version of
// an existing one.
func (s *Store) init() error {
	return s.db.Update(func(tx *bolt.Tx) error {
		meta := tx.Bucket(bMeta)
		if meta == nil {
			// A file with buckets but no meta was written by something
			// else; adding ours beside them would hide the mistake.
			if err := tx.ForEach(func(name []byte, _ *bolt.Bucket) error {
				return fmt.Errorf("%w: unknown bucket %q and no schema version", ErrCorrupt, name)
			}); err != nil {
				return err
			}
			for _, name := range allBuckets {
				if _, err := tx.CreateBucket(name); err != nil {
					return fmt.Errorf("create bucket %s: %w", name, err)
				}
			}
			return tx.Bucket(bMeta).Put(kSchema, u64(schemaVersion))
		}
		v := meta.Get(kSchema)
		if len(v) != 8 {
			return fmt.Errorf("%w: schema version missing", ErrCorrupt)
		}
		version := binary.BigEndian.Uint64(v)
		if version > schemaVersion {
			return fmt.Errorf("%w: file has version %d, this build knows up to %d", ErrNewerSchema, version, schemaVersion)
		}
		return migrate(tx, version)
	})
}

// migrate brings a file of an older schema version up to date; the check
// that every bucket exists then catches a file damaged by hand.
//
// Version 2 adds the owner index of inputs, built here from the inputs.
// Version 4 creates the time-ordered input bucket and version 5 the place
// index; each records the new version at once, so that an older build
// refuses the file from then on. moveInputs then moves the inputs of
// schema 3 into their rows, and movePlaces the indexes of schema 4 into
// places, in batches (a large store's move does not have to fit one
// transaction, and a move cut short resumes at the next Open).
func migrate(tx *bolt.Tx, from uint64) error {
	if from < 4 && tx.Bucket(bOldInputs) == nil {
		return fmt.Errorf("%w: schema %d without its bucket %s", ErrCorrupt, from, bOldInputs)
	}
	if from < 2 {
		owner, err := tx.CreateBucketIfNotExists(bOldInputOwner)
		if err != nil {
			return fmt.Errorf("migrate to schema 2: %w", err)
		}
		if err := tx.Bucket(bOldInputs).ForEach(func(k, _ []byte) error {
			i := bytes.IndexByte(k, sep)
			if i < 0 {
				return fmt.Errorf("%w: input key without a subject", ErrCorrupt)
			}
			return owner.Put(bytes.Clone(k[i+1:]), bytes.Clone(k[:i]))
		}); err != nil {
			return fmt.Errorf("migrate to schema 2: %w", err)
		}
		if err := tx.Bucket(bMeta).Put(kSchema, u64(2)); err != nil {
			return fmt.Errorf("migrate to schema 2: %w", err)
		}
	}
	if from < 3 {
		for _, name := range [][]byte{bResults, bResultsByTime, bLedgerVersions, bLedgerExpiry} {
			if _, err := tx.CreateBucketIfNotExists(name); err != nil {
				return fmt.Errorf("migrate to schema 3: %w", err)
			}
		}
		expiry := tx.Bucket(bLedgerExpiry)
		if err := tx.Bucket(bLedger).ForEach(func(k, v []byte) error {
			en, err := decodeEntry(string(k), v)
			if err != nil {
				return err
			}
			return expiry.Put(ledgerExpiryKey(en), nil)
		}); err != nil {
			return fmt.Errorf("migrate to schema 3: %w", err)
		}
		if err := tx.Bucket(bMeta).Put(kSchema, u64(3)); err != nil {
			return fmt.Errorf("migrate to schema 3: %w", err)
		}
	}
	if from < 4 {
		if _, err := tx.CreateBucketIfNotExists(bInputRows); err != nil {
			return fmt.Errorf("migrate to schema 4: %w", err)
		}
		if err := tx.Bucket(bMeta).Put(kSchema, u64(4)); err != nil {
			return fmt.Errorf("migrate to schema 4: %w", err)
		}
	}
	if from == 4 && (tx.Bucket(bOldInputAt) == nil || tx.Bucket(bOldInputOwner) == nil) {
		return fmt.Errorf("%w: schema 4 without its input indexes", ErrCorrupt)
	}
	if from < 5 {
		if _, err := tx.CreateBucketIfNotExists(bInputPlace); err != nil {
			return fmt.Errorf("migrate to schema 5: %w", err)
		}
		if err := tx.Bucket(bMeta).Put(kSchema, u64(5)); err != nil {
			return fmt.Errorf("migrate to schema 5: %w", err)
		}
	}
	if from < 6 {
		// Schema 6 adds an end to dirty marks (store.Dirty.Until); a mark
		// of an earlier schema reads as one with no end, so nothing is
		// rewritten, but an older build must not read the marks of this
		// one.
		if err := tx.Bucket(bMeta).Put(kSchema, u64(6)); err != nil {
			return fmt.Errorf("migrate to schema 6: %w", err)
		}
	}
	for _, name := range allBuckets {
		if tx.Bucket(name) == nil {
			return fmt.Errorf("%w: bucket %s missing", ErrCorrupt, name)
		}
	}
	return nil
}

// Close releases the file. It waits for transactions in progress.
func (s *Store) Close() error {
	// The clears held back are written now; losing them would only cost
	// evaluations after the next start, so a failure here does not stop
	// the close.
	ferr := s.flushClears()
	if err := s.db.Close(); err != nil {
		return fmt.Errorf("boltstore.Close: %w", err)
	}
	if ferr != nil {
		return fmt.Errorf("boltstore.Close: %w", ferr)
	}
	return nil
}

// Exclusive reports true: one process holds the file at a time.
func (s *Store) Exclusive() bool { return true }

// update runs fn in a read-write transaction after checking ctx, and
// prefixes errors with the operation name.
func (s *Store) update(ctx context.Context, op string, fn func(tx *bolt.Tx) error) error {
	if err := ctx.Err(); err != nil {
		return fmt.Errorf("boltstore.%s: %w", op, err)
	}
	// A transaction of its own, not merged with others, but started (held
	// clears) and counted as the group's are.
	s.group.counts.calls.Add(1)
	if err := s.group.update(fn); err != nil {
		return fmt.Errorf("boltstore.%s: %w", op, err)
	}
	return nil
}

// CommitStats is store.Committer: every read-write transaction after Open
// counts, the merged ones of the webhook and the evaluations and the
// store's own (pruning, say), each from when it holds bbolt's writer.
func (s *Store) CommitStats() store.CommitStats { return s.group.counts.stats() }

// batch is update for transactions that may be merged with concurrent
// ones into a single commit (see groupCommit): one fsync then covers many
// webhook requests, which is what lets ingest keep up with a busy feed.
// fn may run more than once, so it must leave nothing behind outside the
// transaction but what it recomputes on every run. The held clears are
// written once per merged transaction (groupCommit.begin).
func (s *Store) batch(ctx context.Context, op string, fn func(tx *bolt.Tx) error) error {
	if err := ctx.Err(); err != nil {
		return fmt.Errorf("boltstore.%s: %w", op, err)
	}
	if err := s.group.do(fn); err != nil {
		return fmt.Errorf("boltstore.%s: %w", op, err)
	}
	return nil
}

func (s *Store) view(ctx context.Context, op string, fn func(tx *bolt.Tx) error) error {
	if err := ctx.Err(); err != nil {
		return fmt.Errorf("boltstore.%s: %w", op, err)
	}
	if err := s.db.View(fn); err != nil {
		return fmt.Errorf("boltstore.%s: %w", op, err)
	}
	return nil
}

func getU64(b *bolt.Bucket, k []byte) uint64 {
	v := b.Get(k)
	if len(v) != 8 {
		return 0
	}
	return binary.BigEndian.Uint64(v)
}

// addCounter changes a Stats counter; it never goes below zero so that a
// bug elsewhere shows as a wrong count, not as a huge one.
func addCounter(tx *bolt.Tx, k []byte, delta int) error {
	meta := tx.Bucket(bMeta)
	n := int64(getU64(meta, k)) + int64(delta)
	if n < 0 {
		n = 0
	}
	return meta.Put(k, u64(uint64(n)))
}

func checkSubject(subject string) error {
	if subject == "" {
		return errors.New("empty subject")
	}
	if subject == keptSubject {
		return errors.New("subject reserved for kept versions")
	}
	for i := range len(subject) {
		if subject[i] == sep {
			return errors.New("subject contains a NUL byte")
		}
	}
	return nil
}

func checkLimit(limit int) error {
	if limit <= 0 {
		return fmt.Errorf("limit %d: must be positive", limit)
	}
	return nil
}

// notFound names the kind of record only: errors reach logs, and subjects,
// references and series identify patients.
func notFound(what string) error { return fmt.Errorf("%s: %w", what, store.ErrNotFound) }
