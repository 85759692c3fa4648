package engine

import (
	"testing"
	"time"

	"github.com/deadspace-fhir/deadspace/api/store"
)

// TestWaitsOnASharedStoreFollowTheStoresClock: on a store shared by
// replicas, a mark's settle delay and a write's backoff are read from the
// store's clock (store.Dirty.Waited, store.Write.Wait), not from times
// another replica stamped by its own clock, which may run minutes apart
// from this one's; a mark that already waited by the store's clock (from
// before a restart) is not held again.
func TestWaitsOnASharedStoreFollowTheStoresClock(t *testing.T) {
	now := time.Now().Add(5 * time.Minute) // this replica's clock, five minutes ahead
	stamped := time.Now()                  // the ingesting replica's clock
	var m marksSeen
	fresh := store.Dirty{Subject: "Patient/a", Since: stamped, Waited: 50 * time.Millisecond}
	if got := m.settled(fresh, now, true); got > time.Second {
		t.Errorf("a mark 50 ms old by the store's clock has waited %v on a replica whose clock is ahead; want 50 ms", got)
	}
	if got := m.settled(fresh, now, false); got < 4*time.Minute {
		t.Errorf("one replica, one clock: waited %v, want the age by its own clock", got)
	}
	old := store.Dirty{Subject: "Patient/b", Since: stamped.Add(-10 * time.Minute), Waited: 10 * time.Minute}
	if got := m.settled(old, time.Now(), true); got < 10*time.Minute {
		t.Errorf("a mark 10 min old by the store's clock, first listed after a restart: waited %v, want 10 min", got)
	}

	var r retryDue
	behind := store.Write{ID: 1, Attempts: 1, NotBefore: stamped.Add(30 * time.Second), Wait: 30 * time.Second, StoreClock: true}
	if !r.waits(behind, now) {
		t.Error("a write rescheduled for 30 s on the store's clock is due at once on a replica whose clock is 5 min ahead")
	}
	aheadOfUs := store.Write{ID: 2, Attempts: 1, NotBefore: now.Add(10 * time.Minute), StoreClock: true}
	if r.waits(aheadOfUs, now) {
		t.Error("a write due by the store's clock waits for a NotBefore another replica's clock set ahead")
	}
}
