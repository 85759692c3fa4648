package boltstore

import (
	"bytes"
	"context"
	"errors"
	"fmt"
	"log/slog"
	"slices"
	"sync"
	"time"

	bolt "go.etcd.io/bbolt"

	"github.com/deadspace-fhir/deadspace/api/store"
)

// The intake is a journal file beside the store's (journal.go), holding
// the notifications that were answered but not yet applied to the store.
//
// Why: a notification's inputs land on random pages of three indexes in
// the main file (rows, input_at, input_owner), about six pages a reading,
// and the sender waited for them to be written and synced. Measured on the
// webhook benchmark, the main file's single writer was busy nearly all
// the time at about 3,000 notifications a second, and the syncs of
// scattered pages cost about two and a half times as much as appended
// ones (32 pages and two fdatasyncs: 1.5 ms against 0.64 ms here); on this
// kind of virtual disk a sync also costs CPU. The intake appends each
// notification as one record, the records of the senders waiting together
// written and synced at once (one fdatasync), so the sender waits only for
// an append, and an applier moves the records into the main file in large
// transactions, where readings of one patient share pages.
//
// What holds:
//   - A notification is durable when PutNotified returns: its record, with
//     the subscription's event number, is written and synced, and so is
//     every record before it. The event counters are kept in memory in
//     the order the records are written, so the previous number a call
//     answers is the one durable before its record; a write that fails
//     stops the intake (every call fails from then on, until a restart
//     reads the file again), so no caller ever sees a counter ahead of
//     the inputs. The applier writes the counters into the main file with
//     the inputs.
//   - The main file's meta records the highest sequence applied, in the
//     same transaction as the inputs it applied, so a record is applied
//     once: at Open the records after it are applied before anything else
//     reads the store.
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
//     return the error meanwhile, so readiness reports it. At most
//     maxPending records wait; beyond that PutNotified fails, and the
//     sender retries later.

// kApplied, in the main file's meta, is the highest intake sequence
// applied.
var kApplied = []byte("intake_applied")

// IntakePath is the intake file of the store file at path. It belongs to
// the store: copy, move or delete the two together.
func IntakePath(path string) string { return path + ".intake" }

// applyBatch bounds one applier transaction: large enough that readings
// of one patient share pages, small enough that a transaction stays short
// beside the evaluations' commits.
const (
	applyBatchRecords = 2048
	applyBatchBytes   = 8 << 20
	// maxPending bounds the records written but not applied (in memory
	// and in the file) while the main file cannot take them.
	maxPending = 200_000
	// reuseAfter is how large the file may grow before it is started
	// again from its beginning, once everything in it is applied.
	reuseAfter = 16 << 20
)

// ErrIntakeFull means too many notifications wait to be applied: the main
// file is failing or far behind. The caller answers so that the sender
// retries later.
var ErrIntakeFull = errors.New("boltstore: too many notifications wait to be applied")

// intakeRecord is one notification: the inputs and the event number.
type intakeRecord struct {
	seq          uint64
	subscription string
	number       uint64
	now          time.Time
	inputs       []store.Input
	size         int
}

type intake struct {
	j     *journal
	main  *Store
	log   *slog.Logger
	delay time.Duration // how long records wait to be applied together

	mu        sync.Mutex
	next      uint64            // the next record's sequence
	counters  map[string]uint64 // highest event number per subscription
	framed    []byte            // records not yet written
	unwritten []intakeRecord    // the same, decoded
	durable   uint64            // highest sequence written and synced
	written   chan struct{}     // closed and replaced at each write
	broken    error             // a write failed: the intake takes nothing more
	closed    bool
	queue     []intakeRecord // durable, not applied, in order
	applied   uint64         // highest sequence applied to the main file
	progress  chan struct{}  // closed and replaced at each apply
	failure   error          // the applier's error, until it applies again
	hurry     bool           // apply without waiting: a blood gas, or a reader waits
	onApplied func([]store.PutResult)

	writeNow chan struct{} // records wait to be written, or the file may be reused
	wake     chan struct{} // something was journaled
	now      chan struct{} // apply without waiting: a blood gas, or a reader waits (Settle)
	stop     chan struct{} // stops the applier
	done     chan struct{}
	wstop    chan struct{} // stops the writer, once it has written what waits
	wdone    chan struct{}

	closeOnce sync.Once
	closeErr  error
}

// openIntake opens or creates the intake file beside the main one and
// applies what an earlier process journaled but did not apply.
func openIntake(path string, main *Store, opts Options, log *slog.Logger) (*intake, error) {
	j, recs, err := openJournal(path, opts.NoSync)
	if err != nil {
		return nil, fmt.Errorf("intake: %w", err)
	}
	in := &intake{
		j: j, main: main, log: log, delay: opts.IntakeDelay,
		counters: map[string]uint64{}, written: make(chan struct{}), progress: make(chan struct{}),
		writeNow: make(chan struct{}, 1), wake: make(chan struct{}, 1), now: make(chan struct{}, 1),
		stop: make(chan struct{}), done: make(chan struct{}), wstop: make(chan struct{}), wdone: make(chan struct{}),
	}
	if err := in.recover(recs); err != nil {
		_ = j.close()
		return nil, fmt.Errorf("intake %s: %w", path, err)
	}
	go in.writer()
	go in.run()
	return in, nil
}

// recover reads the counters and the applied sequence from the main file,
// applies the records after it, with progress lines when there are many,
// and starts the file again from its beginning.
func (in *intake) recover(recs []scanned) error {
	if err := in.main.db.View(func(tx *bolt.Tx) error {
		in.applied = getU64(tx.Bucket(bMeta), kApplied)
		return tx.Bucket(bSubs).ForEach(func(k, v []byte) error {
			if len(v) != 8 {
				return fmt.Errorf("%w: event counter of %d bytes", ErrCorrupt, len(v))
			}
			in.counters[string(k)] = getU64(tx.Bucket(bSubs), k)
			return nil
		})
	}); err != nil {
		return err
	}
	last := in.applied
	for _, sc := range recs {
		if sc.seq <= in.applied {
			continue
		}
		rec, err := decodeJournalBody(sc.seq, sc.body)
		if err != nil {
			// The frame's checksum held, so this is no torn write: the
			// file holds what this build did not write.
			return fmt.Errorf("%w: record %d: %w", ErrCorrupt, sc.seq, err)
		}
		in.queue = append(in.queue, rec)
		in.counters[rec.subscription] = max(in.counters[rec.subscription], rec.number)
		last = sc.seq
	}
	if len(recs) > 0 {
		last = max(last, recs[len(recs)-1].seq)
	}
	in.durable, in.next = last, last+1
	start := time.Now()
	for len(in.queue) > 0 {
		if _, err := in.applyNext(); err != nil {
			return fmt.Errorf("apply records left by the last run: %w", err)
		}
		if time.Since(start) > 2*time.Second {
			in.log.Info("store: applying notifications received before the restart", "left", len(in.queue))
		}
	}
	in.j.reuse()
	return nil
}

// put journals inputs with the subscription's event number and returns
// the number it replaces, once the record is durable.
func (in *intake) put(inputs []store.Input, now time.Time, subscription string, number uint64) (uint64, error) {
	if subscription == "" {
		return 0, errors.New("empty subscription")
	}
	rest := encodeJournalRest(subscription, number, now, inputs)
	// The inputs wait in memory until applied; the caller may reuse its
	// buffers once answered.
	inputs = slices.Clone(inputs)
	for i := range inputs {
		inputs[i].Payload = bytes.Clone(inputs[i].Payload)
		inputs[i].Withdrawal = bytes.Clone(inputs[i].Withdrawal)
	}
	in.mu.Lock()
	switch {
	case in.broken != nil:
		in.mu.Unlock()
		return 0, fmt.Errorf("the intake stopped after a failed write: %w", in.broken)
	case in.closed:
		in.mu.Unlock()
		return 0, errors.New("the store is closed")
	case len(in.queue)+len(in.unwritten) >= maxPending:
		in.mu.Unlock()
		return 0, ErrIntakeFull
	}
	seq := in.next
	in.next++
	prev := in.counters[subscription]
	in.counters[subscription] = max(prev, number)
	body := appendUvarint(make([]byte, 0, 10+len(rest)), seq)
	in.framed = frame(in.framed, append(body, rest...))
	in.unwritten = append(in.unwritten, intakeRecord{seq: seq, subscription: subscription, number: number, now: now, inputs: inputs, size: len(rest)})
	poke(in.writeNow)
	for in.durable < seq && in.broken == nil {
		ch := in.written
		in.mu.Unlock()
		<-ch
		in.mu.Lock()
	}
	err := in.broken
	in.mu.Unlock()
	if err != nil {
		return 0, fmt.Errorf("the intake stopped after a failed write: %w", err)
	}
	return prev, nil
}

// seen raises a subscription's counter alone.
func (in *intake) seen(subscription string, number uint64) (uint64, error) {
	return in.put(nil, time.Time{}, subscription, number)
}

// writer writes what waits, the calls waiting together sharing one write
// and one sync, and starts the file again once everything in it is
// applied and it has grown.
func (in *intake) writer() {
	defer close(in.wdone)
	for {
		select {
		case <-in.writeNow:
		case <-in.wstop:
			in.writeWaiting()
			return
		}
		in.writeWaiting()
	}
}

func (in *intake) writeWaiting() {
	in.mu.Lock()
	if len(in.framed) == 0 {
		if in.applied == in.durable && in.j.off > reuseAfter {
			in.j.reuse()
		}
		in.mu.Unlock()
		return
	}
	b, recs := in.framed, in.unwritten
	in.framed, in.unwritten = nil, nil
	in.mu.Unlock()
	err := in.j.write(b)
	in.mu.Lock()
	if err != nil {
		in.broken = err
	} else {
		in.durable = recs[len(recs)-1].seq
		in.queue = append(in.queue, recs...)
	}
	ch := in.written
	in.written = make(chan struct{})
	in.mu.Unlock()
	close(ch)
	if err != nil {
		in.log.Error("store: writing the intake failed; notifications are refused until a restart", "err", err)
		return
	}
	// A blood gas is applied at once, with whatever waits beside it: its
	// derived values are what clinicians wait for. Device readings wait
	// for the delay to gather more.
	if slices.ContainsFunc(recs, func(r intakeRecord) bool {
		return slices.ContainsFunc(r.inputs, func(it store.Input) bool { return it.Urgent })
	}) {
		in.mu.Lock()
		in.hurry = true
		in.mu.Unlock()
		poke(in.now)
	} else {
		poke(in.wake)
	}
}

// await returns once every record answered before the call is applied.
func (in *intake) await(ctx context.Context) error {
	in.mu.Lock()
	target := in.durable
	for in.applied < target {
		if in.failure != nil {
			err := in.failure
			in.mu.Unlock()
			return fmt.Errorf("notifications received but not yet stored: %w", err)
		}
		ch := in.progress
		in.hurry = true
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
		behind, hurry := len(in.queue) > 0, in.hurry
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
		if in.delay > 0 && !hurry {
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
		// The file may be started again once everything is applied.
		poke(in.writeNow)
	}
}

// applyNext applies the next batch of records to the main file and
// returns how many it applied.
func (in *intake) applyNext() (int, error) {
	in.mu.Lock()
	n, size := 0, 0
	for n < len(in.queue) && n < applyBatchRecords && size < applyBatchBytes {
		size += in.queue[n].size
		n++
	}
	recs := in.queue[:n:n]
	in.hurry = false
	in.mu.Unlock()
	if n == 0 {
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
			if _, err := seenEvent(tx, r.subscription, r.number); err != nil {
				return fmt.Errorf("record %d: %w", r.seq, err)
			}
		}
		return tx.Bucket(bMeta).Put(kApplied, u64(last))
	})
	if err != nil {
		in.mu.Lock()
		in.failure = err
		ch := in.progress
		in.progress = make(chan struct{})
		in.mu.Unlock()
		close(ch)
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
	in.queue = in.queue[n:]
	in.applied, in.failure = last, nil
	ch := in.progress
	in.progress = make(chan struct{})
	in.mu.Unlock()
	close(ch)
	return n, nil
}

// close writes and applies what is left, stops the writer and the applier
// and closes the file. What cannot be applied stays in the file for the
// next Open.
func (in *intake) close() error {
	in.closeOnce.Do(func() { in.closeErr = in.closeNow() })
	return in.closeErr
}

func (in *intake) closeNow() error {
	in.mu.Lock()
	in.closed = true
	in.mu.Unlock()
	close(in.stop)
	<-in.done
	close(in.wstop)
	<-in.wdone
	var err error
	for {
		n, aerr := in.applyNext()
		if aerr != nil {
			err = aerr
			break
		}
		if n == 0 {
			break
		}
	}
	return errors.Join(err, in.j.close())
}

func poke(ch chan struct{}) {
	select {
	case ch <- struct{}{}:
	default:
	}
}

// A journal record's body: the sequence, the subscription and its event
// number, then the intake record (now and the inputs).
func encodeJournalRest(subscription string, number uint64, now time.Time, inputs []store.Input) []byte {
	rec := encodeIntakeRecord(now, inputs)
	e := encoder{b: make([]byte, 0, 16+len(subscription)+len(rec))}
	e.str(subscription)
	e.uvarint(number)
	e.rest(rec)
	return e.b
}

func appendUvarint(b []byte, v uint64) []byte {
	e := encoder{b: b}
	e.uvarint(v)
	return e.b
}

// decodeJournalBody reads what follows the sequence in a record's body.
func decodeJournalBody(seq uint64, b []byte) (intakeRecord, error) {
	d := decoder{b: b}
	sub := d.str()
	number := d.uvarint()
	if err := d.done("intake record"); err != nil {
		return intakeRecord{}, err
	}
	now, inputs, err := decodeIntakeRecord(d.b)
	if err != nil {
		return intakeRecord{}, err
	}
	if sub == "" {
		return intakeRecord{}, fmt.Errorf("intake record: %w: empty subscription", ErrCorrupt)
	}
	return intakeRecord{seq: seq, subscription: sub, number: number, now: now, inputs: inputs, size: len(b)}, nil
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
