package storetest

import (
	"fmt"
	"slices"
	"sync"
	"testing"
	"time"

	"github.com/deadspace-fhir/deadspace/api/store"
)

// RunReplicas runs the guarantees that must hold when several service
// replicas share one store: open returns two handles on one new, empty
// store, as two replicas would hold them (an embedded store, which one
// process owns, returns the same handle twice), and arranges for their
// Close with t.Cleanup.
func RunReplicas(t *testing.T, open func(t *testing.T) (store.Store, store.Store)) {
	t.Helper()
	tests := []struct {
		name string
		fn   func(t *testing.T, a, b store.Store)
	}{
		{"Replicas/FeedResumesWithoutGaps", testReplicasFeed},
		{"Replicas/InputsOneWinner", testReplicasInputs},
		{"Replicas/SeenEventOnce", testReplicasSeenEvent},
	}
	for _, tc := range tests {
		t.Run(tc.name, func(t *testing.T) {
			t.Parallel()
			a, b := open(t)
			tc.fn(t, a, b)
		})
	}
}

// Two replicas commit at the same time while a watcher resumes, again and
// again, from the last Seq it saw (as a Watch stream does): it must see
// every event exactly once. A store that numbers events before commit and
// lets a later number become visible first makes the watcher skip the
// earlier one for good.
func testReplicasFeed(t *testing.T, a, b store.Store) {
	const perReplica = 60
	var wg sync.WaitGroup
	for r, s := range []store.Store{a, b} {
		wg.Go(func() {
			for i := range perReplica {
				subj := fmt.Sprintf("Patient/%d-%d", r, i%4)
				series := fmt.Sprintf("r%d-s%03d", r, i)
				if err := s.Commit(t.Context(), store.Change{Subject: subj,
					Entries: []store.Entry{entry(subj, series, "k-"+series, t0)}}, t0); err != nil {
					t.Error(err)
					return
				}
			}
		})
	}
	done := make(chan struct{})
	go func() { wg.Wait(); close(done) }()
	seen := map[string]int{}
	var after uint64
	watch := func() {
		evs, err := a.Events(t.Context(), after, 7)
		must(t, err)
		for _, ev := range evs {
			if ev.Seq <= after {
				t.Fatalf("event %d after resuming from %d", ev.Seq, after)
			}
			after = ev.Seq
			seen[ev.Series]++
		}
	}
	for running := true; running; {
		select {
		case <-done:
			running = false
		default:
		}
		watch()
	}
	for prev := -1; prev != len(seen); {
		prev = len(seen)
		watch()
	}
	if len(seen) != 2*perReplica {
		t.Errorf("the watcher saw %d series of %d committed: events were skipped", len(seen), 2*perReplica)
	}
	for series, n := range seen {
		if n != 1 {
			t.Errorf("series %s seen %d times", series, n)
		}
	}
}

// The same versions of one resource reach two replicas in opposite orders
// at the same time: exactly one call stores it first (PutNew), and the
// newest version is what remains.
func testReplicasInputs(t *testing.T, a, b store.Store) {
	const resources, versions = 10, 4
	forward := func(r int) []store.Input {
		var out []store.Input
		for v := 1; v <= versions; v++ {
			out = append(out, input("Patient/p", fmt.Sprintf("Observation/%d", r), fmt.Sprint(v),
				t0.Add(time.Duration(v)*time.Second), t0, fmt.Sprintf("v%d", v)))
		}
		return out
	}
	var mu sync.Mutex
	counts := map[store.PutResult]int{}
	var wg sync.WaitGroup
	for i, s := range []store.Store{a, b} {
		wg.Go(func() {
			for r := range resources {
				ins := forward(r)
				if i == 1 {
					slices.Reverse(ins)
				}
				for _, in := range ins {
					res, err := s.PutInputs(t.Context(), []store.Input{in}, t0)
					if err != nil {
						t.Error(err)
						return
					}
					mu.Lock()
					counts[res[0]]++
					mu.Unlock()
				}
			}
		})
	}
	wg.Wait()
	if counts[store.PutNew] != resources {
		t.Errorf("PutNew %d times for %d resources (results %v)", counts[store.PutNew], resources, counts)
	}
	for r := range resources {
		in, err := b.Input(t.Context(), "Patient/p", fmt.Sprintf("Observation/%d", r))
		must(t, err)
		if in.VersionID != fmt.Sprint(versions) || string(in.Payload) != fmt.Sprintf("v%d", versions) {
			t.Errorf("resource %d kept version %s (%q), want the newest", r, in.VersionID, in.Payload)
		}
	}
}

// A subscription's events are delivered to both replicas at once (a
// retry, or a sender that fans out): for each event number exactly one
// replica is told it is new, and the highest number never goes down.
func testReplicasSeenEvent(t *testing.T, a, b store.Store) {
	const events = 40
	firsts := make([]int, events+1)
	var mu sync.Mutex
	var wg sync.WaitGroup
	for _, s := range []store.Store{a, b} {
		wg.Go(func() {
			for n := uint64(1); n <= events; n++ {
				prev, err := s.SeenEvent(t.Context(), "sub", n)
				if err != nil {
					t.Error(err)
					return
				}
				if prev < n {
					mu.Lock()
					firsts[n]++
					mu.Unlock()
				}
			}
		})
	}
	wg.Wait()
	for n := 1; n <= events; n++ {
		if firsts[n] != 1 {
			t.Errorf("event %d was new to %d replicas, want exactly 1", n, firsts[n])
		}
	}
	if prev, err := a.SeenEvent(t.Context(), "sub", 1); err != nil || prev != events {
		t.Errorf("highest = %d, %v; want %d", prev, err, events)
	}
}
