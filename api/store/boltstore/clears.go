package boltstore

import (
	"context"
	"fmt"
	"maps"
	"sync"

	bolt "go.etcd.io/bbolt"

	"github.com/deadspace-fhir/deadspace/api/store"
)

// pendingClears are dirty marks cleared by evaluations that changed
// nothing: subject → the generation cleared. Such a commit writes nothing
// the service must not lose, so it does not pay for an fsync of its own:
// the clear is held here, hidden from DirtyPatients and Stats, and written
// by the next transaction that syncs anyway (or by Close). A crash before
// then loses only the clear, and the patient is evaluated once more,
// finding again that nothing changed.
//
// A held clear applies only while the stored mark still has its
// generation: a change that arrives after it gives the mark a newer
// generation (generations come from one sequence and never repeat), and
// the patient is dirty again.
type pendingClears struct {
	mu sync.Mutex
	m  map[string]uint64
}

// hide records a clear of the mark of subject at generation gen.
func (p *pendingClears) hide(subject string, gen uint64) {
	p.mu.Lock()
	defer p.mu.Unlock()
	if p.m == nil {
		p.m = make(map[string]uint64)
	}
	p.m[subject] = gen
}

// hidden reports whether the mark dt is cleared but not yet written.
func (p *pendingClears) hidden(dt store.Dirty) bool {
	p.mu.Lock()
	defer p.mu.Unlock()
	gen, ok := p.m[dt.Subject]
	return ok && gen == dt.Generation
}

func (p *pendingClears) snapshot() map[string]uint64 {
	p.mu.Lock()
	defer p.mu.Unlock()
	return maps.Clone(p.m)
}

// forget drops the clears a committed transaction wrote (or found stale),
// unless a newer clear of the same subject replaced one meanwhile.
func (p *pendingClears) forget(done map[string]uint64) {
	p.mu.Lock()
	defer p.mu.Unlock()
	for subject, gen := range done {
		if p.m[subject] == gen {
			delete(p.m, subject)
		}
	}
}

// apply writes the held clears in tx: each mark whose generation is still
// the one cleared is deleted. It returns the clears it settled, to forget
// once tx is committed. It runs first in every read-write transaction, so
// the transaction's own work (a new mark, say) sees the marks as cleared.
func (p *pendingClears) apply(tx *bolt.Tx) (map[string]uint64, error) {
	held := p.snapshot()
	if len(held) == 0 {
		return nil, nil
	}
	dirty := tx.Bucket(bDirty)
	for subject, gen := range held {
		v := dirty.Get([]byte(subject))
		if v == nil {
			continue
		}
		dt, err := decodeDirty(subject, v)
		if err != nil {
			return nil, err
		}
		if dt.Generation != gen {
			continue // stale: a newer change made the patient dirty again
		}
		if err := dirty.Delete([]byte(subject)); err != nil {
			return nil, err
		}
		if err := addCounter(tx, kDirtyN, -1); err != nil {
			return nil, err
		}
	}
	return held, nil
}

// begin writes the held clears at the start of a read-write transaction
// and returns what forgets them once it is committed.
func (p *pendingClears) begin(tx *bolt.Tx) (func(), error) {
	settled, err := p.apply(tx)
	if err != nil {
		return nil, err
	}
	return func() { p.forget(settled) }, nil
}

// emptyChange reports whether a commit only clears the dirty mark.
func emptyChange(c store.Change) bool {
	return len(c.Entries) == 0 && len(c.Results) == 0 && len(c.Writes) == 0 && len(c.Expect) == 0
}

// clearLater is Commit for an empty change: it reports true when the
// change is done (the mark was cleared, to be written later, or there was
// none), false when the mark has a newer generation and the caller must
// commit durably, which restarts the mark's Since.
func (s *Store) clearLater(ctx context.Context, change store.Change) (bool, error) {
	if err := checkSubject(change.Subject); err != nil {
		return false, fmt.Errorf("boltstore.Commit: %w", err)
	}
	done := false
	err := s.view(ctx, "Commit", func(tx *bolt.Tx) error {
		v := tx.Bucket(bDirty).Get([]byte(change.Subject))
		if v == nil {
			done = true
			return nil
		}
		dt, err := decodeDirty(change.Subject, v)
		if err != nil {
			return err
		}
		if dt.Generation == change.Generation {
			s.clears.hide(change.Subject, dt.Generation)
			done = true
		}
		return nil
	})
	return done, err
}

// flushClears writes the held clears in a transaction of their own.
func (s *Store) flushClears() error {
	if len(s.clears.snapshot()) == 0 {
		return nil
	}
	return s.update(context.Background(), "flushClears", func(*bolt.Tx) error { return nil })
}
