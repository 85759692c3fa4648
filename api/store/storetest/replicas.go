package storetest

import (
	"errors"
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
		{"Replicas/LateOutcomeLeavesAClaimedWrite", testReplicasLateOutcome},
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

// A write one replica claimed (DueWrites) and is sending: the other
// replica's Reschedule or Bury of it (a late outcome of an attempt whose
// claim lapsed) changes nothing and says so (store.ErrClaimedElsewhere),
// so it cannot release the claim and have the write sent twice at once, nor
// bury a write that may land. The holder's own outcome is recorded. An
// embedded store, whose one handle holds every claim, records both.
func testReplicasLateOutcome(t *testing.T, a, b store.Store) {
	ctx := t.Context()
	must(t, a.Commit(ctx, store.Change{Subject: "Patient/late",
		Entries: []store.Entry{entry("Patient/late", "late-1", "k-late-1", t0), entry("Patient/late", "late-2", "k-late-2", t0)},
		Writes:  []store.Write{writeFor("late-1"), writeFor("late-2")},
	}, t0))
	claimed, err := a.DueWrites(ctx, t0, 10)
	must(t, err)
	if len(claimed) != 2 {
		t.Fatalf("DueWrites = %d writes, want 2", len(claimed))
	}
	if a == b {
		must(t, b.Reschedule(ctx, claimed[0].ID, t0, "HTTP 503"))
		must(t, b.Bury(ctx, claimed[1].ID, "HTTP 422", t0))
		return
	}
	if err := b.Reschedule(ctx, claimed[0].ID, t0.Add(time.Hour), "late"); !errors.Is(err, store.ErrClaimedElsewhere) {
		t.Errorf("Reschedule of a write another replica holds = %v, want ErrClaimedElsewhere", err)
	}
	if err := b.Bury(ctx, claimed[1].ID, "late", t0); !errors.Is(err, store.ErrClaimedElsewhere) {
		t.Errorf("Bury of a write another replica holds = %v, want ErrClaimedElsewhere", err)
	}
	dead, err := b.DeadLetters(ctx, 10)
	must(t, err)
	if len(dead) != 0 {
		t.Errorf("dead letters after a refused Bury: %d, want none", len(dead))
	}
	// Still a's, unchanged: a lists both again, b neither.
	again, err := a.DueWrites(ctx, t0, 10)
	must(t, err)
	if len(again) != 2 || again[0].Attempts != 0 || again[0].LastError != "" || !again[0].NotBefore.Equal(claimed[0].NotBefore) {
		t.Errorf("a's writes after b's late outcomes: %+v, want both unchanged", again)
	}
	if other, err := b.DueWrites(ctx, t0.Add(2*time.Hour), 10); err != nil || len(other) != 0 {
		t.Errorf("b is handed %d writes (%v) while a holds them, want none", len(other), err)
	}
	// The holder records its own outcomes; a write nobody holds any more
	// may be recorded by any replica.
	must(t, a.Reschedule(ctx, claimed[0].ID, t0, "HTTP 503"))
	must(t, b.Reschedule(ctx, claimed[0].ID, t0, "HTTP 503 again"))
	must(t, a.Bury(ctx, claimed[1].ID, "HTTP 422", t0))
	if err := b.Bury(ctx, claimed[1].ID, "late", t0); !errors.Is(err, store.ErrNotFound) {
		t.Errorf("Bury of a write already buried = %v, want ErrNotFound", err)
	}
}
