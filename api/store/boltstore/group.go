package boltstore

import (
	"fmt"
	"sync"
	"sync/atomic"
	"time"

	bolt "go.etcd.io/bbolt"

	"github.com/deadspace-fhir/deadspace/api/store"
)

// groupCommit merges concurrent write calls into one bbolt transaction and
// one fsync (group commit). Unlike bbolt's DB.Batch it waits for no timer:
// a call that finds no commit running starts one at once, and the calls
// that arrive while a commit runs go together into the next one. A lone
// request therefore pays one commit, not a batch delay plus a commit, and
// a burst shares fsyncs in proportion to its size. Every caller still
// returns only after its own changes are durable.
type groupCommit struct {
	db *bolt.DB
	// begin, when set, runs first in every transaction the group commits,
	// once for all its calls; the function it returns runs once that
	// transaction is committed. The store writes its held clears there
	// (pendingClears), which a call-by-call start would read again, once
	// per call.
	begin func(*bolt.Tx) (committed func(), err error)
	// counts is the committer's work (store.CommitStats), which the
	// store's other read-write transactions add to: bbolt runs one at a
	// time, so they wait for the same writer.
	counts commitCounts

	mu      sync.Mutex
	queue   []*groupCall
	running bool
}

type groupCall struct {
	fn   func(*bolt.Tx) error
	done chan error
}

// do runs fn in a transaction shared with the calls queued beside it and
// returns when that transaction is committed, or with fn's own error. fn
// may run more than once (when another call of its group fails, the group
// is rolled back and run again without it), so it must leave nothing
// behind outside the transaction but what it recomputes on every run.
func (g *groupCommit) do(fn func(*bolt.Tx) error) error {
	c := &groupCall{fn: fn, done: make(chan error, 1)}
	g.mu.Lock()
	g.queue = append(g.queue, c)
	if !g.running {
		g.running = true
		go g.loop()
	}
	g.mu.Unlock()
	return <-c.done
}

// loop commits what is queued, group after group, until the queue is
// empty.
func (g *groupCommit) loop() {
	for {
		g.mu.Lock()
		calls := g.queue
		g.queue = nil
		if len(calls) == 0 {
			g.running = false
			g.mu.Unlock()
			return
		}
		g.mu.Unlock()
		g.counts.calls.Add(uint64(len(calls)))
		g.commit(calls)
	}
}

// commit runs calls in one transaction. A call that fails is taken out
// and run alone, so that its error is its own and the others are not
// lost; the rest are run again together.
func (g *groupCommit) commit(calls []*groupCall) {
	for len(calls) > 0 {
		failed := -1
		err := g.update(func(tx *bolt.Tx) error {
			for i, c := range calls {
				if err := safeCall(c.fn, tx); err != nil {
					failed = i
					return err
				}
			}
			return nil
		})
		if failed < 0 || len(calls) == 1 {
			// Committed, or the commit itself failed: the same answer for
			// every call in the group.
			for _, c := range calls {
				c.done <- err
			}
			return
		}
		bad := calls[failed]
		calls = append(calls[:failed:failed], calls[failed+1:]...)
		bad.done <- g.update(func(tx *bolt.Tx) error { return safeCall(bad.fn, tx) })
	}
}

// update runs fn in a read-write transaction that begin starts.
func (g *groupCommit) update(fn func(*bolt.Tx) error) error {
	var committed func()
	var start time.Time
	defer func() { g.counts.transaction(start) }()
	err := g.db.Update(func(tx *bolt.Tx) error {
		start = time.Now() // the writer is this transaction's from here
		committed = nil
		if g.begin != nil {
			var err error
			if committed, err = g.begin(tx); err != nil {
				return err
			}
		}
		return fn(tx)
	})
	if err == nil && committed != nil {
		committed()
	}
	return err
}

// commitCounts are store.CommitStats, counted as the committer works.
type commitCounts struct {
	transactions, calls, busy atomic.Uint64
}

// transaction counts a transaction that began at start and ends now
// (none when it never began: zero start).
func (c *commitCounts) transaction(start time.Time) {
	if start.IsZero() {
		return
	}
	c.transactions.Add(1)
	c.busy.Add(uint64(time.Since(start)))
}

func (c *commitCounts) stats() store.CommitStats {
	return store.CommitStats{Transactions: c.transactions.Load(), Calls: c.calls.Load(), Busy: time.Duration(c.busy.Load())}
}

// safeCall turns a panic in fn into an error for its caller: fn runs on
// the committer's goroutine, where a panic would otherwise end the process
// instead of the one request.
func safeCall(fn func(*bolt.Tx) error, tx *bolt.Tx) (err error) {
	defer func() {
		if r := recover(); r != nil {
			err = fmt.Errorf("panic in a batched transaction: %v", r)
		}
	}()
	return fn(tx)
}
