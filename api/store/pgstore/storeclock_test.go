package pgstore

import (
	"testing"
	"time"

	"github.com/deadspace-fhir/deadspace/api/store"
	"github.com/deadspace-fhir/deadspace/api/store/pgstore/pgtest"
)

// TestWaitsRunOnTheDatabaseClock: the times replicas give the store are
// read by their own clocks, which may disagree by minutes (one host's NTP
// broken). How long a dirty mark has waited (store.Dirty.Waited) and how
// long a rescheduled write still waits (store.Write.Wait, RescheduleIn)
// are measured by the database's clock, whatever clock stamped Since or
// NotBefore; a mark's wait outlives a restart of the replica that listed
// it.
func TestWaitsRunOnTheDatabaseClock(t *testing.T) {
	url := pgtest.NewSchema(t)
	ctx := t.Context()
	a := openWithLease(t, url, "replica-a", time.Minute)
	ahead := time.Now().Add(5 * time.Minute)
	behind := time.Now().Add(-5 * time.Minute)

	// A replica whose clock runs five minutes behind marks the patient;
	// one five minutes ahead would read the mark ten minutes old.
	if err := a.MarkDirty(ctx, "Patient/skew", behind); err != nil {
		t.Fatal(err)
	}
	b := openWithLease(t, url, "replica-b", time.Minute)
	d := dirtyNamed(t, b, "Patient/skew")
	if !d.Since.Equal(behind) {
		t.Errorf("Since = %v, want the writer's time %v", d.Since, behind)
	}
	if d.Waited < 0 || d.Waited > 10*time.Second {
		t.Errorf("Waited = %v just after the mark, want about zero by the database's clock", d.Waited)
	}
	// A mark made long ago (before the replicas restarted) reads as old
	// as it is.
	if _, err := a.pool.Exec(ctx, `UPDATE dirty SET since_at = since_at - interval '10 minutes' WHERE subject = 'Patient/skew'`); err != nil {
		t.Fatal(err)
	}
	c := openWithLease(t, url, "replica-c", time.Minute)
	if d := dirtyNamed(t, c, "Patient/skew"); d.Waited < 10*time.Minute || d.Waited > 11*time.Minute {
		t.Errorf("Waited = %v for a mark made 10 min ago, want 10 min", d.Waited)
	}
	claimed, ok, err := c.ClaimPatient(ctx, "Patient/skew", time.Minute)
	if err != nil || !ok || claimed.Waited < 10*time.Minute {
		t.Errorf("ClaimPatient = %+v, %v, %v; want the mark, 10 min old", claimed, ok, err)
	}
	// A commit that finds the generation moved restarts the wait.
	if err := a.MarkDirty(ctx, "Patient/skew", ahead); err != nil {
		t.Fatal(err)
	}
	if err := c.Commit(ctx, store.Change{Subject: "Patient/skew", Generation: claimed.Generation}, ahead); err != nil {
		t.Fatal(err)
	}
	if d := dirtyNamed(t, a, "Patient/skew"); d.Waited > 10*time.Second {
		t.Errorf("Waited = %v after a commit left the mark, want it to start again", d.Waited)
	}

	// A write rescheduled for 30 s by a replica whose clock is behind: its
	// NotBefore is what that replica said, its wait the database's.
	if err := a.Commit(ctx, store.Change{Subject: "Patient/w",
		Entries: []store.Entry{{Series: "sw", Key: "kw", Status: "final", EffectiveAt: t0}},
		Writes:  []store.Write{{Series: []string{"sw"}, Body: []byte("w")}},
	}, t0); err != nil {
		t.Fatal(err)
	}
	ws, err := a.DueWrites(ctx, t0, 10)
	if err != nil || len(ws) != 1 {
		t.Fatalf("DueWrites = %v, %v", ids(ws), err)
	}
	if ws[0].StoreClock {
		t.Errorf("a write never rescheduled has a wait on the database's clock: %+v", ws[0])
	}
	if err := a.RescheduleIn(ctx, ws[0].ID, 30*time.Second, behind.Add(30*time.Second), "503"); err != nil {
		t.Fatal(err)
	}
	got, err := b.DueWrites(ctx, ahead.Add(time.Hour), 10)
	if err != nil || len(got) != 1 {
		t.Fatalf("DueWrites = %v, %v", ids(got), err)
	}
	if w := got[0]; !w.StoreClock || w.Wait < 20*time.Second || w.Wait > 30*time.Second || !w.NotBefore.Equal(behind.Add(30*time.Second)) || w.Attempts != 1 {
		t.Errorf("rescheduled write = StoreClock %v, Wait %v, NotBefore %v, attempts %d; want a wait of about 30 s by the database's clock", w.StoreClock, w.Wait, w.NotBefore, w.Attempts)
	}
	// RescheduleIn follows Reschedule's claim rule.
	if err := a.RescheduleIn(ctx, got[0].ID, time.Second, t0, "late"); err == nil {
		t.Error("RescheduleIn of a write another replica holds succeeded")
	}
}

func dirtyNamed(t *testing.T, s *Store, subject string) store.Dirty {
	t.Helper()
	ds, err := s.DirtyPatients(t.Context())
	if err != nil {
		t.Fatal(err)
	}
	for _, d := range ds {
		if d.Subject == subject {
			return d
		}
	}
	t.Fatalf("%s is not dirty: %+v", subject, ds)
	return store.Dirty{}
}
