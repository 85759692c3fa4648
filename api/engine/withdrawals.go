package engine

import (
	"sync"

	"github.com/deadspace-fhir/deadspace/api/store"
)

// withdrawals are the patients whose new data withdrew a version they
// held: a deletion on the server, an entered-in-error or refused version,
// a re-coding. The settle delay gathers readings that arrive just after a
// blood gas; nothing that arrives late can change a withdrawal, so such a
// patient's next evaluation does not wait for it, and values derived from
// a deleted or withdrawn input are retracted within the device pace and a
// write, whatever --settle is. It is kept in memory: after a restart, or
// on another replica, the withdrawal waits the settle delay as any change.
type withdrawals struct {
	mu       sync.Mutex
	subjects map[string]struct{}
}

// note records the patients of the inputs that withdrew a stored version
// (an inert version, or one that only replaces, that replaced another).
func (w *withdrawals) note(inputs []store.Input, res []store.PutResult) {
	w.mu.Lock()
	defer w.mu.Unlock()
	for i, r := range res {
		if r != store.PutNewer || (!inputs[i].Inert && !inputs[i].OnlyReplaces) {
			continue
		}
		if w.subjects == nil {
			w.subjects = make(map[string]struct{})
		}
		w.subjects[inputs[i].Subject] = struct{}{}
	}
}

// pending reports whether subject has a withdrawal not yet evaluated.
func (w *withdrawals) pending(subject string) bool {
	w.mu.Lock()
	defer w.mu.Unlock()
	_, ok := w.subjects[subject]
	return ok
}

// taken forgets subject's withdrawals when its evaluation begins: that
// evaluation reads them.
func (w *withdrawals) taken(subject string) {
	w.mu.Lock()
	defer w.mu.Unlock()
	delete(w.subjects, subject)
}
