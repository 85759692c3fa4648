package engine_test

import (
	"context"
	"encoding/json"
	"fmt"
	"log/slog"
	"net/http"
	"net/http/httptest"
	"net/http/httputil"
	"net/url"
	"strings"
	"sync"
	"sync/atomic"
	"testing"
	"time"

	"github.com/deadspace-fhir/deadspace/api/engine"
	"github.com/deadspace-fhir/deadspace/api/engine/enginetest"
	"github.com/deadspace-fhir/deadspace/api/store"
	"github.com/deadspace-fhir/deadspace/api/store/pgstore"
	"github.com/deadspace-fhir/deadspace/api/store/pgstore/pgtest"
	"github.com/deadspace-fhir/deadspace/derive"
	"github.com/deadspace-fhir/deadspace/fhir/client"
	"github.com/deadspace-fhir/deadspace/fhir/decode"
	"github.com/deadspace-fhir/deadspace/fhir/fhirtest/fakefhir"
	"github.com/deadspace-fhir/deadspace/fhir/notify"
)

// replicaStore is one replica's PostgreSQL store. crashed makes it leave
// its leases behind on shutdown, as a replica killed with SIGKILL does.
type replicaStore struct {
	*pgstore.Store
	crashed atomic.Bool
}

func (r *replicaStore) ReleaseLease(ctx context.Context, name string) error {
	if r.crashed.Load() {
		return nil
	}
	return r.Store.ReleaseLease(ctx, name)
}

// pgReplica is an engine with a store of its own on a shared database,
// sending its requests with its name as the User-Agent.
type pgReplica struct {
	name string
	st   *replicaStore
	eng  *engine.Engine
	stop func()
}

func startPGReplica(t *testing.T, dbURL, baseURL, name string, tweak func(*engine.Config)) *pgReplica {
	t.Helper()
	ps, err := pgstore.Open(context.Background(), dbURL, pgstore.Options{Holder: name})
	if err != nil {
		t.Fatal(err)
	}
	r := &pgReplica{name: name, st: &replicaStore{Store: ps}}
	enc := enginetest.Encoder(t)
	cl, err := client.New(client.Config{BaseURL: baseURL, UserAgent: name, MaxRetries: -1})
	if err != nil {
		t.Fatal(err)
	}
	cfg := engine.Config{
		Store: r.st, Decoder: decode.New(decode.Options{}), Encoder: enc, Derive: derive.DefaultConfig(), Client: cl,
		PollInterval: 100 * time.Millisecond, JobLease: time.Second, Logger: slog.New(slog.NewTextHandler(tWriter{t, name}, nil)),
	}
	if tweak != nil {
		tweak(&cfg)
	}
	r.eng, err = engine.New(cfg)
	if err != nil {
		t.Fatal(err)
	}
	ctx, cancel := context.WithCancel(context.Background())
	done := make(chan struct{})
	go func() {
		defer close(done)
		_ = r.eng.Run(ctx)
	}()
	var once sync.Once
	r.stop = func() {
		once.Do(func() {
			cancel()
			<-done
			ps.Close()
		})
	}
	t.Cleanup(r.stop)
	return r
}

// searchesBy counts the Observation searches each replica sent.
func searchesBy(f *fakefhir.Server) map[string]int {
	n := map[string]int{}
	for _, r := range f.Requests() {
		if r.Method == http.MethodGet && r.Path == "Observation" {
			n[r.Header.Get("User-Agent")]++
		}
	}
	return n
}

func waitUntil(t *testing.T, what string, cond func() bool) {
	t.Helper()
	deadline := time.Now().Add(30 * time.Second)
	for !cond() {
		if time.Now().After(deadline) {
			t.Fatalf("timed out waiting for %s", what)
		}
		time.Sleep(20 * time.Millisecond)
	}
}

// Three engines on one PostgreSQL database, each polling every 100 ms:
// only the replica holding the catch-up lease searches the server. When it
// stops, another takes polling over; when that one dies without giving
// the lease up, the third takes over once the lease lapses, and finds
// what the server received while no replica was polling.
func TestOneReplicaPollsAndAnotherTakesOver(t *testing.T) {
	f := fakefhir.Start(t)
	dbURL := pgtest.NewDatabase(t)
	at := time.Now().Add(-time.Hour).Truncate(time.Minute)
	put := func(i int) {
		t.Helper()
		if _, err := f.Put(obs(fmt.Sprintf("et%d", i), "1", "final", "19891-1", "mm[Hg]", 36, at.Add(time.Duration(i)*time.Minute), at)); err != nil {
			t.Fatal(err)
		}
	}
	for i := range 5 {
		put(i)
	}
	replicas := map[string]*pgReplica{}
	for _, name := range []string{"replica-a", "replica-b", "replica-c"} {
		replicas[name] = startPGReplica(t, dbURL, f.BaseURL, name, nil)
	}
	// The test's own view of the database, open while replicas stop.
	anyStore, err := pgstore.Open(context.Background(), dbURL, pgstore.Options{Holder: "test"})
	if err != nil {
		t.Fatal(err)
	}
	defer anyStore.Close()
	stored := func(n int) func() bool {
		return func() bool {
			in, err := anyStore.Inputs(context.Background(), "Patient/w1")
			return err == nil && len(in) == n
		}
	}
	// pollsOnlyBy waits until holder has searched three more times, and
	// checks that no other replica searched meanwhile.
	pollsOnlyBy := func(phase string, before map[string]int) string {
		t.Helper()
		var holder string
		waitUntil(t, phase+": a replica polling", func() bool {
			now := searchesBy(f)
			for name, n := range now {
				if n >= before[name]+3 {
					holder = name
					return true
				}
			}
			return false
		})
		for name, n := range searchesBy(f) {
			if name != holder && n != before[name] {
				t.Errorf("%s: %s searched %d times while %s held the lease", phase, name, n-before[name], holder)
			}
		}
		return holder
	}

	waitUntil(t, "the start-up catch-up", stored(5))
	first := pollsOnlyBy("three replicas started", map[string]int{})

	// The holder stops and gives the lease up; another replica polls and
	// takes in what arrives next.
	replicas[first].stop()
	afterStop := searchesBy(f)
	put(5)
	waitUntil(t, "the new holder's catch-up", stored(6))
	second := pollsOnlyBy("after the first holder stopped", afterStop)
	if second == first {
		t.Fatalf("%s searched after it stopped", first)
	}

	// The second holder dies without giving the lease up; data arrives
	// while nobody polls; the last replica takes over after the lease
	// lapses and catches up from the shared cursor.
	replicas[second].st.crashed.Store(true)
	replicas[second].stop()
	afterCrash := searchesBy(f)
	put(6)
	put(7)
	waitUntil(t, "the catch-up after the lease lapsed", stored(8))
	third := pollsOnlyBy("after the second holder died", afterCrash)
	if third == first || third == second {
		t.Fatalf("%s searched after it stopped", third)
	}
	l, err := anyStore.Lease(context.Background(), "catch-up")
	if err != nil {
		t.Fatal(err)
	}
	if l.Holder != third || l.Epoch < 3 {
		t.Errorf("catch-up lease %+v: want held by %s in its third epoch or later", l, third)
	}
}

// A replica that does not hold the lease passes a gap it noticed on to
// the holder, which searches at once rather than at its next poll.
func TestGapNoticedByAnotherReplicaIsCaughtUpByTheHolder(t *testing.T) {
	f := fakefhir.Start(t)
	dbURL := pgtest.NewDatabase(t)
	at := time.Now().Add(-time.Hour).Truncate(time.Minute)
	// No polling: only start-up, gaps and forwarded requests search.
	noPoll := func(c *engine.Config) { c.PollInterval = 0 }
	a := startPGReplica(t, dbURL, f.BaseURL, "replica-a", noPoll)
	waitUntil(t, "the start-up catch-up", func() bool { return searchesBy(f)["replica-a"] == 1 })
	b := startPGReplica(t, dbURL, f.BaseURL, "replica-b", noPoll)
	if _, err := f.Put(obs("et1", "1", "final", "19891-1", "mm[Hg]", 36, at, at)); err != nil {
		t.Fatal(err)
	}
	// b is told of event 1, then event 5: events 2 to 4 never came.
	for _, n := range []uint64{1, 5} {
		if err := b.eng.Notified(context.Background(), notification(n)); err != nil {
			t.Fatal(err)
		}
	}
	waitUntil(t, "the holder's catch-up of the gap", func() bool {
		in, err := a.st.Inputs(context.Background(), "Patient/w1")
		return err == nil && len(in) == 1
	})
	if n := searchesBy(f)["replica-b"]; n != 0 {
		t.Errorf("replica-b, not holding the lease, searched %d times", n)
	}
}

// Two engines on one PostgreSQL database evaluating one patient over and
// over while new versions arrive: their evaluations never overlap (each
// claims the patient), and every change of a value is still queued once.
func TestEvaluationsOfAPatientDoNotOverlapAcrossReplicas(t *testing.T) {
	f := fakefhir.Start(t)
	dbURL := pgtest.NewDatabase(t)
	track := &overlaps{open: map[string]bool{}}
	var engines []*engine.Engine
	var stores []store.Store
	for _, name := range []string{"replica-a", "replica-b"} {
		ps, err := pgstore.Open(context.Background(), dbURL, pgstore.Options{Holder: name})
		if err != nil {
			t.Fatal(err)
		}
		t.Cleanup(func() { ps.Close() })
		st := &trackedStore{Store: ps, name: name, track: track}
		stores = append(stores, st)
		engines = append(engines, newEngine(t, st, f.BaseURL))
	}
	ctx := context.Background()
	at := time.Now().Add(-time.Hour).Truncate(time.Minute)
	updated := at.Add(10 * time.Minute)
	var inputs []json.RawMessage
	for m := -2; m <= 2; m++ {
		inputs = append(inputs, obs(fmt.Sprintf("et%d", m+2), "1", "final", "19891-1", "mm[Hg]", 36, at.Add(time.Duration(m)*time.Minute), updated))
	}
	if _, err := engines[0].Ingest(ctx, "test", inputs); err != nil {
		t.Fatal(err)
	}
	for round := range 3 {
		v := obs("gas", fmt.Sprint(round+1), "final", "2019-8", "mm[Hg]", 44+float64(round)*3, at, updated.Add(time.Duration(round)*time.Minute))
		before, err := stores[0].LastEvent(ctx)
		if err != nil {
			t.Fatal(err)
		}
		depth := outboxDepth(t, stores[0])
		if _, err := engines[1].Ingest(ctx, "test", []json.RawMessage{v}); err != nil {
			t.Fatal(err)
		}
		start := make(chan struct{})
		var wg sync.WaitGroup
		for i := range 8 {
			eng := engines[i%2]
			wg.Go(func() {
				<-start
				if err := eng.EvaluateNow(ctx); err != nil {
					t.Error(err)
				}
			})
		}
		close(start)
		wg.Wait()
		for _, eng := range engines {
			if err := eng.EvaluateNow(ctx); err != nil {
				t.Fatal(err)
			}
		}
		if dirty, err := stores[0].DirtyPatients(ctx); err != nil || len(dirty) != 0 {
			t.Fatalf("round %d: still dirty after both evaluated: %v %v", round+1, dirty, err)
		}
		after, err := stores[0].LastEvent(ctx)
		if err != nil {
			t.Fatal(err)
		}
		if got := after - before; got != 2 {
			t.Errorf("version %d: %d feed events, want 2", round+1, got)
		}
		if got := outboxDepth(t, stores[0]) - depth; got != 1 {
			t.Errorf("version %d: %d writes queued, want 1", round+1, got)
		}
	}
	track.mu.Lock()
	defer track.mu.Unlock()
	if track.evaluations < 3 {
		t.Fatalf("%d evaluations seen; the test no longer sees the engine's reads", track.evaluations)
	}
	if track.overlapped > 0 {
		t.Errorf("%d of %d evaluations read the patient while another replica's evaluation of it was in progress", track.overlapped, track.evaluations)
	}
}

// overlaps records, per replica and patient, when an evaluation is in
// progress: from its read of the patient's ledger until its commit is
// called (by then its claim is still held: the claim ends inside the
// commit) or its claim is given up.
type overlaps struct {
	mu          sync.Mutex
	open        map[string]bool // replica + " " + subject
	evaluations int
	overlapped  int
}

type trackedStore struct {
	*pgstore.Store
	name  string
	track *overlaps
}

// Ledger and EntriesBetween are an evaluation's read of the patient's
// ledger, whole or from a time on (see the engine's ledgerFor).
func (s *trackedStore) Ledger(ctx context.Context, subject string) ([]store.Entry, error) {
	s.begin(subject)
	return s.Store.Ledger(ctx, subject)
}

func (s *trackedStore) EntriesBetween(ctx context.Context, subject string, from, to time.Time, after string, limit int) ([]store.Entry, error) {
	s.begin(subject)
	return s.Store.EntriesBetween(ctx, subject, from, to, after, limit)
}

func (s *trackedStore) begin(subject string) {
	s.track.mu.Lock()
	key := s.name + " " + subject
	if !s.track.open[key] {
		s.track.evaluations++
		for k, open := range s.track.open {
			if open && k != key && k[len(k)-len(subject):] == subject {
				s.track.overlapped++
			}
		}
		s.track.open[key] = true
	}
	s.track.mu.Unlock()
	// Hold the evaluation open long enough for the other replica to try.
	time.Sleep(20 * time.Millisecond)
}

func (s *trackedStore) end(subject string) {
	s.track.mu.Lock()
	delete(s.track.open, s.name+" "+subject)
	s.track.mu.Unlock()
}

func (s *trackedStore) Commit(ctx context.Context, c store.Change, now time.Time) error {
	s.end(c.Subject)
	return s.Store.Commit(ctx, c, now)
}

func (s *trackedStore) ReleaseClaim(ctx context.Context, subject string) error {
	s.end(subject)
	return s.Store.ReleaseClaim(ctx, subject)
}

// notification is a subscription status naming one event number.
func notification(number uint64) notify.Notification {
	return notify.Notification{Subscription: "Subscription/s1", Events: []notify.Event{{Number: number}}}
}

type tWriter struct {
	t    *testing.T
	name string
}

func (w tWriter) Write(p []byte) (int, error) {
	w.t.Log(w.name, strings.TrimSpace(string(p)))
	return len(p), nil
}

// A write whose send outlasts the write lease (the server holds the
// transaction) stays with the replica sending it: that replica renews its
// claim while the send runs, so another replica asking for due writes the
// whole time is never handed it, and the server receives the transaction
// once. Without the renewal the second replica takes the write over after
// one lease and sends the same conditional creates at the same moment.
func TestSlowSendKeepsItsClaim(t *testing.T) {
	f := fakefhir.Start(t)
	target, err := url.Parse(f.BaseURL)
	if err != nil {
		t.Fatal(err)
	}
	const lease = time.Second
	var transactions atomic.Int64
	proxy := httputil.NewSingleHostReverseProxy(&url.URL{Scheme: target.Scheme, Host: target.Host})
	slow := httptest.NewServer(http.HandlerFunc(func(w http.ResponseWriter, r *http.Request) {
		if r.Method == http.MethodPost && strings.TrimSuffix(r.URL.Path, "/") == target.Path {
			transactions.Add(1)
			time.Sleep(3 * lease) // the server holds the transaction
		}
		proxy.ServeHTTP(w, r)
	}))
	t.Cleanup(slow.Close)
	base := slow.URL + target.Path

	dbURL := pgtest.NewDatabase(t)
	var engines []*engine.Engine
	for _, name := range []string{"replica-a", "replica-b"} {
		ps, err := pgstore.Open(context.Background(), dbURL, pgstore.Options{Holder: name, WriteLease: lease})
		if err != nil {
			t.Fatal(err)
		}
		t.Cleanup(func() { ps.Close() })
		engines = append(engines, newEngine(t, ps, base))
	}
	ctx := context.Background()
	at := time.Now().Add(-time.Hour).Truncate(time.Minute)
	updated := at.Add(10 * time.Minute)
	inputs := []json.RawMessage{obs("gas", "1", "final", "2019-8", "mm[Hg]", 45, at, updated)}
	for m := -2; m <= 2; m++ {
		inputs = append(inputs, obs(fmt.Sprintf("et%d", m+2), "1", "final", "19891-1", "mm[Hg]", 36, at.Add(time.Duration(m)*time.Minute), updated))
	}
	if _, err := engines[0].Ingest(ctx, "test", inputs); err != nil {
		t.Fatal(err)
	}
	if err := engines[0].EvaluateNow(ctx); err != nil {
		t.Fatal(err)
	}

	sent := make(chan struct{})
	go func() {
		defer close(sent)
		engines[0].FlushNow(ctx)
	}()
	waitUntil(t, "replica A to send the transaction", func() bool { return transactions.Load() > 0 })
	// Replica B asks for due writes throughout A's send, well past A's
	// first lease.
	for {
		engines[1].FlushNow(ctx)
		select {
		case <-sent:
		case <-time.After(100 * time.Millisecond):
			continue
		}
		break
	}
	if n := transactions.Load(); n != 1 {
		t.Errorf("the server received %d transactions for one write, want 1", n)
	}
	if n := len(f.Current("Provenance")); n != 1 {
		t.Errorf("%d Provenance on the server, want 1", n)
	}
}
