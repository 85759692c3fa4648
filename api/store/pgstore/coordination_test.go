package pgstore

import (
	"errors"
	"fmt"
	"slices"
	"sort"
	"strings"
	"sync"
	"testing"
	"time"

	"github.com/jackc/pgx/v5/pgxpool"

	"github.com/deadspace-fhir/deadspace/api/store/pgstore/pgtest"
)

func openAs(t *testing.T, url, holder string) *Store {
	t.Helper()
	s, err := Open(t.Context(), url, Options{Holder: holder})
	if err != nil {
		t.Fatal(err)
	}
	t.Cleanup(func() { _ = s.Close() })
	return s
}

// Replicas that start together against an empty database all come up, and
// each migration is applied exactly once: the advisory lock makes the
// others wait and then find nothing to do. Without the lock they race on
// CREATE TABLE and all but one fail.
func TestMigrateConcurrently(t *testing.T) {
	url := pgtest.NewDatabase(t)
	const replicas = 4
	pools := make([]*pgxpool.Pool, replicas)
	for i := range pools {
		p, err := pgxpool.New(t.Context(), url)
		if err != nil {
			t.Fatal(err)
		}
		defer p.Close()
		pools[i] = p
	}
	var wg sync.WaitGroup
	applied := make([][]int, replicas)
	errs := make([]error, replicas)
	start := make(chan struct{})
	for i := range replicas {
		wg.Go(func() {
			<-start
			applied[i], errs[i] = Migrate(t.Context(), pools[i])
		})
	}
	close(start)
	wg.Wait()
	var all []int
	for i, err := range errs {
		if err != nil {
			t.Fatalf("replica %d: %v", i, err)
		}
		all = append(all, applied[i]...)
	}
	sort.Ints(all)
	want := make([]int, SchemaVersion())
	for i := range want {
		want[i] = i + 1
	}
	if !slices.Equal(all, want) {
		t.Fatalf("versions applied across replicas = %v, want each of %v once", all, want)
	}
	var rows int
	if err := pools[0].QueryRow(t.Context(), "SELECT count(*) FROM schema_migrations").Scan(&rows); err != nil {
		t.Fatal(err)
	}
	if rows != len(want) {
		t.Fatalf("schema_migrations has %d rows, want %d", rows, len(want))
	}
	// And a later start applies nothing.
	again, err := Migrate(t.Context(), pools[0])
	if err != nil || len(again) != 0 {
		t.Fatalf("second migration applied %v, err %v; want nothing", again, err)
	}
}

// A database migrated by a newer deadspace is refused with a message that
// says which versions and what to do.
func TestSchemaTooNewRefused(t *testing.T) {
	url := pgtest.NewSchema(t)
	s := openAs(t, url, "old")
	future := SchemaVersion() + 1
	if _, err := s.pool.Exec(t.Context(), "INSERT INTO schema_migrations (version, name) VALUES ($1, 'from_the_future')", future); err != nil {
		t.Fatal(err)
	}
	_, err := Open(t.Context(), url, Options{})
	if !errors.Is(err, ErrSchemaTooNew) {
		t.Fatalf("Open on a newer schema: err = %v, want ErrSchemaTooNew", err)
	}
	for _, want := range []string{fmt.Sprintf("version %d (from_the_future)", future), fmt.Sprintf("up to %d", SchemaVersion()), "at least as new"} {
		if !strings.Contains(err.Error(), want) {
			t.Errorf("refusal %q does not say %q", err, want)
		}
	}
}

func TestMigrationFilesNumbered(t *testing.T) {
	ms, err := migrations()
	if err != nil {
		t.Fatal(err)
	}
	if len(ms) == 0 || SchemaVersion() != len(ms) {
		t.Fatalf("%d migrations, SchemaVersion %d", len(ms), SchemaVersion())
	}
}

// waitExpired waits until the database's clock is past t: leases expire on
// that clock, not the test's.
func waitExpired(t *testing.T, s *Store, at time.Time) {
	t.Helper()
	for {
		var past bool
		if err := s.pool.QueryRow(t.Context(), "SELECT clock_timestamp() > $1", at).Scan(&past); err != nil {
			t.Fatal(err)
		}
		if past {
			return
		}
		time.Sleep(20 * time.Millisecond)
	}
}

// Two replicas and one lease: the holder renews, the other is refused
// until the lease expires, then takes it over with a higher epoch, and the
// old holder's renewal is refused. Releasing hands it over at once.
func TestLeaseExpiryAndTakeOver(t *testing.T) {
	url := pgtest.NewSchema(t)
	a, b := openAs(t, url, "replica-a"), openAs(t, url, "replica-b")
	ctx := t.Context()
	const name = "poll"

	la, err := a.AcquireLease(ctx, name, time.Minute)
	if err != nil {
		t.Fatal(err)
	}
	if la.Holder != "replica-a" || la.Epoch != 1 {
		t.Fatalf("first lease = %+v, want replica-a at epoch 1", la)
	}
	held, err := b.AcquireLease(ctx, name, time.Minute)
	if !errors.Is(err, ErrLeaseHeld) || held.Holder != "replica-a" || !strings.Contains(err.Error(), "replica-a") {
		t.Fatalf("B while A holds: lease %+v err %v, want ErrLeaseHeld naming replica-a", held, err)
	}
	renewed, err := a.AcquireLease(ctx, name, 200*time.Millisecond)
	if err != nil || renewed.Epoch != 1 || renewed.Holder != "replica-a" {
		t.Fatalf("A renews: %+v %v, want the same epoch", renewed, err)
	}

	waitExpired(t, b, renewed.Expires)
	lb, err := b.AcquireLease(ctx, name, time.Minute)
	if err != nil {
		t.Fatalf("B after expiry: %v", err)
	}
	if lb.Holder != "replica-b" || lb.Epoch != 2 {
		t.Fatalf("taken over lease = %+v, want replica-b at epoch 2", lb)
	}
	if _, err := a.AcquireLease(ctx, name, time.Minute); !errors.Is(err, ErrLeaseHeld) {
		t.Fatalf("A renews after losing the lease: err = %v, want ErrLeaseHeld", err)
	}
	// A's release of a lease it lost changes nothing.
	if err := a.ReleaseLease(ctx, name); err != nil {
		t.Fatal(err)
	}
	if cur, _ := a.Lease(ctx, name); cur.Holder != "replica-b" || cur.Epoch != 2 {
		t.Fatalf("after A's stale release: %+v", cur)
	}
	if err := b.ReleaseLease(ctx, name); err != nil {
		t.Fatal(err)
	}
	la2, err := a.AcquireLease(ctx, name, time.Minute)
	if err != nil || la2.Epoch != 3 {
		t.Fatalf("A after B's release: %+v %v, want epoch 3", la2, err)
	}
}

// Many replicas racing for a free lease: exactly one wins.
func TestLeaseRace(t *testing.T) {
	url := pgtest.NewSchema(t)
	const replicas = 8
	stores := make([]*Store, replicas)
	for i := range stores {
		stores[i] = openAs(t, url, fmt.Sprintf("replica-%d", i))
	}
	for round := range 5 {
		name := fmt.Sprintf("catch-up-%d", round)
		var wg sync.WaitGroup
		var mu sync.Mutex
		var winners []string
		start := make(chan struct{})
		for _, s := range stores {
			wg.Go(func() {
				<-start
				l, err := s.AcquireLease(t.Context(), name, time.Minute)
				switch {
				case err == nil:
					mu.Lock()
					winners = append(winners, l.Holder)
					mu.Unlock()
				case !errors.Is(err, ErrLeaseHeld):
					t.Error(err)
				}
			})
		}
		close(start)
		wg.Wait()
		if len(winners) != 1 {
			t.Fatalf("round %d: %d replicas hold the lease: %v", round, len(winners), winners)
		}
	}
}

// Claims split dirty patients between replicas, skip patients not yet
// settled, lapse after their ttl, and can be given back.
func TestClaimDirty(t *testing.T) {
	url := pgtest.NewSchema(t)
	a, b := openAs(t, url, "replica-a"), openAs(t, url, "replica-b")
	ctx := t.Context()
	t0 := time.Date(2024, 3, 14, 2, 0, 0, 0, time.UTC)
	for i, subj := range []string{"Patient/1", "Patient/2", "Patient/3", "Patient/late"} {
		at := t0.Add(time.Duration(i) * time.Second)
		if subj == "Patient/late" {
			at = t0.Add(time.Hour)
		}
		if err := a.MarkDirty(ctx, subj, at); err != nil {
			t.Fatal(err)
		}
	}
	settled := t0.Add(time.Minute)
	subjects := func(s *Store, limit int, ttl time.Duration) []string {
		t.Helper()
		ds, err := s.ClaimDirty(ctx, settled, limit, ttl)
		if err != nil {
			t.Fatal(err)
		}
		var out []string
		for _, d := range ds {
			out = append(out, d.Subject)
		}
		return out
	}
	if got := subjects(a, 2, time.Minute); !slices.Equal(got, []string{"Patient/1", "Patient/2"}) {
		t.Fatalf("A claims %v, want the two oldest", got)
	}
	if got := subjects(b, 10, 150*time.Millisecond); !slices.Equal(got, []string{"Patient/3"}) {
		t.Fatalf("B claims %v, want only the settled one A does not hold", got)
	}
	if got := subjects(a, 10, time.Minute); len(got) != 0 {
		t.Fatalf("A claims %v again, want nothing", got)
	}
	// Every mark is still listed, claimed or not.
	all, err := a.DirtyPatients(ctx)
	if err != nil || len(all) != 4 {
		t.Fatalf("DirtyPatients = %v, %v; want all four", all, err)
	}
	// B's claim lapses (B died); A takes Patient/3 over.
	var expires time.Time
	if err := a.pool.QueryRow(ctx, "SELECT claim_expires FROM dirty WHERE subject = 'Patient/3'").Scan(&expires); err != nil {
		t.Fatal(err)
	}
	waitExpired(t, a, expires)
	if got := subjects(a, 10, time.Minute); !slices.Equal(got, []string{"Patient/3"}) {
		t.Fatalf("A after B's claim lapsed claims %v, want Patient/3", got)
	}
	// A gives Patient/1 back; B may take it at once.
	if err := a.ReleaseClaim(ctx, "Patient/1"); err != nil {
		t.Fatal(err)
	}
	if err := b.ReleaseClaim(ctx, "Patient/2"); err != nil { // not B's: no effect
		t.Fatal(err)
	}
	if got := subjects(b, 10, time.Minute); !slices.Equal(got, []string{"Patient/1"}) {
		t.Fatalf("B after A's release claims %v, want Patient/1", got)
	}
}

// Replicas claiming at the same time get disjoint patients, and together
// every patient.
func TestClaimDirtyConcurrent(t *testing.T) {
	url := pgtest.NewSchema(t)
	const replicas, patients = 3, 60
	stores := make([]*Store, replicas)
	for i := range stores {
		stores[i] = openAs(t, url, fmt.Sprintf("replica-%d", i))
	}
	ctx := t.Context()
	t0 := time.Date(2024, 3, 14, 2, 0, 0, 0, time.UTC)
	for i := range patients {
		if err := stores[0].MarkDirty(ctx, fmt.Sprintf("Patient/%02d", i), t0); err != nil {
			t.Fatal(err)
		}
	}
	var mu sync.Mutex
	owner := map[string]int{}
	var wg sync.WaitGroup
	for i, s := range stores {
		wg.Go(func() {
			for {
				ds, err := s.ClaimDirty(ctx, t0, 4, time.Minute)
				if err != nil {
					t.Error(err)
					return
				}
				if len(ds) == 0 {
					return
				}
				mu.Lock()
				for _, d := range ds {
					if prev, dup := owner[d.Subject]; dup {
						t.Errorf("%s claimed by replicas %d and %d", d.Subject, prev, i)
					}
					owner[d.Subject] = i
				}
				mu.Unlock()
			}
		})
	}
	wg.Wait()
	if len(owner) != patients {
		t.Fatalf("%d of %d patients claimed", len(owner), patients)
	}
}

// A database migrated by an earlier release, with rows in it, is brought
// up to date at start and its rows still read: each migration after the
// first applies to a database in use, not only to an empty one.
func TestMigrateFromEachEarlierVersion(t *testing.T) {
	all, err := migrations()
	if err != nil {
		t.Fatal(err)
	}
	for released := 1; released < len(all); released++ {
		t.Run(fmt.Sprintf("from version %d", released), func(t *testing.T) {
			url := pgtest.NewSchema(t)
			pool, err := pgxpool.New(t.Context(), url)
			if err != nil {
				t.Fatal(err)
			}
			defer pool.Close()
			if _, err := migrate(t.Context(), pool, all[:released]); err != nil {
				t.Fatal(err)
			}
			// Version 1 holds the leases and the dirty marks.
			if _, err := pool.Exec(t.Context(), `INSERT INTO dirty (subject, since_ns, generation) VALUES ('Patient/old', 1, nextval('dirty_generation'))`); err != nil {
				t.Fatal(err)
			}
			if _, err := pool.Exec(t.Context(), `INSERT INTO leases (name, holder, expires_at, epoch) VALUES ('poll', 'old-replica', now(), 4)`); err != nil {
				t.Fatal(err)
			}
			s := openAs(t, url, "new-replica")
			ds, err := s.DirtyPatients(t.Context())
			if err != nil || len(ds) != 1 || ds[0].Subject != "Patient/old" || !ds[0].From.IsZero() || ds[0].Urgent {
				t.Fatalf("dirty marks after the upgrade: %+v, %v; want Patient/old, whole patient, not urgent", ds, err)
			}
			l, err := s.AcquireLease(t.Context(), "poll", time.Minute)
			if err != nil || l.Epoch != 5 {
				t.Fatalf("lease after the upgrade: %+v, %v; want taken over at epoch 5", l, err)
			}
			var version int
			if err := pool.QueryRow(t.Context(), "SELECT max(version) FROM schema_migrations").Scan(&version); err != nil || version != SchemaVersion() {
				t.Fatalf("schema version %d, %v; want %d", version, err, SchemaVersion())
			}
		})
	}
}
