package boltstore

import (
	"context"
	"encoding/binary"
	"errors"
	"fmt"
	"log/slog"
	"slices"
	"sync"
	"time"

	bolt "go.etcd.io/bbolt"

	"github.com/deadspace-fhir/deadspace/api/store"
)

// The intake is a second bbolt file beside the store's, holding the
// notifications that were answered but not yet applied to the store.
//
// Why: a notification's inputs land on random pages of three indexes in
// the main file (rows, input_at, input_owner), about six pages a reading,
// and the sender waits for them to be written and synced. Measured on the
// webhook benchmark, the main file's single writer was busy nearly all
// the time at about 3,000 notifications a second, and the syncs of
// scattered pages cost about two and a half times as much as appended
// ones (32 pages and two fdatasyncs: 1.5 ms against 0.64 ms here). The
// intake appends each notification as one record (its pages are the last
// ones of one bucket), so the sender waits only for an append, and an
// applier moves the records into the main file in large transactions,
// where readings of one patient share pages.
//
// What holds:
//   - A notification is durable when PutNotified returns: its record is
//     committed and synced in the intake file, in one transaction with the
//     subscription's event counter, which therefore lives in the intake
//     (the counter is never ahead of the inputs, as the store contract
//     asks).
//   - The main file's meta records the highest sequence applied, in the
//     same transaction as the inputs it applied, so a record is applied
//     once: at Open the records after it are applied again before
//     anything else reads the store (a crash between the two files'
//     commits leaves records that are applied then, or were applied and
//     are only deleted then).
//   - Reads see what is applied: a notification's inputs, and its
//     patient's dirty mark, appear together once applied, at most
//     DefaultIntakeDelay after the answer (at once for a blood gas). The
//     evaluation reads without waiting, because applying wakes it again.
//     Settle waits until everything answered before it is applied (the
//     engine settles before reads that answer a person), and so does
//     Stats, so that work answered but not applied never reads as quiet.
//   - PutNotified cannot say what the store did with each input before it
//     is applied: its results are nil, and the results reach the function
//     given to OnApplied, in journal order, before Settle returns. Records
//     applied at Open, after a crash, are applied before that function is
//     set: their results are not counted.
//   - A record that cannot be applied (the main file fails) stays in the
//     intake; the applier retries with back-off, and Settle and Stats
//     return the error meanwhile, so readiness reports it.
//
// Layout of the intake file:
//
//	meta            "schema" → n
//	entries         n(sequence) → record: now, then each input in full
//	subscriptions   subscription → n(highest event number)
var (
	iEntries = []byte("entries")
	// kApplied, in the main file's meta, is the highest intake sequence
	// applied.
	kApplied = []byte("intake_applied")
)

// IntakePath is the intake file of the store file at path. It belongs to
// the store: copy, move or delete the two together.
func IntakePath(path string) string { return path + ".intake" }

// intakeSchema is the intake file's layout version.
const intakeSchema = 1

// applyBatch bounds one applier transaction: large enough that readings
// of one patient share pages, small enough that a transaction stays short
// beside the evaluations' commits.
const (
	applyBatchRecords = 2048
	applyBatchBytes   = 8 << 20
)

type intake struct {
	db    *bolt.DB
	group *groupCommit
	main  *Store
	log   *slog.Logger

	mu        sync.Mutex
	journaled uint64        // highest sequence committed in the intake
	applied   uint64        // highest sequence applied to the main file
	progress  chan struct{} // closed and replaced at each apply
	failure   error         // the applier's error, until it applies again
	onApplied func([]store.PutResult)

	delay time.Duration // how long records wait to be applied together
	wake  chan struct{} // something was journaled
	now   chan struct{} // apply without waiting: a blood gas, or a reader waits (Settle)
	stop  chan struct{}
	done  chan struct{}

	closeOnce sync.Once
	closeErr  error
}

// openIntake opens or creates the intake file beside the main one and
// applies what an earlier process journaled but did not apply.
func openIntake(path string, main *Store, opts Options, log *slog.Logger) (*intake, error) {
	db, err := openDB(path, opts)
	if err != nil {
		return nil, err
	}
	in := &intake{
		db: db, group: &groupCommit{db: db}, main: main, log: log,
		progress: make(chan struct{}),
		delay:    opts.IntakeDelay,
		wake:     make(chan struct{}, 1), now: make(chan struct{}, 1), stop: make(chan struct{}), done: make(chan struct{}),
	}
	if err := in.init(); err != nil {
		_ = db.Close()
		return nil, fmt.Errorf("intake %s: %w", path, err)
	}
	if err := in.recover(); err != nil {
		_ = db.Close()
		return nil, fmt.Errorf("intake %s: %w", path, err)
	}
	go in.run()
	return in, nil
}

// init creates the buckets, and carries the event counters a schema 4
// store kept in its main file over into the intake, where they live now.
func (in *intake) init() error {
	var applied uint64
	counters := map[string]uint64{}
	if err := in.main.db.View(func(tx *bolt.Tx) error {
		applied = getU64(tx.Bucket(bMeta), kApplied)
		return tx.Bucket(bSubs).ForEach(func(k, v []byte) error {
			if len(v) != 8 {
				return fmt.Errorf("%w: event counter of %d bytes", ErrCorrupt, len(v))
			}
			counters[string(k)] = binary.BigEndian.Uint64(v)
			return nil
		})
	}); err != nil {
		return err
	}
	return in.db.Update(func(tx *bolt.Tx) error {
		meta, err := tx.CreateBucketIfNotExists(bMeta)
		if err != nil {
			return err
		}
		if v := meta.Get(kSchema); v == nil {
			if err := meta.Put(kSchema, u64(intakeSchema)); err != nil {
				return err
			}
		} else if len(v) != 8 {
			return fmt.Errorf("%w: intake schema version missing", ErrCorrupt)
		} else if got := binary.BigEndian.Uint64(v); got > intakeSchema {
			return fmt.Errorf("%w: intake has version %d, this build knows up to %d", ErrNewerSchema, got, intakeSchema)
		}
		entries, err := tx.CreateBucketIfNotExists(iEntries)
		if err != nil {
			return err
		}
		// An intake file lost or replaced must not hand out sequences the
		// main file counts as applied.
		if entries.Sequence() < applied {
			if err := entries.SetSequence(applied); err != nil {
				return err
			}
		}
		subs, err := tx.CreateBucketIfNotExists(bSubs)
		if err != nil {
			return err
		}
		for sub, n := range counters {
			if n > getU64(subs, []byte(sub)) {
				if err := subs.Put([]byte(sub), u64(n)); err != nil {
					return err
				}
			}
		}
		return nil
	})
}

// recover applies every record after the main file's applied sequence,
// with progress lines when there are many, and deletes those applied.
func (in *intake) recover() error {
	var applied, last uint64
	if err := in.main.db.View(func(tx *bolt.Tx) error {
		applied = getU64(tx.Bucket(bMeta), kApplied)
		return nil
	}); err != nil {
		return err
	}
	if err := in.db.View(func(tx *bolt.Tx) error {
		last = tx.Bucket(iEntries).Sequence()
		return nil
	}); err != nil {
		return err
	}
	in.applied, in.journaled = applied, max(applied, last)
	start := time.Now()
	for in.applied < in.journaled {
		n, err := in.applyNext()
		if err != nil {
			return fmt.Errorf("apply records left by the last run: %w", err)
		}
		if n == 0 {
			break // sequences handed out by transactions that failed
		}
		if time.Since(start) > 2*time.Second {
			in.log.Info("store: applying notifications received before the restart", "applied", in.applied, "of", in.journaled)
		}
	}
	in.applied = in.journaled
	return in.deleteApplied()
}

// put journals inputs with the subscription's event number and returns
// the number it replaces. The record and the counter are one transaction.
func (in *intake) put(inputs []store.Input, now time.Time, subscription string, number uint64) (uint64, error) {
	var rec []byte
	if len(inputs) > 0 {
		rec = encodeIntakeRecord(now, inputs)
	}
	var seq, prev uint64
	err := in.group.do(func(tx *bolt.Tx) error {
		seq = 0
		if rec != nil {
			b := tx.Bucket(iEntries)
			var err error
			if seq, err = b.NextSequence(); err != nil {
				return fmt.Errorf("intake sequence: %w", err)
			}
			if err := b.Put(u64(seq), rec); err != nil {
				return err
			}
		}
		var err error
		prev, err = seenEvent(tx, subscription, number)
		return err
	})
	if err != nil {
		return 0, err
	}
	if seq > 0 {
		in.mu.Lock()
		in.journaled = max(in.journaled, seq)
		in.mu.Unlock()
		// A blood gas is applied at once, with whatever waits beside it:
		// its derived values are what clinicians wait for. Device readings
		// wait for the delay to gather more.
		if slices.ContainsFunc(inputs, func(it store.Input) bool { return it.Urgent }) {
			poke(in.now)
		} else {
			poke(in.wake)
		}
	}
	return prev, nil
}

// seen raises a subscription's counter alone.
func (in *intake) seen(subscription string, number uint64) (uint64, error) {
	return in.put(nil, time.Time{}, subscription, number)
}

// await returns once every record journaled before the call is applied.
func (in *intake) await(ctx context.Context) error {
	in.mu.Lock()
	target := in.journaled
	for in.applied < target {
		if in.failure != nil {
			err := in.failure
			in.mu.Unlock()
			return fmt.Errorf("notifications received but not yet stored: %w", err)
		}
		ch := in.progress
		in.mu.Unlock()
		poke(in.now)
		select {
		case <-ch:
		case <-ctx.Done():
			return ctx.Err()
		}
		in.mu.Lock()
	}
	in.mu.Unlock()
	return nil
}

// run applies records as they come, until close.
func (in *intake) run() {
	defer close(in.done)
	retry := time.Duration(0)
	for {
		in.mu.Lock()
		behind := in.applied < in.journaled
		in.mu.Unlock()
		if !behind {
			select {
			case <-in.wake:
			case <-in.now:
			case <-in.stop:
				return
			}
			continue
		}
		if in.delay > 0 {
			// Let the records of the next few milliseconds join these:
			// readings of one patient then share their pages.
			t := time.NewTimer(in.delay)
			select {
			case <-t.C:
			case <-in.now:
			case <-in.stop:
				t.Stop()
				return
			}
			t.Stop()
		}
		if _, err := in.applyNext(); err != nil {
			in.mu.Lock()
			in.failure = err
			ch := in.progress
			in.progress = make(chan struct{})
			in.mu.Unlock()
			close(ch)
			in.log.Error("store: applying received notifications failed; retrying", "err", err)
			retry = min(max(2*retry, 100*time.Millisecond), 5*time.Second)
			select {
			case <-time.After(retry):
			case <-in.stop:
				return
			}
			continue
		}
		retry = 0
		if err := in.deleteApplied(); err != nil {
			in.log.Error("store: clearing applied notifications from the intake failed", "err", err)
		}

	}
}

// applyNext applies the next batch of records to the main file and
// returns how many it applied.
func (in *intake) applyNext() (int, error) {
	in.mu.Lock()
	from := in.applied
	in.mu.Unlock()
	type record struct {
		seq    uint64
		now    time.Time
		inputs []store.Input
	}
	var recs []record
	size := 0
	if err := in.db.View(func(tx *bolt.Tx) error {
		c := tx.Bucket(iEntries).Cursor()
		for k, v := c.Seek(u64(from + 1)); k != nil && len(recs) < applyBatchRecords && size < applyBatchBytes; k, v = c.Next() {
			now, inputs, err := decodeIntakeRecord(v)
			if err != nil {
				return fmt.Errorf("record %d: %w", binary.BigEndian.Uint64(k), err)
			}
			recs = append(recs, record{binary.BigEndian.Uint64(k), now, inputs})
			size += len(v)
		}
		return nil
	}); err != nil {
		return 0, err
	}
	if len(recs) == 0 {
		return 0, nil
	}
	results := make([][]store.PutResult, len(recs))
	last := recs[len(recs)-1].seq
	err := in.main.batch(context.Background(), "applyIntake", func(tx *bolt.Tx) error {
		for i, r := range recs {
			results[i] = make([]store.PutResult, len(r.inputs))
			if err := putInputs(tx, r.inputs, r.now, results[i]); err != nil {
				return fmt.Errorf("record %d: %w", r.seq, err)
			}
		}
		return tx.Bucket(bMeta).Put(kApplied, u64(last))
	})
	if err != nil {
		return 0, err
	}
	in.mu.Lock()
	hook := in.onApplied
	in.mu.Unlock()
	if hook != nil {
		for _, res := range results {
			hook(res)
		}
	}
	in.mu.Lock()
	in.applied, in.failure = last, nil
	ch := in.progress
	in.progress = make(chan struct{})
	in.mu.Unlock()
	close(ch)
	return len(recs), nil
}

// deleteApplied removes applied records from the intake, in a
// transaction shared with the journal's.
func (in *intake) deleteApplied() error {
	in.mu.Lock()
	applied := in.applied
	in.mu.Unlock()
	return in.group.do(func(tx *bolt.Tx) error {
		c := tx.Bucket(iEntries).Cursor()
		for k, _ := c.First(); k != nil && binary.BigEndian.Uint64(k) <= applied; k, _ = c.First() {
			if err := c.Delete(); err != nil {
				return err
			}
		}
		return nil
	})
}

// close applies what is left, stops the applier and closes the file.
func (in *intake) close() error {
	in.closeOnce.Do(func() { in.closeErr = in.closeNow() })
	return in.closeErr
}

func (in *intake) closeNow() error {
	close(in.stop)
	<-in.done
	var err error
	for {
		in.mu.Lock()
		behind := in.applied < in.journaled
		in.mu.Unlock()
		if !behind {
			break
		}
		n, aerr := in.applyNext()
		if aerr != nil {
			err = aerr
			break
		}
		if n == 0 {
			break
		}
	}
	if err == nil {
		err = in.deleteApplied()
	}
	return errors.Join(err, in.db.Close())
}

// Intake records: now, the number of inputs, then each input with every
// field of store.Input.
const (
	flagOnlyReplaces = 1 << iota
	flagUrgent
)

func encodeIntakeRecord(now time.Time, inputs []store.Input) []byte {
	size := 16
	for _, it := range inputs {
		size += 64 + len(it.Subject) + len(it.Logical) + len(it.VersionID) + len(it.Payload) + len(it.Withdrawal)
	}
	e := encoder{b: make([]byte, 0, size)}
	e.time(now)
	e.uvarint(uint64(len(inputs)))
	for _, it := range inputs {
		e.str(it.Subject)
		e.str(it.Logical)
		e.str(it.VersionID)
		e.time(it.LastUpdated)
		e.time(it.EffectiveAt)
		var flags uint64
		if it.OnlyReplaces {
			flags |= flagOnlyReplaces
		}
		if it.Urgent {
			flags |= flagUrgent
		}
		e.uvarint(flags)
		e.time(it.ChangedAt)
		e.varint(int64(it.Reach))
		e.str(string(it.Withdrawal))
		e.str(string(it.Payload))
	}
	return e.b
}

// decodeIntakeRecord copies what it returns: v is valid only inside its
// transaction.
func decodeIntakeRecord(v []byte) (time.Time, []store.Input, error) {
	d := decoder{b: v}
	now := d.time()
	n := d.uvarint()
	// Every input takes more than one byte.
	if n > uint64(len(d.b)) {
		d.fail()
	}
	var inputs []store.Input
	if d.err == nil {
		inputs = make([]store.Input, 0, n)
	}
	for i := uint64(0); i < n && d.err == nil; i++ {
		var it store.Input
		it.Subject = d.str()
		it.Logical = d.str()
		it.VersionID = d.str()
		it.LastUpdated = d.time()
		it.EffectiveAt = d.time()
		flags := d.uvarint()
		it.OnlyReplaces = flags&flagOnlyReplaces != 0
		it.Urgent = flags&flagUrgent != 0
		it.ChangedAt = d.time()
		it.Reach = time.Duration(d.varint())
		if w := d.bytes(); len(w) > 0 {
			it.Withdrawal = append([]byte(nil), w...)
		}
		if p := d.bytes(); len(p) > 0 {
			it.Payload = append([]byte(nil), p...)
		}
		inputs = append(inputs, it)
	}
	if len(d.b) != 0 && d.err == nil {
		d.fail()
	}
	return now, inputs, d.done("intake record")
}

func poke(ch chan struct{}) {
	select {
	case ch <- struct{}{}:
	default:
	}
}
