package pgstore

import (
	"errors"
	"net/url"
	"slices"
	"testing"
	"time"

	"github.com/deadspace-fhir/deadspace/api/store"
	"github.com/deadspace-fhir/deadspace/api/store/pgstore/pgtest"
	"github.com/jackc/pgx/v5"
)

var t0 = time.Date(2024, 3, 14, 2, 0, 0, 0, time.UTC)

func openWithLease(t *testing.T, url, holder string, lease time.Duration) *Store {
	t.Helper()
	s, err := Open(t.Context(), url, Options{Holder: holder, WriteLease: lease})
	if err != nil {
		t.Fatal(err)
	}
	t.Cleanup(func() { _ = s.Close() })
	return s
}

func ids(ws []store.Write) []uint64 {
	var out []uint64
	for _, w := range ws {
		out = append(out, w.ID)
	}
	return out
}

// A write claimed by a replica that then dies (it never acknowledges nor
// reschedules) is not sent by another replica while the lease runs, and is
// sent by one after it lapses. The dead replica's late acknowledgement, if
// it ever comes, finds the write gone and changes nothing.
func TestOutboxTakeOverAfterLease(t *testing.T) {
	url := pgtest.NewSchema(t)
	a := openWithLease(t, url, "replica-a", 300*time.Millisecond)
	b := openWithLease(t, url, "replica-b", time.Minute)
	ctx := t.Context()
	const subj = "Patient/o"
	if err := a.Commit(ctx, store.Change{Subject: subj,
		Entries: []store.Entry{{Series: "s1", Key: "k1", Status: "final", EffectiveAt: t0}, {Series: "s2", Key: "k2", Status: "final", EffectiveAt: t0}},
		Writes:  []store.Write{{Series: []string{"s1"}, Body: []byte("w1")}, {Series: []string{"s2"}, Body: []byte("w2")}},
	}, t0); err != nil {
		t.Fatal(err)
	}

	claimedByA, err := a.DueWrites(ctx, t0, 1)
	if err != nil || len(claimedByA) != 1 {
		t.Fatalf("A claims %v, %v; want one write", ids(claimedByA), err)
	}
	fromB, err := b.DueWrites(ctx, t0, 10)
	if err != nil {
		t.Fatal(err)
	}
	if slices.Contains(ids(fromB), claimedByA[0].ID) || len(fromB) != 1 {
		t.Fatalf("B gets %v while A's lease on %d runs; want only the other write", ids(fromB), claimedByA[0].ID)
	}
	if again, _ := b.DueWrites(ctx, t0, 10); len(again) != 1 || again[0].ID != fromB[0].ID {
		t.Fatalf("B asks again: %v, want its own claim %d still due to it", ids(again), fromB[0].ID)
	}

	// A dies holding its claim. Once the lease has lapsed on the
	// database's clock, B takes the write over.
	var expires time.Time
	if err := a.pool.QueryRow(ctx, "SELECT claim_expires FROM outbox WHERE id = $1", int64(claimedByA[0].ID)).Scan(&expires); err != nil {
		t.Fatal(err)
	}
	waitExpired(t, b, expires)
	takenOver, err := b.DueWrites(ctx, t0, 10)
	if err != nil {
		t.Fatal(err)
	}
	if !slices.Contains(ids(takenOver), claimedByA[0].ID) {
		t.Fatalf("B after A's lease lapsed gets %v, want A's write %d", ids(takenOver), claimedByA[0].ID)
	}
	if fromA, _ := a.DueWrites(ctx, t0, 10); len(fromA) != 0 {
		t.Fatalf("A (back from the dead) gets %v while B holds every write", ids(fromA))
	}
	for _, w := range takenOver {
		if err := b.Acknowledge(ctx, w.ID, map[string][2]string{w.Series[0]: {"obs-" + w.Series[0], "1"}}); err != nil {
			t.Fatal(err)
		}
	}
	if err := a.Acknowledge(ctx, claimedByA[0].ID, map[string][2]string{"s1": {"obs-late", "9"}}); !errors.Is(err, store.ErrNotFound) {
		t.Fatalf("A's late acknowledgement: %v, want ErrNotFound", err)
	}
	if en, _ := a.Entry(ctx, claimedByA[0].Series[0]); en.ServerID != "obs-"+claimedByA[0].Series[0] {
		t.Fatalf("the late acknowledgement changed the server id to %q", en.ServerID)
	}
	if st, _ := a.Stats(ctx); st.OutboxDepth != 0 {
		t.Fatalf("outbox depth %d after every write was acknowledged", st.OutboxDepth)
	}
}

// A rescheduled write is free for any replica when it is due again: the
// replica that failed it need not be the one to retry.
func TestOutboxRescheduleReleasesClaim(t *testing.T) {
	url := pgtest.NewSchema(t)
	a, b := openAs(t, url, "replica-a"), openAs(t, url, "replica-b")
	ctx := t.Context()
	if err := a.Commit(ctx, store.Change{Subject: "Patient/r", Writes: []store.Write{{Body: []byte("w")}}}, t0); err != nil {
		t.Fatal(err)
	}
	ws, err := a.DueWrites(ctx, t0, 10)
	if err != nil || len(ws) != 1 {
		t.Fatalf("A claims %v, %v", ids(ws), err)
	}
	if err := a.Reschedule(ctx, ws[0].ID, t0.Add(time.Minute), "503"); err != nil {
		t.Fatal(err)
	}
	got, err := b.DueWrites(ctx, t0.Add(time.Minute), 10)
	if err != nil || len(got) != 1 || got[0].Attempts != 1 {
		t.Fatalf("B after A rescheduled: %+v, %v; want the write with one attempt", got, err)
	}
}

// A replica whose evaluation was overtaken by new input commits with the
// old generation: the patient stays dirty and its claim is released, so
// any replica evaluates the new input at once.
func TestCommitReleasesClaimWhenStillDirty(t *testing.T) {
	url := pgtest.NewSchema(t)
	a, b := openAs(t, url, "replica-a"), openAs(t, url, "replica-b")
	ctx := t.Context()
	const subj = "Patient/c"
	if err := a.MarkDirty(ctx, subj, t0); err != nil {
		t.Fatal(err)
	}
	claimed, err := a.ClaimDirty(ctx, t0, 10, time.Minute)
	if err != nil || len(claimed) != 1 {
		t.Fatalf("A claims %v, %v", claimed, err)
	}
	// New input arrives at B while A evaluates.
	if _, err := b.PutInputs(ctx, []store.Input{{Subject: subj, Logical: "Observation/1", VersionID: "1", LastUpdated: t0, EffectiveAt: t0}}, t0); err != nil {
		t.Fatal(err)
	}
	if got, _ := b.ClaimDirty(ctx, t0.Add(time.Hour), 10, time.Minute); len(got) != 0 {
		t.Fatalf("B claims %v while A evaluates", got)
	}
	if err := a.Commit(ctx, store.Change{Subject: subj, Generation: claimed[0].Generation}, t0.Add(time.Second)); err != nil {
		t.Fatal(err)
	}
	got, err := b.ClaimDirty(ctx, t0.Add(time.Hour), 10, time.Minute)
	if err != nil || len(got) != 1 || got[0].Subject != subj || got[0].Generation <= claimed[0].Generation {
		t.Fatalf("B after A's overtaken commit claims %+v, %v; want the patient with a newer generation", got, err)
	}
	// B's commit with the current generation clears the mark and claim.
	if err := b.Commit(ctx, store.Change{Subject: subj, Generation: got[0].Generation}, t0.Add(2*time.Second)); err != nil {
		t.Fatal(err)
	}
	if ds, _ := a.DirtyPatients(ctx); len(ds) != 0 {
		t.Fatalf("still dirty after an up-to-date commit: %v", ds)
	}
}

// The engine lists the whole outbox by asking for the writes due at a
// far-future instant (year 9999), beyond what nanoseconds since 1970 hold:
// such an instant must mean "after everything", not wrap around.
func TestDueWritesFarFuture(t *testing.T) {
	s := openAs(t, pgtest.NewSchema(t), "replica-a")
	ctx := t.Context()
	later := store.Write{Body: []byte("w"), NotBefore: t0.Add(24 * time.Hour)}
	if err := s.Commit(ctx, store.Change{Subject: "Patient/f", Writes: []store.Write{{Body: []byte("now")}, later}}, t0); err != nil {
		t.Fatal(err)
	}
	for _, at := range []time.Time{time.Date(9999, 1, 1, 0, 0, 0, 0, time.UTC), time.Date(2263, 1, 1, 0, 0, 0, 0, time.UTC)} {
		ws, err := s.DueWrites(ctx, at, 10)
		if err != nil || len(ws) != 2 {
			t.Errorf("DueWrites at %v: %d writes, %v; want both", at, len(ws), err)
		}
	}
	if ws, _ := s.DueWrites(ctx, time.Date(1600, 1, 1, 0, 0, 0, 0, time.UTC), 10); len(ws) != 0 {
		t.Errorf("DueWrites in 1600: %d writes, want none", len(ws))
	}
}

// Writes of one series go in the order they were queued even across
// replicas: while one replica holds the first write of a series, another
// replica is not given a later write of that series (it could overtake the
// first and be undone by it), but is given writes of other series.
func TestOutboxSeriesOrderAcrossReplicas(t *testing.T) {
	url := pgtest.NewSchema(t)
	a, b := openAs(t, url, "replica-a"), openAs(t, url, "replica-b")
	ctx := t.Context()
	commit := func(series ...string) {
		t.Helper()
		var ws []store.Write
		for _, se := range series {
			ws = append(ws, store.Write{Series: []string{se}, Body: []byte(se)})
		}
		if err := a.Commit(ctx, store.Change{Subject: "Patient/s", Writes: ws}, t0); err != nil {
			t.Fatal(err)
		}
	}
	commit("s")
	first, err := a.DueWrites(ctx, t0, 1)
	if err != nil || len(first) != 1 {
		t.Fatalf("A claims %v, %v", ids(first), err)
	}
	commit("s", "t") // a revision of s, and another series
	got, err := b.DueWrites(ctx, t0, 10)
	if err != nil {
		t.Fatal(err)
	}
	if len(got) != 1 || string(got[0].Body) != "t" {
		t.Fatalf("B gets %d writes %v; want only the write of series t while A holds s's first", len(got), ids(got))
	}
	if err := a.Acknowledge(ctx, first[0].ID, nil); err != nil {
		t.Fatal(err)
	}
	got, err = b.DueWrites(ctx, t0, 10)
	if err != nil {
		t.Fatal(err)
	}
	var bodies []string
	for _, w := range got {
		bodies = append(bodies, string(w.Body))
	}
	if !slices.Equal(bodies, []string{"s", "t"}) {
		t.Fatalf("B after A acknowledged the first: %v, want s's revision and t", bodies)
	}
}

// ClaimPatient gives one patient to one replica at a time: another replica
// is refused while the claim holds, the holder renews it, a commit or a
// release ends it, a lapsed claim is taken over, and a patient that is no
// longer dirty is not claimed at all.
func TestClaimPatient(t *testing.T) {
	url := pgtest.NewSchema(t)
	a, b := openAs(t, url, "replica-a"), openAs(t, url, "replica-b")
	ctx := t.Context()
	const subj = "Patient/p"
	claim := func(s *Store, ttl time.Duration) (store.Dirty, bool) {
		t.Helper()
		d, ok, err := s.ClaimPatient(ctx, subj, ttl)
		if err != nil {
			t.Fatal(err)
		}
		return d, ok
	}
	if _, ok := claim(a, time.Minute); ok {
		t.Fatal("claimed a patient that is not dirty")
	}
	if err := a.MarkDirty(ctx, subj, t0); err != nil {
		t.Fatal(err)
	}
	d, ok := claim(a, time.Minute)
	if !ok || d.Subject != subj || d.Generation == 0 {
		t.Fatalf("A's claim: %+v %v", d, ok)
	}
	if _, ok := claim(b, time.Minute); ok {
		t.Fatal("B claimed the patient A holds")
	}
	if _, ok := claim(a, time.Minute); !ok {
		t.Fatal("A could not renew its own claim")
	}
	if err := a.ReleaseClaim(ctx, subj); err != nil {
		t.Fatal(err)
	}
	d, ok = claim(b, 100*time.Millisecond)
	if !ok {
		t.Fatal("B could not claim the patient A released")
	}
	time.Sleep(150 * time.Millisecond) // B's claim lapses on the database's clock
	d, ok = claim(a, time.Minute)
	if !ok {
		t.Fatal("A could not take over B's lapsed claim")
	}
	if err := a.Commit(ctx, store.Change{Subject: subj, Generation: d.Generation}, t0.Add(time.Second)); err != nil {
		t.Fatal(err)
	}
	if _, ok := claim(b, time.Minute); ok {
		t.Fatal("B claimed a patient whose evaluation was committed")
	}
}

// A cursor set under a lease moves only while the replica holds the lease
// in the same epoch: a holder that lost it cannot move its successor's
// cursor.
func TestSetCursorUnderLease(t *testing.T) {
	url := pgtest.NewSchema(t)
	a, b := openAs(t, url, "replica-a"), openAs(t, url, "replica-b")
	ctx := t.Context()
	la, err := a.AcquireLease(ctx, "catch-up", 100*time.Millisecond)
	if err != nil {
		t.Fatal(err)
	}
	if err := a.SetCursorUnderLease(ctx, la, "search", "one"); err != nil {
		t.Fatal(err)
	}
	if err := b.SetCursorUnderLease(ctx, la, "search", "b-without-the-lease"); !errors.Is(err, ErrLeaseHeld) {
		t.Fatalf("B without the lease: err %v, want ErrLeaseHeld", err)
	}
	waitExpired(t, b, la.Expires)
	if err := a.SetCursorUnderLease(ctx, la, "search", "after-expiry"); !errors.Is(err, ErrLeaseHeld) {
		t.Fatalf("A after its lease lapsed: err %v, want ErrLeaseHeld", err)
	}
	lb, err := b.AcquireLease(ctx, "catch-up", time.Minute)
	if err != nil {
		t.Fatal(err)
	}
	if err := b.SetCursorUnderLease(ctx, lb, "search", "two"); err != nil {
		t.Fatal(err)
	}
	if err := a.SetCursorUnderLease(ctx, la, "search", "stale"); !errors.Is(err, ErrLeaseHeld) {
		t.Fatalf("A with its old epoch: err %v, want ErrLeaseHeld", err)
	}
	if v, err := a.Cursor(ctx, "search"); err != nil || v != "two" {
		t.Fatalf("cursor %q %v, want the new holder's", v, err)
	}
}

// A replica that renews its claim on a write keeps it past the lease: no
// other replica is handed the write while the send runs. Once a claim has
// lapsed and another replica took the write, the first one's renewal is
// refused, so it does not send the write a second time; a lapsed claim
// nobody took is renewed.
func TestRenewWriteClaim(t *testing.T) {
	url := pgtest.NewSchema(t)
	const lease = 2 * time.Second
	a := openWithLease(t, url, "replica-a", lease)
	b := openWithLease(t, url, "replica-b", lease)
	ctx := t.Context()
	if err := a.Commit(ctx, store.Change{Subject: "Patient/r",
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
	expiresOf := func() time.Time {
		var at time.Time
		if err := a.pool.QueryRow(ctx, "SELECT claim_expires FROM outbox WHERE id = $1", int64(id)).Scan(&at); err != nil {
			t.Fatal(err)
		}
		return at
	}

	// Renewed for three leases in a row: B is never handed the write.
	end := expiresOf().Add(2 * lease)
	for time.Now().Before(end) {
		if ok, err := a.RenewWriteClaim(ctx, id); err != nil || !ok {
			t.Fatalf("A renews its own claim: %v, %v; want true", ok, err)
		}
		if got, err := b.DueWrites(ctx, t0, 10); err != nil || len(got) != 0 {
			t.Fatalf("B is handed %v (%v) while A renews its claim", ids(got), err)
		}
		time.Sleep(lease / 4)
	}

	// A lapsed claim that nobody took is renewed.
	waitExpired(t, b, expiresOf())
	if ok, err := a.RenewWriteClaim(ctx, id); err != nil || !ok {
		t.Fatalf("A renews a lapsed claim nobody took: %v, %v; want true", ok, err)
	}

	// A stalls past its lease, B takes the write over: A's renewal is
	// refused, and B's is granted.
	waitExpired(t, b, expiresOf())
	if got, err := b.DueWrites(ctx, t0, 10); err != nil || len(got) != 1 || got[0].ID != id {
		t.Fatalf("B after A's claim lapsed gets %v (%v), want write %d", ids(got), err, id)
	}
	if ok, err := a.RenewWriteClaim(ctx, id); err != nil || ok {
		t.Fatalf("A renews a claim B took over: %v, %v; want false", ok, err)
	}
	if ok, err := b.RenewWriteClaim(ctx, id); err != nil || !ok {
		t.Fatalf("B renews its claim: %v, %v; want true", ok, err)
	}
	if err := b.Acknowledge(ctx, id, nil); err != nil {
		t.Fatal(err)
	}
	if ok, err := b.RenewWriteClaim(ctx, id); err != nil || ok {
		t.Fatalf("renewing a write that left the outbox: %v, %v; want false", ok, err)
	}
}

// Every listing of a mark says which mark the patient's last committed
// evaluation cleared (store.Dirty.Cleared), whichever replica committed
// it: the first mark says none; an evaluation overtaken by a newer change
// clears nothing and leaves it; an evaluation that clears moves it to the
// generation it cleared, and so does a clear by a replica of the build
// before this one, which deletes the mark with a statement of its own
// (here from a session whose search path leaves the store's schema out).
func TestMarksSayWhichMarkWasLastCleared(t *testing.T) {
	dbURL := pgtest.NewSchema(t)
	a, b := openAs(t, dbURL, "replica-a"), openAs(t, dbURL, "replica-b")
	ctx := t.Context()
	const subj = "Patient/cl"
	mark := func() {
		t.Helper()
		if err := b.MarkDirty(ctx, subj, t0); err != nil {
			t.Fatal(err)
		}
	}
	// check compares Cleared as each listing gives it, and returns the
	// claimed mark.
	check := func(step string, want uint64) store.Dirty {
		t.Helper()
		listed, err := b.DirtyPatients(ctx)
		if err != nil || len(listed) != 1 {
			t.Fatalf("%s: listed %+v, %v", step, listed, err)
		}
		d, ok, err := a.ClaimPatient(ctx, subj, time.Minute)
		if err != nil || !ok {
			t.Fatalf("%s: claim %+v %v %v", step, d, ok, err)
		}
		if err := a.ReleaseClaim(ctx, subj); err != nil {
			t.Fatal(err)
		}
		batch, err := b.ClaimDirty(ctx, t0.Add(time.Hour), 10, time.Minute)
		if err != nil || len(batch) != 1 {
			t.Fatalf("%s: batch claim %+v, %v", step, batch, err)
		}
		for _, got := range []store.Dirty{listed[0], d, batch[0]} {
			if got.Cleared != want {
				t.Errorf("%s: Cleared %d, want %d (%+v)", step, got.Cleared, want, got)
			}
		}
		return batch[0]
	}

	mark()
	first := check("first mark", 0)
	mark() // a change while the first mark's evaluation runs
	if err := b.Commit(ctx, store.Change{Subject: subj, Generation: first.Generation}, t0); err != nil {
		t.Fatal(err)
	}
	second := check("after an overtaken evaluation", 0)
	if err := b.Commit(ctx, store.Change{Subject: subj, Generation: second.Generation}, t0); err != nil {
		t.Fatal(err)
	}
	mark()
	third := check("after a clear", second.Generation)
	// The earlier build's clear, from a session whose search path does not
	// name the store's schema (the trigger's function keeps its own).
	schema, err := url.Parse(dbURL)
	if err != nil {
		t.Fatal(err)
	}
	conn, err := a.pool.Acquire(ctx)
	if err != nil {
		t.Fatal(err)
	}
	defer conn.Release()
	if _, err := conn.Exec(ctx, `SET search_path TO pg_catalog`); err != nil {
		t.Fatal(err)
	}
	marks := pgx.Identifier{schema.Query().Get("search_path"), "dirty"}.Sanitize()
	if _, err := conn.Exec(ctx, `DELETE FROM `+marks+` WHERE subject = $1`, subj); err != nil {
		t.Fatal(err)
	}
	if _, err := conn.Exec(ctx, `RESET search_path`); err != nil {
		t.Fatal(err)
	}
	mark()
	check("after an earlier build's clear", third.Generation)
}

// earlierMarkSQL is how builds before migration 0006 mark a patient
// dirty: their from_ns is the input's own time, not the earliest blood
// gas it reaches.
const earlierMarkSQL = `
	INSERT INTO dirty (subject, since_ns, generation, from_ns, urgent) VALUES ($1, $2, nextval('dirty_generation'), $3, $4)
	ON CONFLICT (subject) DO UPDATE
	   SET since_ns = LEAST(dirty.since_ns, EXCLUDED.since_ns), generation = EXCLUDED.generation,
	       from_ns = CASE WHEN dirty.from_ns = 0 OR EXCLUDED.from_ns = 0 THEN 0 ELSE LEAST(dirty.from_ns, EXCLUDED.from_ns) END,
	       urgent = dirty.urgent OR EXCLUDED.urgent`

// While replicas are upgraded one at a time, replicas of the earlier build
// write marks whose span means something else; a mark one of them wrote,
// or wrote into, reads as the whole patient (From zero) until an
// evaluation clears it, so this build's incremental evaluation cannot
// miss what it reaches. Marks this build alone wrote keep their span.
func TestMarksOfAnEarlierBuildCoverTheWholePatient(t *testing.T) {
	s := openAs(t, pgtest.NewSchema(t), "replica-a")
	ctx := t.Context()
	const subj = "Patient/up"
	input := func(id string, at time.Time) {
		t.Helper()
		if _, err := s.PutInputs(ctx, []store.Input{{Subject: subj, Logical: "Observation/" + id, VersionID: "1", LastUpdated: at, EffectiveAt: at, ChangedAt: at}}, at); err != nil {
			t.Fatal(err)
		}
	}
	earlier := func(at time.Time) {
		t.Helper()
		if _, err := s.pool.Exec(ctx, earlierMarkSQL, subj, nanos(at), nanos(at), false); err != nil {
			t.Fatal(err)
		}
	}
	from := func(step string, want time.Time) store.Dirty {
		t.Helper()
		listed, err := s.DirtyPatients(ctx)
		if err != nil || len(listed) != 1 {
			t.Fatalf("%s: listed %+v, %v", step, listed, err)
		}
		claimed, err := s.ClaimDirty(ctx, t0.Add(24*time.Hour), 10, time.Minute)
		if err != nil || len(claimed) != 1 {
			t.Fatalf("%s: claimed %+v, %v", step, claimed, err)
		}
		if err := s.ReleaseClaim(ctx, subj); err != nil {
			t.Fatal(err)
		}
		one, ok, err := s.ClaimPatient(ctx, subj, time.Minute)
		if err != nil || !ok {
			t.Fatalf("%s: claim %+v %v %v", step, one, ok, err)
		}
		if err := s.ReleaseClaim(ctx, subj); err != nil {
			t.Fatal(err)
		}
		for _, d := range []store.Dirty{listed[0], claimed[0], one} {
			if !d.From.Equal(want) {
				t.Errorf("%s: From %v, want %v", step, d.From, want)
			}
		}
		return one
	}
	at := func(m int) time.Time { return t0.Add(time.Duration(m) * time.Minute) }

	input("a", at(30))
	from("this build's mark", at(30))
	input("b", at(20))
	from("this build's marks merged", at(20))
	earlier(at(40))
	from("an earlier build wrote into it", time.Time{})
	input("c", at(50))
	d := from("this build's change after the earlier build's", time.Time{})
	if err := s.Commit(ctx, store.Change{Subject: subj, Generation: d.Generation}, at(60)); err != nil {
		t.Fatal(err)
	}
	input("d", at(70))
	from("after the clear, this build's mark", at(70))
	d = from("again", at(70))
	if err := s.Commit(ctx, store.Change{Subject: subj, Generation: d.Generation}, at(80)); err != nil {
		t.Fatal(err)
	}
	earlier(at(90))
	from("an earlier build's new mark", time.Time{})
}

// markWithoutEndSQL is how builds of migration 0006 mark a patient dirty:
// their span has a start (from_ns, kept current with reach_generation) and
// no end.
const markWithoutEndSQL = `
	WITH g AS (SELECT nextval('dirty_generation') AS gen)
	INSERT INTO dirty (subject, since_ns, generation, from_ns, urgent, reach_generation)
	SELECT $1, $2, g.gen, $3, $4, g.gen FROM g
	ON CONFLICT (subject) DO UPDATE
	   SET since_ns = LEAST(dirty.since_ns, EXCLUDED.since_ns), generation = EXCLUDED.generation,
	       from_ns = CASE WHEN dirty.from_ns = 0 OR EXCLUDED.from_ns = 0 THEN 0 ELSE LEAST(dirty.from_ns, EXCLUDED.from_ns) END,
	       urgent = dirty.urgent OR EXCLUDED.urgent,
	       reach_generation = CASE WHEN dirty.reach_generation = dirty.generation THEN EXCLUDED.reach_generation ELSE 0 END`

// A replica of the build before marks had an end keeps their start but
// not their end: a mark it wrote, or wrote into, reads as having no end
// until an evaluation clears it, whatever this build writes into it
// after, so this build's evaluation cannot leave out a blood gas that
// replica's change reaches. Marks this build alone wrote keep their end.
func TestMarksOfTheBuildBeforeEndsHaveNoEnd(t *testing.T) {
	s := openAs(t, pgtest.NewSchema(t), "replica-a")
	ctx := t.Context()
	const subj = "Patient/ends"
	at := func(m int) time.Time { return t0.Add(time.Duration(m) * time.Minute) }
	input := func(id string, m int) {
		t.Helper()
		in := store.Input{Subject: subj, Logical: "Observation/" + id, VersionID: "1", LastUpdated: at(m), EffectiveAt: at(m),
			ChangedAt: at(m - 5), ChangedUntil: at(m + 20)}
		if _, err := s.PutInputs(ctx, []store.Input{in}, at(m)); err != nil {
			t.Fatal(err)
		}
	}
	before := func(m int) {
		t.Helper()
		if _, err := s.pool.Exec(ctx, markWithoutEndSQL, subj, nanos(at(m)), nanos(at(m-5)), false); err != nil {
			t.Fatal(err)
		}
	}
	span := func(step string, from, until time.Time) store.Dirty {
		t.Helper()
		listed, err := s.DirtyPatients(ctx)
		if err != nil || len(listed) != 1 {
			t.Fatalf("%s: listed %+v, %v", step, listed, err)
		}
		one, ok, err := s.ClaimPatient(ctx, subj, time.Minute)
		if err != nil || !ok {
			t.Fatalf("%s: claim %+v %v %v", step, one, ok, err)
		}
		if err := s.ReleaseClaim(ctx, subj); err != nil {
			t.Fatal(err)
		}
		for _, d := range []store.Dirty{listed[0], one} {
			if !d.From.Equal(from) || !d.Until.Equal(until) {
				t.Errorf("%s: span %v – %v, want %v – %v", step, d.From, d.Until, from, until)
			}
		}
		return one
	}
	input("a", 30)
	span("this build's mark", at(25), at(50))
	input("b", 40)
	span("this build's marks merged", at(25), at(60))
	before(100)
	span("the build before wrote into it", at(25), time.Time{})
	input("c", 50)
	d := span("this build's change after it", at(25), time.Time{})
	if err := s.Commit(ctx, store.Change{Subject: subj, Generation: d.Generation}, at(60)); err != nil {
		t.Fatal(err)
	}
	input("d", 70)
	d = span("after the clear, this build's mark", at(65), at(90))
	if err := s.Commit(ctx, store.Change{Subject: subj, Generation: d.Generation}, at(80)); err != nil {
		t.Fatal(err)
	}
	before(90)
	span("a new mark of the build before", at(85), time.Time{})
}

// A mark says another replica evaluated the patient last only while that
// replica runs: before it first says so, after it departs, and after its
// word lapses, the patient is anyone's; to the replica itself, never.
func TestEvaluatedElsewhereOnlyWhileThatReplicaRuns(t *testing.T) {
	url := pgtest.NewSchema(t)
	a, b := openAs(t, url, "replica-a"), openAs(t, url, "replica-b")
	ctx := t.Context()
	const subj = "Patient/owned"
	mark := func(id string) {
		t.Helper()
		if _, err := a.PutInputs(ctx, []store.Input{{Subject: subj, Logical: "Observation/" + id, VersionID: "1", LastUpdated: t0, EffectiveAt: t0, ChangedAt: t0}}, t0); err != nil {
			t.Fatal(err)
		}
	}
	elsewhere := func(s *Store) bool {
		t.Helper()
		listed, err := s.DirtyPatients(ctx)
		if err != nil || len(listed) != 1 {
			t.Fatalf("listed %+v, %v", listed, err)
		}
		claimed, ok, err := s.ClaimPatient(ctx, subj, time.Minute)
		if err != nil || !ok {
			t.Fatalf("claim %+v %v %v", claimed, ok, err)
		}
		if err := s.ReleaseClaim(ctx, subj); err != nil {
			t.Fatal(err)
		}
		if listed[0].EvaluatedElsewhere != claimed.EvaluatedElsewhere {
			t.Errorf("the listing and the claim disagree: %v and %v", listed[0].EvaluatedElsewhere, claimed.EvaluatedElsewhere)
		}
		return claimed.EvaluatedElsewhere
	}
	mark("1")
	d, ok, err := a.ClaimPatient(ctx, subj, time.Minute)
	if err != nil || !ok {
		t.Fatalf("claim %v %v", ok, err)
	}
	if err := a.Commit(ctx, store.Change{Subject: subj, Generation: d.Generation}, t0); err != nil {
		t.Fatal(err)
	}
	mark("2")
	if elsewhere(b) {
		t.Error("before replica-a said it runs, replica-b sees the patient as replica-a's")
	}
	if err := a.KeepAlive(ctx, time.Minute); err != nil {
		t.Fatal(err)
	}
	if !elsewhere(b) || elsewhere(a) {
		t.Error("while replica-a runs, the patient is replica-a's to replica-b, and not elsewhere to replica-a")
	}
	if err := a.Depart(ctx); err != nil {
		t.Fatal(err)
	}
	if elsewhere(b) {
		t.Error("after replica-a departed, replica-b still sees the patient as replica-a's")
	}
	if err := a.KeepAlive(ctx, time.Millisecond); err != nil {
		t.Fatal(err)
	}
	time.Sleep(20 * time.Millisecond)
	if elsewhere(b) {
		t.Error("after replica-a's word lapsed, replica-b still sees the patient as replica-a's")
	}
}
