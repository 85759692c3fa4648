package engine

import (
	"slices"
	"sync"
	"time"
)

// DefaultGapGrace is how long subscription events that a notification
// skipped over may take to arrive before the engine searches for them. A
// server that sends notifications over several connections at once
// delivers some out of order: event 8 before event 7 is no loss, and a
// catch-up search for it (from the cursor less the overlap, every Observation
// of those minutes read again) would load the FHIR server for nothing.
const DefaultGapGrace = 2 * time.Second

// maxMissingRuns bounds what missingEvents holds per subscription: a
// sender that skips more often than that is searched for at once.
const maxMissingRuns = 1024

// missingEvents holds, per subscription, the event numbers that
// notifications skipped over and that have not arrived since, with when
// each run was first missed. It lives in memory only: a restart searches
// from the durable cursor anyway.
type missingEvents struct {
	mu   sync.Mutex
	subs map[string]*missingOf
}

// missingOf is one subscription's missing runs, and the late events
// noted before the notification that skipped them: two notifications
// stored one after the other may be noted the other way round.
type missingOf struct {
	runs, early []missingRun
}

// missingRun is the event numbers from to to, all missing since since.
type missingRun struct {
	from, to uint64
	since    time.Time
}

// note records a notification of subscription that carried the events
// lowest to highest (lowest 0: it counts events but carries none) when the
// highest number seen before it was previous. It reports whether a
// catch-up is needed now rather than after the grace: too many runs are
// missing already.
func (m *missingEvents) note(subscription string, lowest, highest, previous uint64, now time.Time) (searchNow bool) {
	m.mu.Lock()
	defer m.mu.Unlock()
	sub := m.subs[subscription]
	if sub == nil {
		sub = &missingOf{}
	}
	var skipped missingRun
	switch {
	case lowest > previous+1:
		skipped = missingRun{from: previous + 1, to: lowest - 1, since: now}
	case lowest == 0 && highest > previous:
		// A count of events without them: they may still be on their way.
		skipped = missingRun{from: previous + 1, to: highest, since: now}
	}
	if lowest > 0 {
		var found bool
		sub.runs, found = arrived(sub.runs, lowest, highest)
		if !found && highest <= previous {
			sub.early = append(sub.early, missingRun{from: lowest, to: highest, since: now})
		}
	}
	if skipped.from > 0 {
		runs := []missingRun{skipped}
		for _, e := range sub.early {
			runs, _ = arrived(runs, e.from, e.to)
		}
		sub.runs = append(sub.runs, runs...)
	}
	if len(sub.runs)+len(sub.early) > maxMissingRuns {
		delete(m.subs, subscription)
		return true
	}
	if len(sub.runs) == 0 && len(sub.early) == 0 {
		delete(m.subs, subscription)
		return false
	}
	if m.subs == nil {
		m.subs = make(map[string]*missingOf)
	}
	m.subs[subscription] = sub
	return false
}

// arrived takes the numbers from to to out of runs, and says whether any
// of them was there.
func arrived(runs []missingRun, from, to uint64) ([]missingRun, bool) {
	out, found := runs[:0:0], false
	for _, r := range runs {
		if to < r.from || from > r.to {
			out = append(out, r)
			continue
		}
		found = true
		if r.from < from {
			out = append(out, missingRun{from: r.from, to: from - 1, since: r.since})
		}
		if r.to > to {
			out = append(out, missingRun{from: to + 1, to: r.to, since: r.since})
		}
	}
	return out, found
}

// expire forgets the runs missing for longer than grace, and the late
// events noted as long ago, and returns how many events the runs held (0:
// nothing to search for).
func (m *missingEvents) expire(now time.Time, grace time.Duration) (events uint64) {
	m.mu.Lock()
	defer m.mu.Unlock()
	for name, sub := range m.subs {
		sub.runs = slices.DeleteFunc(sub.runs, func(r missingRun) bool {
			if now.Sub(r.since) < grace {
				return false
			}
			events += r.to - r.from + 1
			return true
		})
		sub.early = slices.DeleteFunc(sub.early, func(r missingRun) bool { return now.Sub(r.since) >= grace })
		if len(sub.runs) == 0 && len(sub.early) == 0 {
			delete(m.subs, name)
		}
	}
	return events
}

// forget drops what is held of a subscription: its numbering started
// again.
func (m *missingEvents) forget(subscription string) {
	m.mu.Lock()
	defer m.mu.Unlock()
	delete(m.subs, subscription)
}
