package serve_test

// Integration tests of the live service against an independent FHIR server
// implementation: Medplum's FHIR router over its in-memory repository
// (testdata/node/server.mjs), which each test starts on 127.0.0.1. The
// service under test is the real one: embedded store on disk, real HTTP,
// real transactions.

import (
	"bufio"
	"bytes"
	"context"
	"encoding/json"
	"fmt"
	"io"
	"log/slog"
	"net/http"
	"net/http/httptest"
	"net/url"
	"os"
	"os/exec"
	"path/filepath"
	"strings"
	"sync"
	"sync/atomic"
	"syscall"
	"testing"
	"time"

	"github.com/deadspace-fhir/deadspace/api/engine"
	"github.com/deadspace-fhir/deadspace/api/logredact"
	"github.com/deadspace-fhir/deadspace/api/serve"
	"github.com/deadspace-fhir/deadspace/api/settings"
	"github.com/deadspace-fhir/deadspace/fhir/encode"
	"github.com/deadspace-fhir/deadspace/fhir/fhirtest"
)

const secret = "integration-secret-0123456789"

// childEnv makes the test binary run the service instead of the tests, so a
// test can kill it with SIGKILL.
const childEnv = "DEADSPACE_SERVE_TEST_CHILD"

func TestMain(m *testing.M) {
	if os.Getenv(childEnv) != "" {
		os.Exit(runChild())
	}
	code := m.Run()
	fhirtest.StopShared()
	os.Exit(code)
}

// runChild runs the service from DEADSPACE_* variables and prints its
// address, as deadspace serve would run.
func runChild() int {
	cfg := testConfig(os.Getenv("DEADSPACE_FHIR_BASE"), os.Getenv("DEADSPACE_DATA_DIR"))
	// Replicas on PostgreSQL (store_test.go).
	cfg.Store = os.Getenv("DEADSPACE_STORE")
	if d, err := time.ParseDuration(os.Getenv("DEADSPACE_STORE_WRITE_LEASE")); err == nil {
		cfg.StoreLease = d
	}
	if d, err := time.ParseDuration(os.Getenv("DEADSPACE_SETTLE")); err == nil {
		cfg.Settle = d
	}
	svc, err := serve.New(cfg, "test", slog.New(slog.NewJSONHandler(os.Stderr, nil)))
	if err != nil {
		fmt.Fprintln(os.Stderr, err)
		return 1
	}
	fmt.Printf("listening %s\n", svc.Addr())
	ctx, stop := context.WithCancel(context.Background())
	defer stop()
	if err := svc.Run(ctx); err != nil {
		fmt.Fprintln(os.Stderr, err)
		return 1
	}
	return 0
}

func testConfig(base, dir string) serve.Config {
	return serve.Config{
		FHIRBase: base, Listen: "127.0.0.1:0", DataDir: dir, WebhookSecret: secret, WebhookHeader: "Authorization",
		MaxBodyBytes: 4 << 20, Settle: 0, DevicePace: engine.DefaultDevicePace, Retention: 24 * time.Hour, LogLevel: "info",
		GRPCListen: "127.0.0.1:0", MaxTxEntries: 8, MaxConcurrent: 256, StoreLease: 2 * time.Minute,
		Derivation: settings.Defaults(),
	}
}

// service is a running service under test.
type service struct {
	t    *testing.T
	svc  *serve.Service
	url  string
	stop func()
	logs *syncBuffer
}

func start(t *testing.T, cfg serve.Config) *service {
	t.Helper()
	logs := &syncBuffer{}
	// The logger main builds: JSON through the one redacting handler.
	var level slog.Level
	_ = level.UnmarshalText([]byte(cfg.LogLevel))
	svc, err := serve.New(cfg, "test", logredact.NewLogger(logs, level))
	if err != nil {
		t.Fatal(err)
	}
	ctx, cancel := context.WithCancel(context.Background())
	done := make(chan error, 1)
	go func() { done <- svc.Run(ctx) }()
	s := &service{t: t, svc: svc, url: "http://" + svc.Addr()}
	var once sync.Once
	s.stop = func() {
		once.Do(func() {
			cancel()
			if err := <-done; err != nil {
				t.Errorf("service stopped with %v", err)
			}
		})
	}
	t.Cleanup(func() {
		s.stop()
		if t.Failed() {
			t.Logf("service logs:\n%s", logs.String())
		}
	})
	s.logs = logs
	return s
}

type syncBuffer struct {
	mu  sync.Mutex
	buf bytes.Buffer
}

func (b *syncBuffer) String() string {
	b.mu.Lock()
	defer b.mu.Unlock()
	return b.buf.String()
}

func (b *syncBuffer) Write(p []byte) (int, error) {
	b.mu.Lock()
	defer b.mu.Unlock()
	return b.buf.Write(p)
}

// post sends a webhook request and returns the status and body.
func post(t *testing.T, base, method, path string, body []byte, auth string) (int, string) {
	t.Helper()
	req, err := http.NewRequest(method, base+path, bytes.NewReader(body))
	if err != nil {
		t.Fatal(err)
	}
	req.Header.Set("Content-Type", "application/fhir+json")
	if auth != "" {
		req.Header.Set("Authorization", "Bearer "+auth)
	}
	resp, err := http.DefaultClient.Do(req)
	if err != nil {
		t.Fatalf("%s %s: %v", method, path, err)
	}
	defer resp.Body.Close()
	b, _ := io.ReadAll(resp.Body)
	return resp.StatusCode, string(b)
}

// bed is one invented patient's inputs, created on the FHIR server.
type bed struct {
	patient   json.RawMessage
	subject   string
	gas       json.RawMessage
	gasID     string
	readings  []json.RawMessage
	resources []json.RawMessage // everything, patient first
}

func create(t *testing.T, peer *fhirtest.Server, resource string) (json.RawMessage, string) {
	t.Helper()
	status, _, body := peer.Do(t, http.MethodPost, strings.SplitN(strings.SplitN(resource, `"resourceType":"`, 2)[1], `"`, 2)[0], []byte(resource), nil)
	if status != http.StatusCreated {
		t.Fatalf("create: HTTP %d: %s", status, body)
	}
	var r struct{ ID string }
	if err := json.Unmarshal(body, &r); err != nil || r.ID == "" {
		t.Fatalf("create: %v %s", err, body)
	}
	return body, r.ID
}

func observation(subject, system, code, unit string, value float64, at time.Time, status string) string {
	return fmt.Sprintf(`{"resourceType":"Observation","status":"%s","code":{"coding":[{"system":"%s","code":"%s"}]},`+
		`"subject":{"reference":"%s"},"effectiveDateTime":"%s",`+
		`"valueQuantity":{"value":%g,"unit":"%s","system":"http://unitsofmeasure.org","code":"%s"}}`,
		status, system, code, subject, at.UTC().Format(time.RFC3339), value, unit, unit)
}

// newBed creates a patient with a blood gas at sample time at and the
// ventilator and capnograph readings around it. The numbers are invented
// and plausible; these tests check plumbing, not physiology.
func newBed(t *testing.T, peer *fhirtest.Server, at time.Time, withGas bool) bed {
	t.Helper()
	var b bed
	b.patient, _ = create(t, peer, `{"resourceType":"Patient","gender":"female","birthDate":"1961-04-12"}`)
	var p struct{ ID string }
	_ = json.Unmarshal(b.patient, &p)
	b.subject = "Patient/" + p.ID
	b.resources = append(b.resources, b.patient)
	add := func(system, code, unit string, v float64, ts time.Time) {
		r, _ := create(t, peer, observation(b.subject, system, code, unit, v, ts, "final"))
		b.readings = append(b.readings, r)
		b.resources = append(b.resources, r)
	}
	add("http://loinc.org", "8302-2", "cm", 168, at.Add(-24*time.Hour))
	for m := -2; m <= 2; m++ {
		ts := at.Add(time.Duration(m) * time.Minute)
		add("http://loinc.org", "19891-1", "mm[Hg]", 34+float64(m%2), ts)
		add("http://loinc.org", "76222-9", "mL", 450, ts)
		add("http://loinc.org", "19840-8", "/min", 18, ts)
		add("http://loinc.org", "76008-2", "L/min", 8.1, ts)
		add("http://loinc.org", "60825-7", "mL/min", 220, ts)
	}
	if withGas {
		b.gas, b.gasID = create(t, peer, observation(b.subject, "http://loinc.org", "2019-8", "mm[Hg]", 44, at, "final"))
		b.resources = append(b.resources, b.gas)
	}
	return b
}

// notification is an R4 backport full-resource event notification: a
// history Bundle whose first entry is the subscription status Parameters
// (HL7 FHIR Subscriptions R5 Backport IG, STU 1.1.0), then one entry per
// resource.
func notification(sub string, firstEvent int, resources []json.RawMessage) []byte {
	var events []string
	var entries []string
	for i, r := range resources {
		var id struct{ ResourceType, ID string }
		_ = json.Unmarshal(r, &id)
		ref := id.ResourceType + "/" + id.ID
		events = append(events, fmt.Sprintf(`{"name":"notification-event","part":[{"name":"event-number","valueString":"%d"},{"name":"focus","valueReference":{"reference":"%s"}}]}`, firstEvent+i, ref))
		entries = append(entries, fmt.Sprintf(`{"fullUrl":"http://fhir.invalid/%s","resource":%s,"request":{"method":"PUT","url":"%s"},"response":{"status":"200"}}`, ref, r, ref))
	}
	last := firstEvent + len(resources) - 1
	status := fmt.Sprintf(`{"fullUrl":"urn:uuid:5e1f7c1a-0000-4000-8000-00000000000%d","resource":{"resourceType":"Parameters","parameter":[`+
		`{"name":"subscription","valueReference":{"reference":"%s"}},{"name":"status","valueCode":"active"},`+
		`{"name":"type","valueCode":"event-notification"},{"name":"events-since-subscription-start","valueString":"%d"}%s]},`+
		`"request":{"method":"GET","url":"%s/$status"},"response":{"status":"200"}}`,
		firstEvent%10, sub, last, prefixComma(events), sub)
	return []byte(`{"resourceType":"Bundle","type":"history","entry":[` + status + prefixComma(entries) + `]}`)
}

func prefixComma(parts []string) string {
	if len(parts) == 0 {
		return ""
	}
	return "," + strings.Join(parts, ",")
}

// serverState is what the FHIR server holds that deadspace wrote.
type serverState struct {
	derived     []map[string]any
	provenances []map[string]any
	devices     int
}

func stateOf(t *testing.T, peer *fhirtest.Server) serverState {
	t.Helper()
	var st serverState
	for _, raw := range peer.Search(t, "Observation?_count=1000") {
		var m map[string]any
		_ = json.Unmarshal(raw, &m)
		if ids, ok := m["identifier"].([]any); ok && len(ids) > 0 {
			if id, _ := ids[0].(map[string]any); id["system"] == encode.DefaultIdentifierSystem {
				st.derived = append(st.derived, m)
			}
		}
	}
	for _, raw := range peer.Search(t, "Provenance?_count=1000") {
		var m map[string]any
		_ = json.Unmarshal(raw, &m)
		st.provenances = append(st.provenances, m)
	}
	st.devices = len(peer.Search(t, "Device?_count=1000"))
	return st
}

func (st serverState) derivedFor(subject string) []map[string]any {
	var out []map[string]any
	for _, m := range st.derived {
		if s, _ := m["subject"].(map[string]any); s["reference"] == subject {
			out = append(out, m)
		}
	}
	return out
}

// waitFor polls cond until it holds or 3 minutes pass. The test peer is
// slow at conditional creates (its in-memory search scans every resource),
// so the bound is generous; it is a hang detector, not a timing check.
func waitFor(t *testing.T, what string, cond func() bool) {
	t.Helper()
	deadline := time.Now().Add(3 * time.Minute)
	for !cond() {
		if time.Now().After(deadline) {
			t.Fatalf("timed out waiting for %s", what)
		}
		time.Sleep(100 * time.Millisecond)
	}
}

// waitIdle waits until the service has nothing pending: no patient to
// evaluate, an empty outbox, and every patient's left-out picture
// refreshed.
func waitIdle(t *testing.T, s *service) {
	t.Helper()
	waitFor(t, "the service to be idle", func() bool {
		h, err := s.svc.Engine().Health(context.Background())
		return err == nil && h.Stats.DirtyPatients == 0 && h.Stats.OutboxDepth == 0 && h.StalePictures == 0
	})
}

// wantValues is what a bed with every input gives: all values but the
// estimate (a measured VD/VT exists).
const wantValues = 8

func TestNotificationWritesDerivedObservationsWithProvenance(t *testing.T) {
	peer := fhirtest.Start(t)
	s := start(t, testConfig(peer.BaseURL, t.TempDir()))
	b := newBed(t, peer, time.Now().Add(-30*time.Minute), true)
	if code, body := post(t, s.url, http.MethodPost, "/notify", notification("Subscription/s1", 1, b.resources), secret); code != http.StatusOK {
		t.Fatalf("notify: HTTP %d: %s", code, body)
	}
	waitIdle(t, s)
	st := stateOf(t, peer)
	derived := st.derivedFor(b.subject)
	if len(derived) != wantValues || len(st.provenances) != 1 || st.devices != 1 {
		t.Fatalf("server holds %d derived, %d Provenance, %d Device; want %d, 1, 1", len(derived), len(st.provenances), st.devices, wantValues)
	}
	// Every reference the service wrote resolves on the server.
	var refs []string
	for _, m := range derived {
		for _, d := range m["derivedFrom"].([]any) {
			ref := d.(map[string]any)["reference"].(string)
			if !strings.Contains(ref, "/_history/") {
				t.Errorf("derivedFrom %q is not versioned", ref)
			}
			refs = append(refs, ref)
		}
		refs = append(refs, m["device"].(map[string]any)["reference"].(string), m["subject"].(map[string]any)["reference"].(string))
	}
	p := st.provenances[0]
	for _, tg := range p["target"].([]any) {
		refs = append(refs, tg.(map[string]any)["reference"].(string))
	}
	for _, en := range p["entity"].([]any) {
		refs = append(refs, en.(map[string]any)["what"].(map[string]any)["reference"].(string))
	}
	refs = append(refs, p["agent"].([]any)[0].(map[string]any)["who"].(map[string]any)["reference"].(string))
	for _, ref := range refs {
		if code, _, body := peer.Do(t, http.MethodGet, ref, nil, nil); code != http.StatusOK {
			t.Errorf("reference %s does not resolve: HTTP %d %.200s", ref, code, body)
		}
	}
	if n := len(p["target"].([]any)); n != wantValues {
		t.Errorf("Provenance has %d targets, want %d", n, wantValues)
	}
	// The CodeSystem of the derived codes was published once at start, so
	// a consumer resolves the code of every derived Observation (issue 8,
	// rule 14).
	system := derived[0]["code"].(map[string]any)["coding"].([]any)[0].(map[string]any)["system"].(string)
	// It is published beside the service, so it may trail the values.
	waitFor(t, "the CodeSystem to be published", func() bool { return codeSystems(t, peer, system) > 0 })
	if n := codeSystems(t, peer, system); n != 1 {
		t.Errorf("%d CodeSystem resources with url %s on the server, want 1", n, system)
	}
}

// codeSystems counts the server's CodeSystem resources with the url.
func codeSystems(t *testing.T, peer *fhirtest.Server, system string) int {
	t.Helper()
	code, _, body := peer.Do(t, http.MethodGet, "CodeSystem?url="+url.QueryEscape(system), nil, nil)
	if code != http.StatusOK {
		t.Fatalf("CodeSystem search: HTTP %d %.200s", code, body)
	}
	var b struct{ Entry []any }
	if err := json.Unmarshal(body, &b); err != nil {
		t.Fatal(err)
	}
	return len(b.Entry)
}

func TestRepeatsAndRestartsLeaveOneOfEach(t *testing.T) {
	peer := fhirtest.Start(t)
	dir := t.TempDir()
	b := newBed(t, peer, time.Now().Add(-30*time.Minute), true)
	note := notification("Subscription/s1", 1, b.resources)
	check := func(when string) {
		t.Helper()
		st := stateOf(t, peer)
		if n := len(st.derivedFor(b.subject)); n != wantValues || len(st.provenances) != 1 || st.devices != 1 {
			t.Fatalf("%s: %d derived, %d Provenance, %d Device; want %d, 1, 1", when, n, len(st.provenances), st.devices, wantValues)
		}
	}
	s := start(t, testConfig(peer.BaseURL, dir))
	for i := 0; i < 3; i++ {
		if code, body := post(t, s.url, http.MethodPost, "/notify", note, secret); code != http.StatusOK {
			t.Fatalf("notify %d: HTTP %d: %s", i, code, body)
		}
	}
	waitIdle(t, s)
	check("after three deliveries")
	s.stop()

	s = start(t, testConfig(peer.BaseURL, dir))
	post(t, s.url, http.MethodPost, "/notify", note, secret)
	waitIdle(t, s)
	check("after a restart and a redelivery")
	s.stop()

	// A fresh store replays everything: the start-up search finds every
	// input, the ledger is empty, so every write is sent again; the
	// conditional creates must still leave one of each.
	s = start(t, testConfig(peer.BaseURL, t.TempDir()))
	post(t, s.url, http.MethodPost, "/notify", note, secret)
	waitFor(t, "the replay to be written", func() bool {
		return s.svc.FHIRServerAnswered()
	})
	waitIdle(t, s)
	check("after a replay into an empty store")
	// Three starts published the CodeSystem once (conditional create).
	waitFor(t, "the CodeSystem to be published", func() bool { return codeSystems(t, peer, encode.DefaultCodeSystem) > 0 })
	if n := codeSystems(t, peer, encode.DefaultCodeSystem); n != 1 {
		t.Errorf("%d CodeSystem resources after three starts, want 1", n)
	}
}

func TestServerOutageThenRecovery(t *testing.T) {
	peer := fhirtest.Start(t)
	s := start(t, testConfig(peer.BaseURL, t.TempDir()))
	var beds []bed
	for i := 0; i < 3; i++ {
		beds = append(beds, newBed(t, peer, time.Now().Add(-40*time.Minute), true))
	}
	for i, b := range beds {
		post(t, s.url, http.MethodPost, "/notify", notification("Subscription/s2", 1000+i*100, b.resources), secret)
	}
	waitIdle(t, s)
	before := len(stateOf(t, peer).provenances)
	peer.Down()
	extra := newBedOffline(t, peer, beds)
	for i, b := range extra {
		if code, body := post(t, s.url, http.MethodPost, "/notify", notification("Subscription/s2", 1+i*100, b.resources), secret); code != http.StatusOK {
			t.Fatalf("notify during outage: HTTP %d: %s", code, body)
		}
	}
	waitFor(t, "a failed write", func() bool {
		h, _ := s.svc.Engine().Health(context.Background())
		return !h.OutboxBlockedSince.IsZero() && h.Stats.OutboxDepth > 0
	})
	peer.Up()
	waitIdle(t, s)
	st := stateOf(t, peer)
	for _, b := range append(beds, extra...) {
		if n := len(st.derivedFor(b.subject)); n != wantValues {
			t.Errorf("%s: %d derived values, want %d", b.subject, n, wantValues)
		}
	}
	if got, want := len(st.provenances)-before, len(extra); got != want {
		t.Errorf("%d Provenance written after the outage, want %d", got, want)
	}
}

// newBedOffline creates beds while the peer is down: it brings the peer up
// just long enough to create their inputs, then down again.
func newBedOffline(t *testing.T, peer *fhirtest.Server, _ []bed) []bed {
	peer.Up()
	var out []bed
	for i := 0; i < 2; i++ {
		out = append(out, newBed(t, peer, time.Now().Add(-20*time.Minute), true))
	}
	peer.Down()
	return out
}

func TestRetryAfterIsHonoured(t *testing.T) {
	peer := fhirtest.Start(t)
	s := start(t, testConfig(peer.BaseURL, t.TempDir()))
	waitFor(t, "the start-up catch-up", func() bool {
		return s.svc.FHIRServerAnswered()
	})
	waitIdle(t, s)
	b := newBed(t, peer, time.Now().Add(-30*time.Minute), true)
	peer.Reset()
	const retryAfter = 2
	peer.Fail(1, http.StatusTooManyRequests, retryAfter)
	sent := time.Now()
	if code, body := post(t, s.url, http.MethodPost, "/notify", notification("Subscription/s1", 1, b.resources), secret); code != http.StatusOK {
		t.Fatalf("notify: HTTP %d: %s", code, body)
	}
	waitIdle(t, s)
	// The write could not have reached the server before Retry-After had
	// passed since the 429, which came after the notification was sent.
	if elapsed := time.Since(sent); elapsed < retryAfter*time.Second {
		t.Errorf("derived values written %v after the notification, before Retry-After (%d s) had passed", elapsed, retryAfter)
	}
	if c := peer.Counts(); c.Total() < 2 {
		t.Errorf("peer saw %d requests, want the refused one and the retry", c.Total())
	}
	if n := len(stateOf(t, peer).derivedFor(b.subject)); n != wantValues {
		t.Errorf("%d derived values, want %d", n, wantValues)
	}
}

func TestKilledMidBurstLosesAndDoublesNothing(t *testing.T) {
	peer := fhirtest.Start(t)
	dir := t.TempDir()
	var beds []bed
	for i := 0; i < 6; i++ {
		beds = append(beds, newBed(t, peer, time.Now().Add(-30*time.Minute), true))
	}
	child := startChild(t, peer.BaseURL, dir)
	acked := make([]bool, len(beds))
	for i, b := range beds {
		if i == len(beds)/2 {
			if err := child.cmd.Process.Signal(syscall.SIGKILL); err != nil {
				t.Fatal(err)
			}
			_ = child.cmd.Wait()
		}
		code, _, err := tryPost(child.url, notification("Subscription/burst", 1+i*100, b.resources))
		acked[i] = err == nil && code == http.StatusOK
	}
	child = startChild(t, peer.BaseURL, dir)
	// A sender redelivers what was not acknowledged.
	for i, b := range beds {
		if !acked[i] {
			if code, _, err := tryPost(child.url, notification("Subscription/burst", 1+i*100, b.resources)); err != nil || code != http.StatusOK {
				t.Fatalf("redelivery %d: %v %d", i, err, code)
			}
		}
	}
	// Poll the child's readiness report rather than the FHIR server, so the
	// test does not compete with the service for the peer.
	waitFor(t, "the restarted service to drain", func() bool {
		resp, err := http.Get(child.url + "/readyz")
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
	_ = child.cmd.Process.Signal(syscall.SIGTERM)
	_ = child.cmd.Wait()
}

type childProc struct {
	cmd *exec.Cmd
	url string
}

func startChild(t *testing.T, base, dir string, env ...string) childProc {
	t.Helper()
	cmd := exec.Command(os.Args[0], "-test.run=^$")
	cmd.Env = append(append(os.Environ(), childEnv+"=1", "DEADSPACE_FHIR_BASE="+base, "DEADSPACE_DATA_DIR="+dir), env...)
	out, err := cmd.StdoutPipe()
	if err != nil {
		t.Fatal(err)
	}
	logPath := filepath.Join(t.TempDir(), "child.log")
	logFile, err := os.Create(logPath)
	if err != nil {
		t.Fatal(err)
	}
	cmd.Stderr = logFile
	if err := cmd.Start(); err != nil {
		t.Fatal(err)
	}
	t.Cleanup(func() {
		_ = cmd.Process.Kill()
		_ = cmd.Wait()
		logFile.Close()
		if t.Failed() {
			b, _ := os.ReadFile(logPath)
			t.Logf("child logs:\n%s", b)
		}
	})
	line, err := bufio.NewReader(out).ReadString('\n')
	if err != nil {
		t.Fatalf("child: %v", err)
	}
	addr := strings.TrimSpace(strings.TrimPrefix(line, "listening "))
	go func() { _, _ = io.Copy(io.Discard, out) }()
	return childProc{cmd: cmd, url: "http://" + addr}
}

func tryPost(base string, body []byte) (int, string, error) {
	req, err := http.NewRequest(http.MethodPost, base+"/notify", bytes.NewReader(body))
	if err != nil {
		return 0, "", err
	}
	req.Header.Set("Content-Type", "application/fhir+json")
	req.Header.Set("Authorization", "Bearer "+secret)
	resp, err := (&http.Client{Timeout: 10 * time.Second}).Do(req)
	if err != nil {
		return 0, "", err
	}
	defer resp.Body.Close()
	b, _ := io.ReadAll(resp.Body)
	return resp.StatusCode, string(b), nil
}

func TestCorrectionsCarryThrough(t *testing.T) {
	peer := fhirtest.Start(t)
	s := start(t, testConfig(peer.BaseURL, t.TempDir()))
	b := newBed(t, peer, time.Now().Add(-30*time.Minute), true)
	post(t, s.url, http.MethodPost, "/notify", notification("Subscription/s1", 1, b.resources), secret)
	waitIdle(t, s)

	// The laboratory amends the blood gas: a new version on the server.
	var gas map[string]any
	_ = json.Unmarshal(b.gas, &gas)
	gas["status"] = "amended"
	gas["valueQuantity"].(map[string]any)["value"] = 47
	delete(gas, "meta")
	body, _ := json.Marshal(gas)
	code, _, amended := peer.Do(t, http.MethodPut, "Observation/"+b.gasID, body, nil)
	if code != http.StatusOK {
		t.Fatalf("amend: HTTP %d %s", code, amended)
	}
	post(t, s.url, http.MethodPost, "/notify", notification("Subscription/s1", 100, []json.RawMessage{amended}), secret)
	waitIdle(t, s)
	st := stateOf(t, peer)
	derived := st.derivedFor(b.subject)
	if len(derived) != wantValues {
		t.Fatalf("%d derived values after the amendment, want %d (updated, not added)", len(derived), wantValues)
	}
	var gasVersion string
	{
		var m struct{ Meta struct{ VersionID string } }
		_ = json.Unmarshal(amended, &m)
		gasVersion = m.Meta.VersionID
	}
	for _, m := range derived {
		if m["status"] != "amended" {
			t.Errorf("derived %v has status %v, want amended", m["code"], m["status"])
		}
		cites := false
		for _, d := range m["derivedFrom"].([]any) {
			if d.(map[string]any)["reference"] == "Observation/"+b.gasID+"/_history/"+gasVersion {
				cites = true
			}
		}
		if !cites {
			t.Errorf("derived %v does not cite the amended blood gas version", m["code"])
		}
	}
	revisions := 0
	for _, p := range st.provenances {
		for _, en := range p["entity"].([]any) {
			if en.(map[string]any)["role"] == "revision" {
				revisions++
			}
		}
	}
	if len(st.provenances) != 2 || revisions == 0 {
		t.Errorf("%d Provenance with %d revision entities, want 2 with revisions of the previous versions", len(st.provenances), revisions)
	}

	// Then it is found to be from the wrong patient: entered-in-error.
	gas["status"] = "entered-in-error"
	body, _ = json.Marshal(gas)
	code, _, withdrawn := peer.Do(t, http.MethodPut, "Observation/"+b.gasID, body, nil)
	if code != http.StatusOK {
		t.Fatalf("withdraw: HTTP %d %s", code, withdrawn)
	}
	post(t, s.url, http.MethodPost, "/notify", notification("Subscription/s1", 200, []json.RawMessage{withdrawn}), secret)
	waitIdle(t, s)
	for _, m := range stateOf(t, peer).derivedFor(b.subject) {
		if m["status"] != "entered-in-error" {
			t.Errorf("derived %v has status %v after its blood gas was withdrawn, want entered-in-error", m["code"], m["status"])
		}
	}
}

func TestEventGapIsCaughtUpBySearch(t *testing.T) {
	peer := fhirtest.Start(t)
	s := start(t, testConfig(peer.BaseURL, t.TempDir()))
	waitFor(t, "the start-up catch-up", func() bool {
		return s.svc.FHIRServerAnswered()
	})
	waitIdle(t, s)
	b := newBed(t, peer, time.Now().Add(-30*time.Minute), false)
	post(t, s.url, http.MethodPost, "/notify", notification("Subscription/gap", 1, b.resources), secret)
	waitIdle(t, s)
	if n := len(stateOf(t, peer).derivedFor(b.subject)); n != 0 {
		t.Fatalf("%d derived values before any blood gas", n)
	}
	// The blood gas is stored on the server, but its notification (the next
	// event number) is lost; a later event arrives with a higher number.
	gas, _ := create(t, peer, observation(b.subject, "http://loinc.org", "2019-8", "mm[Hg]", 44, time.Now().Add(-30*time.Minute), "final"))
	_ = gas
	next := 1 + len(b.resources) + 1 // one event skipped
	unrelated, _ := create(t, peer, observation(b.subject, "http://loinc.org", "8867-4", "/min", 88, time.Now(), "final"))
	post(t, s.url, http.MethodPost, "/notify", notification("Subscription/gap", next, []json.RawMessage{unrelated}), secret)
	waitFor(t, "the missed blood gas to be derived", func() bool {
		return len(stateOf(t, peer).derivedFor(b.subject)) == wantValues
	})
}

func TestBadWebhookInput(t *testing.T) {
	peer := fhirtest.Start(t)
	cfg := testConfig(peer.BaseURL, t.TempDir())
	cfg.MaxBodyBytes = 64 << 10
	s := start(t, cfg)
	subject := "Patient/bad-input"
	venous := observation(subject, "http://loinc.org", "2021-4", "mm[Hg]", 48, time.Now().Add(-time.Hour), "final")
	venousObs := strings.Replace(venous, `{"resourceType":"Observation",`, `{"resourceType":"Observation","id":"vbg-1","meta":{"versionId":"1","lastUpdated":"2026-11-30T10:00:00Z"},`, 1)
	cases := []struct {
		name, method, path, body, auth string
		want                           int
		wantText                       string
	}{
		{"wrong secret", http.MethodPost, "/notify", `{}`, "not-the-secret-at-all", http.StatusUnauthorized, "OperationOutcome"},
		{"no secret", http.MethodPost, "/notify", `{}`, "", http.StatusUnauthorized, "OperationOutcome"},
		{"oversized body", http.MethodPost, "/notify", `{"resourceType":"Bundle","type":"history","entry":[` + strings.Repeat(`{"fullUrl":"x"},`, 8000) + `{}]}`, secret, http.StatusRequestEntityTooLarge, "OperationOutcome"},
		{"not JSON", http.MethodPost, "/notify", `<html>hello</html>`, secret, http.StatusBadRequest, "OperationOutcome"},
		{"truncated JSON", http.MethodPost, "/notify", `{"resourceType":"Bundle","type":"hist`, secret, http.StatusBadRequest, "OperationOutcome"},
		{"a Patient at an Observation path", http.MethodPut, "/notify/Observation/p1", `{"resourceType":"Patient","id":"p1"}`, secret, http.StatusBadRequest, "Observation"},
		{"a venous sample", http.MethodPut, "/notify/Observation/vbg-1", venousObs, secret, http.StatusOK, "specimen-not-arterial"},
	}
	for _, tc := range cases {
		t.Run(tc.name, func(t *testing.T) {
			code, body := post(t, s.url, tc.method, tc.path, []byte(tc.body), tc.auth)
			if code != tc.want || !strings.Contains(body, tc.wantText) {
				t.Errorf("HTTP %d %q, want %d containing %q", code, body, tc.want, tc.wantText)
			}
		})
	}
	waitIdle(t, s)
	if n := len(stateOf(t, peer).derived); n != 0 {
		t.Errorf("%d derived Observations written from bad input", n)
	}
	if h, err := s.svc.Engine().Health(context.Background()); err != nil || h.Stats.DirtyPatients != 0 {
		t.Errorf("health %+v %v: nothing should be pending", h, err)
	}
	resp, err := http.Get(s.url + "/healthz")
	if err != nil || resp.StatusCode != http.StatusOK {
		t.Fatalf("the service stopped serving after bad input: %v", err)
	}
	resp.Body.Close()
	if strings.Contains(s.logs.String(), "bad-input") || strings.Contains(s.logs.String(), secret) {
		t.Errorf("logs carry a patient identifier or the secret:\n%s", s.logs.String())
	}
}

func TestRegisterSubscriptionCreatesOnceAndReactivates(t *testing.T) {
	peer := fhirtest.Start(t)
	cfg := testConfig(peer.BaseURL, t.TempDir())
	cfg.Register = true
	cfg.PublicURL = "https://deadspace.invalid/"
	subs := func() []map[string]any {
		var out []map[string]any
		for _, raw := range peer.Search(t, "Subscription") {
			var m map[string]any
			_ = json.Unmarshal(raw, &m)
			out = append(out, m)
		}
		return out
	}
	s := start(t, cfg)
	waitFor(t, "the subscription", func() bool { return len(subs()) == 1 })
	s.stop()
	got := subs()[0]
	ch := got["channel"].(map[string]any)
	if ch["endpoint"] != "https://deadspace.invalid/notify" || ch["type"] != "rest-hook" {
		t.Errorf("channel %v: want a rest-hook to the public URL's /notify", ch)
	}
	if hs, _ := ch["header"].([]any); len(hs) != 1 || hs[0] != "Authorization: Bearer "+secret {
		t.Errorf("channel headers %v: want the webhook secret as a bearer token", ch["header"])
	}
	if c, _ := got["criteria"].(string); !strings.Contains(c, "http://loinc.org|2019-8") {
		t.Errorf("criteria %q does not name the PaCO2 code", c)
	}
	// The server turns it off; a restart re-activates the same one.
	got["status"] = "off"
	body, _ := json.Marshal(got)
	if code, _, out := peer.Do(t, http.MethodPut, "Subscription/"+got["id"].(string), body, nil); code != http.StatusOK {
		t.Fatalf("turn off: HTTP %d %s", code, out)
	}
	s = start(t, cfg)
	waitFor(t, "the subscription to be re-activated", func() bool {
		all := subs()
		return len(all) == 1 && all[0]["status"] == "requested"
	})
	s.stop()
	if n := len(subs()); n != 1 {
		t.Errorf("%d Subscriptions after a restart, want 1", n)
	}
}

// A FHIR server that holds every request unanswered (a restart while the
// EHR is overloaded) must not keep the webhook from answering: what the
// service does with the server at start (publishing the CodeSystem, the
// catch-up search) runs beside the webhook, not before it. Before the fix
// the first notification waited out the CodeSystem create's 30 s timeout.
func TestWebhookAnswersWhileTheServerHangs(t *testing.T) {
	release := make(chan struct{})
	var held atomic.Int64
	hung := httptest.NewServer(http.HandlerFunc(func(w http.ResponseWriter, r *http.Request) {
		held.Add(1)
		select {
		case <-release:
		case <-r.Context().Done():
		}
		http.Error(w, "unavailable", http.StatusServiceUnavailable)
	}))
	t.Cleanup(hung.Close)
	t.Cleanup(func() { close(release) })
	s := start(t, testConfig(hung.URL, t.TempDir()))
	waitFor(t, "the service to call the hung server", func() bool { return held.Load() > 0 })
	at := time.Now().UTC().Add(-time.Hour).Truncate(time.Minute)
	reading := json.RawMessage(strings.Replace(observation("Patient/p-hung", "http://loinc.org", "19891-1", "mm[Hg]", 35, at, "final"),
		`{"resourceType":"Observation",`, `{"resourceType":"Observation","id":"hung-1","meta":{"versionId":"1"},`, 1))
	client := &http.Client{Timeout: 10 * time.Second}
	req, err := http.NewRequest(http.MethodPost, s.url+"/notify", bytes.NewReader(notification("Subscription/s1", 1, []json.RawMessage{reading})))
	if err != nil {
		t.Fatal(err)
	}
	req.Header.Set("Content-Type", "application/fhir+json")
	req.Header.Set("Authorization", "Bearer "+secret)
	resp, err := client.Do(req)
	if err != nil {
		t.Fatalf("the webhook did not answer while the FHIR server hangs: %v", err)
	}
	_ = resp.Body.Close()
	if resp.StatusCode != http.StatusOK {
		t.Fatalf("notify: HTTP %d, want 200", resp.StatusCode)
	}
	if n, err := s.svc.Engine().InputCount(context.Background(), "Patient/p-hung"); err != nil || n != 1 {
		t.Errorf("stored inputs of the patient: %d (%v), want 1", n, err)
	}
}
