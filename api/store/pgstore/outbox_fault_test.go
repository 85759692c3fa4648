package pgstore

import (
	"slices"
	"testing"
	"time"

	"github.com/deadspace-fhir/deadspace/api/store"
	"github.com/deadspace-fhir/deadspace/api/store/pgstore/pgtest"
)

// TestStaleReplicaCannotReleaseAWriteAnotherReplicaTookOver: replica A
// claims a write and stalls (a GC pause, SIGSTOP, a slow network) past its
// write lease; replica B takes the write over and starts sending it. A
// wakes, its own send fails (its connection timed out meanwhile) and it
// records the failure with Reschedule. An operator running two or three
// replicas expects "replicas never send the same write at the same time"
// (README, Which store): A's late outcome must not touch a claim it no
// longer holds, as its late acknowledgement already does not. Today
// Reschedule (and Bury) update the row whoever holds it: A's Reschedule
// clears B's claim while B's send runs, and replica C (or A itself, once
// the jittered backoff is over) is handed the same write and sends it a
// second time at the same moment, which a server that does not serialise
// conditional creates may keep twice. A late Bury would likewise move a
// write B is sending, and may well land, into the dead letters.
func TestStaleReplicaCannotReleaseAWriteAnotherReplicaTookOver(t *testing.T) {
	url := pgtest.NewSchema(t)
	a := openWithLease(t, url, "replica-a", 300*time.Millisecond)
	b := openWithLease(t, url, "replica-b", time.Minute)
	c := openWithLease(t, url, "replica-c", time.Minute)
	ctx := t.Context()
	if err := a.Commit(ctx, store.Change{Subject: "Patient/stall",
		Entries: []store.Entry{{Series: "s1", Key: "k1", Status: "final", EffectiveAt: t0}},
		Writes:  []store.Write{{Series: []string{"s1"}, Body: []byte("w1")}},
	}, t0); err != nil {
		t.Fatal(err)
	}
	claimed, err := a.DueWrites(ctx, t0, 1)
	if err != nil || len(claimed) != 1 {
		t.Fatalf("A claims %v, %v; want one write", ids(claimed), err)
	}
	id := claimed[0].ID
	var expires time.Time
	if err := a.pool.QueryRow(ctx, "SELECT claim_expires FROM outbox WHERE id = $1", int64(id)).Scan(&expires); err != nil {
		t.Fatal(err)
	}
	// A stalls past its lease; B takes the write over and is sending it.
	waitExpired(t, b, expires)
	if got, err := b.DueWrites(ctx, t0, 10); err != nil || !slices.Contains(ids(got), id) {
		t.Fatalf("B after A's lease lapsed gets %v (%v), want write %d", ids(got), err, id)
	}

	// A wakes and records its failed attempt, as Engine.attempt does
	// after any transient error.
	_ = a.Reschedule(ctx, id, t0, "Post: context deadline exceeded")

	// B still holds an unexpired claim and is still sending: no other
	// replica may be handed the write.
	got, err := c.DueWrites(ctx, t0.Add(time.Hour), 10)
	if err != nil {
		t.Fatal(err)
	}
	if slices.Contains(ids(got), id) {
		t.Errorf("replica C is handed write %d while B's claim on it runs: A's stale Reschedule released B's claim, so the write is sent twice at once", id)
	}
}
