package serve_test

import (
	"context"
	"encoding/json"
	"errors"
	"flag"
	"io"
	"net/http"
	neturl "net/url"
	"strings"
	"sync"
	"syscall"
	"testing"
	"time"

	"github.com/jackc/pgx/v5"
	"google.golang.org/grpc"
	"google.golang.org/grpc/credentials/insecure"

	"github.com/deadspace-fhir/deadspace/api/serve"
	"github.com/deadspace-fhir/deadspace/api/store/pgstore/pgtest"
	"github.com/deadspace-fhir/deadspace/fhir/fhirtest"
	pb "github.com/deadspace-fhir/deadspace/proto/deadspace/v1"
)

// envConfig is serve's configuration from the environment alone, as a
// container gets it.
func envConfig(env map[string]string) (serve.Config, error) {
	fs := flag.NewFlagSet("serve", flag.ContinueOnError)
	fs.SetOutput(io.Discard)
	var cfg serve.Config
	cfg.Bind(fs)
	if err := fs.Parse(nil); err != nil {
		return cfg, err
	}
	err := cfg.ApplyEnv(fs, func(k string) string { return env[k] })
	return cfg, errors.Join(err, cfg.Validate())
}

// --store picks the store; a refusal names what is wrong without echoing
// the URL, which may carry a password.
func TestStoreSetting(t *testing.T) {
	const password = "hunter2-do-not-print"
	tests := []struct {
		name  string
		env   map[string]string
		valid bool
	}{
		{"embedded by default", map[string]string{}, true},
		{"postgres URL", map[string]string{"DEADSPACE_STORE": "postgres://deadspace:" + password + "@db:5432/deadspace?sslmode=verify-full"}, true},
		{"postgresql scheme", map[string]string{"DEADSPACE_STORE": "postgresql://db/deadspace"}, true},
		{"other scheme", map[string]string{"DEADSPACE_STORE": "mysql://deadspace:" + password + "@db/deadspace"}, false},
		{"not a URL", map[string]string{"DEADSPACE_STORE": "postgres://deadspace:" + password + "@db:port/x"}, false},
	}
	for _, tc := range tests {
		t.Run(tc.name, func(t *testing.T) {
			env := map[string]string{"DEADSPACE_WEBHOOK_SECRET": strings.Repeat("s", 32)}
			for k, v := range tc.env {
				env[k] = v
			}
			cfg, err := envConfig(env)
			if tc.valid && err != nil {
				t.Fatalf("refused: %v", err)
			}
			if !tc.valid && err == nil {
				t.Fatalf("accepted %v", tc.env)
			}
			if err != nil && strings.Contains(err.Error(), password) {
				t.Errorf("the refusal prints the password: %v", err)
			}
			if want := env["DEADSPACE_STORE"]; cfg.Store != want {
				t.Errorf("Store = %q, want %q", cfg.Store, want)
			}
		})
	}
}

// Three replicas on one PostgreSQL database, each finding the same data by
// its start-up search, and the same notification delivered to two of
// them, twice each (a sender retrying against another replica behind the load
// balancer): the FHIR server ends with one of each derived Observation and
// one Provenance, nothing is left to do on any replica, and a gRPC watcher
// on the third replica sees each derivation once.
func TestReplicasOnPostgreSQLWriteOnce(t *testing.T) {
	peer := fhirtest.Start(t)
	url := pgtest.NewSchema(t)
	// The bed exists before the replicas start, and its data settles for a
	// second before it is derived: each replica's start-up search, in
	// pages, and the notifications then bring the same whole bed, rather
	// than a part that later input would amend (a second write, rightly,
	// with a second Provenance).
	b := newBed(t, peer, time.Now().Add(-30*time.Minute), true)
	var replicas []*service
	for range 3 {
		cfg := testConfig(peer.BaseURL, "")
		cfg.Store = url
		cfg.Settle = time.Second
		replicas = append(replicas, start(t, cfg))
	}
	// A watcher on the last replica, which is never sent a notification.
	conn, err := grpc.NewClient(replicas[2].svc.GRPCAddr(), grpc.WithTransportCredentials(insecure.NewCredentials()))
	if err != nil {
		t.Fatal(err)
	}
	defer conn.Close()
	watchCtx, stopWatch := context.WithTimeout(t.Context(), 2*time.Minute)
	defer stopWatch()
	stream, err := pb.NewDeadSpaceClient(conn).WatchDerivations(watchCtx, &pb.WatchDerivationsRequest{FromStart: true})
	if err != nil {
		t.Fatal(err)
	}

	note := notification("Subscription/r", 1, b.resources)
	for round := range 2 {
		for i, s := range replicas[:2] {
			if code, body := post(t, s.url, http.MethodPost, "/notify", note, secret); code != http.StatusOK {
				t.Fatalf("round %d, replica %d: HTTP %d: %s", round, i, code, body)
			}
		}
	}
	for _, s := range replicas {
		waitIdle(t, s)
	}
	st := stateOf(t, peer)
	if n := len(st.derivedFor(b.subject)); n != wantValues || len(st.provenances) != 1 || st.devices != 1 {
		t.Fatalf("%d derived, %d Provenance, %d Device; want %d, 1, 1", n, len(st.provenances), st.devices, wantValues)
	}
	for i, s := range replicas {
		if code := readyz(t, s.url, nil); code != http.StatusOK {
			t.Errorf("replica %d: /readyz %d", i, code)
		}
	}
	// The third replica's watcher sees every derivation the other two
	// committed, each once.
	seen := map[string]int{}
	for len(seen) < wantValues {
		msg, err := stream.Recv()
		if err != nil {
			t.Fatalf("watch on the third replica after %d series: %v", len(seen), err)
		}
		if ev := msg.GetEvent(); ev != nil {
			if ev.GetSubject() != b.subject {
				t.Fatalf("event for %s, want %s", ev.GetSubject(), b.subject)
			}
			seen[ev.GetSeries()]++
		}
	}
	for series, n := range seen {
		if n != 1 {
			t.Errorf("series %s watched %d times", series, n)
		}
	}
}

// /readyz includes the database: a replica whose database goes away leaves
// the load balancer's endpoints, while /healthz (liveness) stays up so the
// replica is not restarted for an outage that is not its own.
func TestReadinessFollowsTheDatabase(t *testing.T) {
	dbURL := pgtest.NewDatabase(t)
	cfg := testConfig("", "")
	cfg.Store = dbURL
	s := start(t, cfg)
	waitFor(t, "ready", func() bool { return readyz(t, s.url, nil) == http.StatusOK })

	// The database disappears under the running service.
	u, err := neturl.Parse(dbURL)
	if err != nil {
		t.Fatal(err)
	}
	admin, err := pgx.Connect(t.Context(), pgtest.ServerURL(t))
	if err != nil {
		t.Fatal(err)
	}
	defer admin.Close(context.Background())
	if _, err := admin.Exec(t.Context(), "DROP DATABASE "+pgx.Identifier{strings.TrimPrefix(u.Path, "/")}.Sanitize()+" WITH (FORCE)"); err != nil {
		t.Fatal(err)
	}
	waitFor(t, "not ready without the database", func() bool { return readyz(t, s.url, nil) == http.StatusServiceUnavailable })
	resp, err := http.Get(s.url + "/healthz")
	if err != nil {
		t.Fatal(err)
	}
	resp.Body.Close()
	if resp.StatusCode != http.StatusOK {
		t.Errorf("/healthz = %d without the database; liveness must not depend on it", resp.StatusCode)
	}
}

// The failure test across replicas: three `serve` processes on one
// PostgreSQL database and the Medplum peer; two senders spread the beds'
// notifications over them, each bed to two replicas (duplicates); one
// replica is killed with SIGKILL in the middle of the burst and another is
// restarted; what was not acknowledged is sent again to a live replica.
// The peer ends with every derived Observation once and one Provenance per
// bed, and nothing is left in the outbox (the dead replica's claimed
// writes are taken over after the write lease).
func TestReplicasSurviveAKilledReplica(t *testing.T) {
	peer := fhirtest.Start(t)
	dbURL := pgtest.NewSchema(t)
	var beds []bed
	for range 6 {
		beds = append(beds, newBed(t, peer, time.Now().Add(-30*time.Minute), true))
	}
	env := []string{"DEADSPACE_STORE=" + dbURL, "DEADSPACE_STORE_WRITE_LEASE=3s", "DEADSPACE_SETTLE=1s"}
	replicas := make([]childProc, 3)
	for i := range replicas {
		replicas[i] = startChild(t, peer.BaseURL, "", env...)
	}
	type post struct {
		bed   int
		acked bool
	}
	var mu sync.Mutex
	var posts []post
	send := func(sender, offset int) {
		for i, b := range beds {
			if sender == 0 && i == len(beds)/2 {
				// Mid-burst: replica 0 dies without a word.
				if err := replicas[0].cmd.Process.Signal(syscall.SIGKILL); err != nil {
					t.Error(err)
				}
			}
			mu.Lock()
			r := replicas[(i+offset)%len(replicas)]
			mu.Unlock()
			code, _, err := tryPost(r.url, notification("Subscription/burst", 1+i*100, b.resources))
			mu.Lock()
			posts = append(posts, post{i, err == nil && code == http.StatusOK})
			mu.Unlock()
		}
	}
	var wg sync.WaitGroup
	wg.Go(func() { send(0, 0) })
	wg.Go(func() { send(1, 1) })
	wg.Wait()
	_ = replicas[0].cmd.Wait()

	// Replica 1 is restarted (a rolling upgrade).
	_ = replicas[1].cmd.Process.Signal(syscall.SIGTERM)
	_ = replicas[1].cmd.Wait()
	replicas[1] = startChild(t, peer.BaseURL, "", env...)

	// The senders redeliver what was not acknowledged, to a live replica.
	acked := make([]bool, len(beds))
	for _, p := range posts {
		acked[p.bed] = acked[p.bed] || p.acked
	}
	for i, b := range beds {
		if !acked[i] {
			if code, _, err := tryPost(replicas[2].url, notification("Subscription/burst", 1+i*100, b.resources)); err != nil || code != http.StatusOK {
				t.Fatalf("redelivery of bed %d: %v %d", i, err, code)
			}
		}
	}
	waitFor(t, "the replicas to drain the shared outbox", func() bool {
		resp, err := http.Get(replicas[2].url + "/readyz")
		if err != nil {
			return false
		}
		defer resp.Body.Close()
		var r struct{ OutboxDepth, PendingPatients int }
		return json.NewDecoder(resp.Body).Decode(&r) == nil && r.OutboxDepth == 0 && r.PendingPatients == 0
	})
	st := stateOf(t, peer)
	for _, b := range beds {
		if n := len(st.derivedFor(b.subject)); n != wantValues {
			t.Errorf("%s: %d derived values, want %d", b.subject, n, wantValues)
		}
	}
	if len(st.provenances) != len(beds) || st.devices != 1 {
		t.Errorf("%d Provenance and %d Device, want %d and 1", len(st.provenances), st.devices, len(beds))
	}
	for _, r := range replicas[1:] {
		_ = r.cmd.Process.Signal(syscall.SIGTERM)
		_ = r.cmd.Wait()
	}
}
