package engine

import (
	"sync"
	"time"

	"github.com/deadspace-fhir/deadspace/api/store"
)

// The outbox and the dirty marks store wall-clock times (a write's next
// attempt, when a patient's new data arrived), since they outlive the
// process. A host's wall clock can be stepped (NTP correcting it, a
// virtual machine resumed): stepped back an hour, every stored time would
// look an hour further ahead, and retries and evaluations would wait that
// hour. So a time this process stored is also kept in memory with the
// monotonic clock, which no step moves, and a wait is over when either
// clock says so; a stored time is all there is after a restart, and one
// further ahead than any wait the engine sets is over at once. A clock
// stepped forward only ends waits early: a retry sent sooner, a patient
// evaluated before its settle, whose late readings are derived again.
// With replicas sharing a store the clocks of two hosts may disagree
// whatever their steps: the settle delay is then measured by the store's
// clock (marksSeen.settled), as the leases are.

// maxRetryAfter is the longest Retry-After the writer honours; a server
// asking for more is asked again after this long.
const maxRetryAfter = 15 * time.Minute

// maxRetryWait is the longest wait the writer stores for a write's next
// attempt: a stored time further ahead than this was set before the
// clock was stepped back, and is due now.
const maxRetryWait = max(backoffMax, maxRetryAfter)

// inMemoryWait is a wait that lives in memory only (a failed patient's
// hold, the writer's next look for its Device), kept by the engine's clock
// and by the monotonic one: it is over when either says so, or when the
// engine's clock puts its end further ahead than the wait's whole length
// (that clock was stepped back), so no step prolongs it.
type inMemoryWait struct {
	wall, mono time.Time
	length     time.Duration
}

// waitFrom is a wait of d from now (the engine's clock).
func waitFrom(now time.Time, d time.Duration) inMemoryWait {
	return inMemoryWait{wall: now.Add(d), mono: time.Now().Add(d), length: d}
}

func (w inMemoryWait) over(now time.Time) bool {
	ahead := w.wall.Sub(now)
	return ahead <= 0 || ahead > w.length || !w.mono.After(time.Now())
}

func (w inMemoryWait) left(now time.Time) time.Duration {
	if w.over(now) {
		return 0
	}
	return min(w.wall.Sub(now), time.Until(w.mono))
}

// retryDue holds, for the writes this process rescheduled, when their next
// attempt is due by the monotonic clock.
type retryDue struct {
	mu  sync.Mutex
	due map[uint64]retryAt
}

// retryAt is a write's next attempt: due at, once it has had attempts.
type retryAt struct {
	attempts int
	at       time.Time
}

// scheduled notes that write id, having had attempts, waits wait from now.
func (r *retryDue) scheduled(id uint64, attempts int, wait time.Duration) {
	r.mu.Lock()
	defer r.mu.Unlock()
	if r.due == nil {
		r.due = make(map[uint64]retryAt)
	}
	r.due[id] = retryAt{attempts: attempts, at: time.Now().Add(wait)}
}

// waits says whether w still waits for its next attempt at now (the
// engine's clock): its stored time is ahead of now, by no more than the
// longest wait the writer sets, and, when this process scheduled it, its
// wait by the monotonic clock is not over. A write a replica rescheduled on
// a shared store's clock (store.Write.StoreClock) waits what that clock
// says is left instead, whatever this replica's clock reads.
func (r *retryDue) waits(w store.Write, now time.Time) bool {
	ahead := w.NotBefore.Sub(now)
	if w.StoreClock {
		ahead = w.Wait
	}
	if ahead <= 0 || ahead > maxRetryWait {
		return false
	}
	r.mu.Lock()
	defer r.mu.Unlock()
	if a, ok := r.due[w.ID]; ok && a.attempts == w.Attempts && !time.Now().Before(a.at) {
		return false
	}
	return true
}

// keep forgets the writes that are not in the outbox any more: pending is
// the whole outbox.
func (r *retryDue) keep(pending []store.Write) {
	r.mu.Lock()
	defer r.mu.Unlock()
	if len(r.due) == 0 {
		return
	}
	listed := make(map[uint64]bool, len(pending))
	for _, w := range pending {
		listed[w.ID] = true
	}
	for id := range r.due {
		if !listed[id] {
			delete(r.due, id)
		}
	}
}

// marksSeen holds, per dirty patient, when this process first listed its
// mark, by the monotonic clock.
type marksSeen struct {
	mu   sync.Mutex
	seen map[string]markSeen
}

// markSeen is a mark (its Since) and when it was first listed here.
type markSeen struct {
	since, first time.Time
}

// age returns how long d's data has waited at now (the engine's clock):
// the longer of its age by the stored time and the time since this
// process first listed the mark, so a clock stepped back does not hold
// the patient back by the step.
func (m *marksSeen) age(d store.Dirty, now time.Time) time.Duration {
	return max(now.Sub(d.Since), m.sinceFirst(d))
}

// settled returns how long d's data has waited, for the settle delay. On
// a store shared by replicas, Since was stamped by whichever replica's
// clock took the data in, and this replica's clock may run ahead of it (a
// broken NTP, a virtual machine resumed): the wait is measured instead by
// the store's clock (store.Dirty.Waited, which outlives a restart, so a
// mark that settled before it is not held again), or by the time since
// this process first listed the mark when that is longer (the store's
// clock stepped back). A store of one replica has one clock: age.
func (m *marksSeen) settled(d store.Dirty, now time.Time, shared bool) time.Duration {
	if !shared {
		return m.age(d, now)
	}
	return max(d.Waited, m.sinceFirst(d))
}

// sinceFirst returns how long ago, by the monotonic clock, this process
// first listed d's mark with its Since.
func (m *marksSeen) sinceFirst(d store.Dirty) time.Duration {
	m.mu.Lock()
	defer m.mu.Unlock()
	if m.seen == nil {
		m.seen = make(map[string]markSeen)
	}
	s, ok := m.seen[d.Subject]
	if !ok || !s.since.Equal(d.Since) {
		s = markSeen{since: d.Since, first: time.Now()}
		m.seen[d.Subject] = s
	}
	return time.Since(s.first)
}

// keep forgets the patients that are not dirty any more: dirty is every
// mark.
func (m *marksSeen) keep(dirty []store.Dirty) {
	m.mu.Lock()
	defer m.mu.Unlock()
	if len(m.seen) == 0 {
		return
	}
	listed := make(map[string]bool, len(dirty))
	for _, d := range dirty {
		listed[d.Subject] = true
	}
	for s := range m.seen {
		if !listed[s] {
			delete(m.seen, s)
		}
	}
}
