package engine

import (
	"testing"
	"time"
)

// Subscription events that notifications skip over are searched for only
// when they miss their grace: events delivered out of order, a count of
// events that overtook them, and two notifications noted the other way
// round from the order the store saw them in, are no loss.
func TestMissingEvents(t *testing.T) {
	t.Parallel()
	const grace = 2 * time.Second
	t0 := time.Date(2026, 3, 1, 8, 0, 0, 0, time.UTC)
	// seen is one notification as the engine notes it: the events it
	// carried (lowest 0: a count only), the highest number stored before
	// it, and when it was noted (seconds after t0).
	type seen struct {
		lowest, highest, previous uint64
		at                        float64
	}
	cases := []struct {
		name  string
		notes []seen
		// expireAt is when the missed runs are looked at (seconds after t0);
		// want is how many events are then searched for.
		expireAt float64
		want     uint64
	}{
		{"in order", []seen{{1, 1, 0, 0}, {2, 2, 1, 0}, {3, 3, 2, 0}}, 10, 0},
		{"out of order within the grace", []seen{{1, 1, 0, 0}, {3, 3, 1, 0}, {2, 2, 3, 1.5}}, 10, 0},
		{"an event that never came", []seen{{1, 1, 0, 0}, {3, 3, 1, 0}}, 2, 1},
		{"not yet past the grace", []seen{{1, 1, 0, 0}, {3, 3, 1, 0}}, 1.9, 0},
		{"a late event fills part of a run", []seen{{1, 1, 0, 0}, {6, 6, 1, 0}, {3, 3, 6, 1}}, 2, 3},
		{"a notification of several events fills a run", []seen{{1, 1, 0, 0}, {7, 7, 1, 0}, {2, 6, 7, 1}}, 10, 0},
		// 9 reached the store before 8 (8 saw 9 as the highest), but 8 is
		// noted before 9.
		{"noted the other way round", []seen{{7, 7, 6, 0}, {8, 8, 9, 0}, {9, 9, 7, 0}}, 10, 0},
		{"a count ahead of events on their way", []seen{{1, 1, 0, 0}, {0, 4, 1, 0}, {2, 3, 4, 0.5}, {4, 4, 4, 0.5}}, 10, 0},
		{"a count of events that never came", []seen{{1, 1, 0, 0}, {0, 4, 1, 0}, {2, 3, 4, 0.5}}, 10, 1},
		{"a duplicate is no gap", []seen{{1, 1, 0, 0}, {2, 2, 1, 0}, {2, 2, 2, 0}}, 10, 0},
	}
	for _, c := range cases {
		t.Run(c.name, func(t *testing.T) {
			t.Parallel()
			var m missingEvents
			at := func(s float64) time.Time { return t0.Add(time.Duration(s * float64(time.Second))) }
			for _, n := range c.notes {
				if m.note("Subscription/a", n.lowest, n.highest, n.previous, at(n.at)) {
					t.Fatalf("note %+v asked for a search at once", n)
				}
			}
			if got := m.expire(at(c.expireAt), grace); got != c.want {
				t.Errorf("searched for %d events, want %d", got, c.want)
			}
			if got := m.expire(at(c.expireAt+10), grace); c.want > 0 && got != 0 {
				t.Errorf("searched again for %d events after the first search", got)
			}
			if pendingRuns(&m) {
				t.Errorf("runs left after every grace: %+v", m.subs)
			}
		})
	}
}

// Subscriptions are counted apart, and a sender that skips more often than
// the engine keeps track of is searched for at once.
func TestMissingEventsPerSubscriptionAndBounded(t *testing.T) {
	t.Parallel()
	var m missingEvents
	now := time.Date(2026, 3, 1, 8, 0, 0, 0, time.UTC)
	m.note("Subscription/a", 3, 3, 1, now)
	m.note("Subscription/b", 2, 2, 3, now) // b's event 2: nothing of a's
	if got := m.expire(now.Add(time.Minute), time.Second); got != 1 {
		t.Fatalf("searched for %d events, want a's event 2", got)
	}
	var searchNow bool
	for i := range uint64(maxMissingRuns + 1) {
		searchNow = m.note("Subscription/c", 2*i+2, 2*i+2, 2*i, now)
		if searchNow && i < maxMissingRuns {
			t.Fatalf("searched at once after %d runs", i+1)
		}
	}
	if !searchNow {
		t.Fatalf("%d missing runs kept, want a search at once", maxMissingRuns+1)
	}
	if pendingRuns(&m) {
		t.Error("runs kept after the search at once")
	}
}

// pendingRuns reports whether any run is waiting out its grace.
func pendingRuns(m *missingEvents) bool {
	m.mu.Lock()
	defer m.mu.Unlock()
	for _, sub := range m.subs {
		if len(sub.runs) > 0 {
			return true
		}
	}
	return false
}
