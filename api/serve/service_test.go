package serve_test

import (
	"bufio"
	"context"
	"crypto/tls"
	"fmt"
	"math/rand/v2"
	"net/http"
	"os"
	"path/filepath"
	"regexp"
	"slices"
	"strconv"
	"strings"
	"testing"
	"time"

	"github.com/prometheus/client_golang/prometheus/testutil/promlint"
	"google.golang.org/grpc"
	"google.golang.org/grpc/credentials"
	healthpb "google.golang.org/grpc/health/grpc_health_v1"

	"github.com/deadspace-fhir/deadspace/api/deadletters"
	"github.com/deadspace-fhir/deadspace/api/replay"
	"github.com/deadspace-fhir/deadspace/api/tlsconf"
	"github.com/deadspace-fhir/deadspace/api/tlsconf/tlstest"
	"github.com/deadspace-fhir/deadspace/derive"
	"github.com/deadspace-fhir/deadspace/fhir/fhirtest"
)

func readyz(t *testing.T, base string, client *http.Client) int {
	t.Helper()
	if client == nil {
		client = http.DefaultClient
	}
	resp, err := client.Get(base + "/readyz")
	if err != nil {
		t.Fatal(err)
	}
	resp.Body.Close()
	return resp.StatusCode
}

func TestReadinessFollowsTheFHIRServer(t *testing.T) {
	peer := fhirtest.Start(t)
	cfg := testConfig(peer.BaseURL, t.TempDir())
	cfg.ReadyGrace = 0
	s := start(t, cfg)
	waitFor(t, "ready", func() bool { return readyz(t, s.url, nil) == http.StatusOK })
	peer.Down()
	// An empty rest-hook POST makes the service search the server, which
	// now fails.
	post(t, s.url, http.MethodPost, "/notify", nil, secret)
	waitFor(t, "not ready while the FHIR server is down", func() bool { return readyz(t, s.url, nil) == http.StatusServiceUnavailable })
	if code := func() int { r, _ := http.Get(s.url + "/healthz"); r.Body.Close(); return r.StatusCode }(); code != http.StatusOK {
		t.Errorf("/healthz = %d while the FHIR server is down; liveness must not depend on it", code)
	}
	peer.Up()
	post(t, s.url, http.MethodPost, "/notify", nil, secret)
	waitFor(t, "ready again", func() bool { return readyz(t, s.url, nil) == http.StatusOK })
}

func TestMetricsCountWhatWasSentAndPassPromlint(t *testing.T) {
	peer := fhirtest.Start(t)
	s := start(t, testConfig(peer.BaseURL, t.TempDir()))
	b := newBed(t, peer, time.Now().Add(-30*time.Minute), true)
	post(t, s.url, http.MethodPost, "/notify", notification("Subscription/m", 1, b.resources), secret)
	post(t, s.url, http.MethodPost, "/notify", []byte(`{}`), "wrong-secret-wrong-secret")
	waitIdle(t, s)
	resp, err := http.Get(s.url + "/metrics")
	if err != nil {
		t.Fatal(err)
	}
	defer resp.Body.Close()
	raw, err := readAll(resp)
	if err != nil {
		t.Fatal(err)
	}
	problems, err := promlint.New(strings.NewReader(raw)).Lint()
	if err != nil {
		t.Fatal(err)
	}
	for _, p := range problems {
		t.Errorf("promlint: %s: %s", p.Metric, p.Text)
	}
	sum := func(name string, match string) float64 {
		var total float64
		for _, line := range strings.Split(raw, "\n") {
			if strings.HasPrefix(line, name) && strings.Contains(line, match) {
				var v float64
				fields := strings.Fields(line)
				fmt.Sscan(fields[len(fields)-1], &v)
				total += v
			}
		}
		return total
	}
	if got := sum("deadspace_derived_values_total{", `status="final"`); got != wantValues {
		t.Errorf("deadspace_derived_values_total{status=final} sums to %v, want %d", got, wantValues)
	}
	if got, want := sum("deadspace_resources_received_total{", `mode="notification"`), float64(len(b.resources)); got != want {
		t.Errorf("resources received by notification = %v, want %v", got, want)
	}
	if got := sum("deadspace_webhook_requests_total{", `status="401"`); got != 1 {
		t.Errorf("webhook 401s = %v, want 1", got)
	}
	// The embedded store's writer: the notification's inputs and the
	// evaluation's results were committed, so it did some work.
	txs, calls, busy := sum("deadspace_store_transactions_total ", ""), sum("deadspace_store_write_calls_total ", ""), sum("deadspace_store_busy_seconds_total ", "")
	if txs < 1 || calls < txs || busy <= 0 {
		t.Errorf("store writer: %v transactions, %v write calls, %v s busy; want some, at least as many calls, and time", txs, calls, busy)
	}
	for _, id := range []string{b.subject, b.gasID} {
		if strings.Contains(raw, strings.TrimPrefix(id, "Patient/")) {
			t.Errorf("a metric carries the identifier %s", id)
		}
	}
}

func readAll(resp *http.Response) (string, error) {
	var sb strings.Builder
	sc := bufio.NewScanner(resp.Body)
	sc.Buffer(make([]byte, 1<<20), 1<<24)
	for sc.Scan() {
		sb.WriteString(sc.Text())
		sb.WriteByte('\n')
	}
	return sb.String(), sc.Err()
}

// TestDemoLogsCarryNoIdentifiers runs the demo data through the standalone
// service with debug logs and searches every log line for every patient,
// encounter and observation identifier and birth date in it.
func TestDemoLogsCarryNoIdentifiers(t *testing.T) {
	cfg := testConfig("", t.TempDir())
	cfg.Retention = 10 * 365 * 24 * time.Hour
	cfg.LogLevel = "debug"
	s := start(t, cfg)
	secrets := sendDemo(t, s)
	waitIdle(t, s)
	entries, err := s.svc.Engine().Derivations(context.Background(), "Patient/bed1-stable", time.Time{}, time.Now().Add(time.Hour), "", 100)
	if err != nil || len(entries) == 0 {
		t.Fatalf("the demo derived nothing through the service (%v)", err)
	}
	s.stop()
	checkLogs(t, s.logs.String(), secrets)
}

// sendDemo posts every demo resource to the webhook, file by file in the
// files' alphabetical order (the Patient file last), and returns the
// identifiers and birth dates in them.
func sendDemo(t *testing.T, s *service) []string {
	t.Helper()
	var secrets []string
	idPattern := regexp.MustCompile(`"(?:id|reference|birthDate)":"([^"]+)"`)
	for _, f := range demoFiles(t) {
		lines := readLines(t, f)
		for _, line := range lines {
			for _, m := range idPattern.FindAllStringSubmatch(line, -1) {
				secrets = append(secrets, m[1])
			}
		}
		sendLines(t, s, lines)
	}
	return secrets
}

// demoFiles are the demo's NDJSON files in alphabetical order.
func demoFiles(t *testing.T) []string {
	t.Helper()
	files, _ := filepath.Glob(filepath.Join("..", "..", "testdata", "demo", "*.ndjson"))
	if len(files) == 0 {
		t.Fatal("no demo files")
	}
	return files
}

// readLines returns the lines of an NDJSON file.
func readLines(t *testing.T, name string) []string {
	t.Helper()
	fh, err := os.Open(name)
	if err != nil {
		t.Fatal(err)
	}
	defer fh.Close()
	var lines []string
	sc := bufio.NewScanner(fh)
	sc.Buffer(make([]byte, 1<<20), 1<<24)
	for sc.Scan() {
		lines = append(lines, sc.Text())
	}
	if err := sc.Err(); err != nil {
		t.Fatal(err)
	}
	return lines
}

// sendLines posts resources to the webhook in their order, 500 to a
// notification.
func sendLines(t *testing.T, s *service, lines []string) {
	t.Helper()
	for len(lines) > 0 {
		n := min(len(lines), 500)
		chunk := make([]string, n)
		for i, line := range lines[:n] {
			chunk[i] = `{"resource":` + line + `}`
		}
		lines = lines[n:]
		body := `{"resourceType":"Bundle","type":"collection","entry":[` + strings.Join(chunk, ",") + `]}`
		if code, out := post(t, s.url, http.MethodPost, "/notify", []byte(body), secret); code != http.StatusOK {
			t.Fatalf("HTTP %d: %.300s", code, out)
		}
	}
}

// checkLogs fails when any identifier (less its resource type) appears in
// the logs; it also fails when the search looked for too few, which would
// mean the collection of identifiers is broken.
func checkLogs(t *testing.T, logs string, secrets []string) {
	t.Helper()
	if !strings.Contains(logs, "webhook request") {
		t.Fatalf("no request logs captured:\n%.500s", logs)
	}
	seen := map[string]bool{}
	for _, id := range secrets {
		if _, rest, ok := strings.Cut(id, "/"); ok {
			id = rest
		}
		if seen[id] || len(id) < 6 {
			continue
		}
		seen[id] = true
		if strings.Contains(logs, id) {
			t.Errorf("the logs carry the identifier or birth date %q", id)
		}
	}
	if len(seen) < 100 {
		t.Fatalf("only %d identifiers searched for; the demo scan is broken", len(seen))
	}
}

func TestTLSForHTTPAndMutualTLSForGRPC(t *testing.T) {
	ca := tlstest.NewCA(t)
	server := ca.Server(t, "127.0.0.1")
	clientCert := ca.Client(t, "early-warning-score")
	cfg := testConfig("", t.TempDir())
	cfg.TLSCert, cfg.TLSKey, cfg.GRPCClientCA = server.CertFile, server.KeyFile, ca.CertFile
	s := start(t, cfg)
	base := strings.Replace(s.url, "http://", "https://", 1)

	https := &http.Client{Transport: &http.Transport{TLSClientConfig: &tls.Config{RootCAs: ca.Pool(), MinVersion: tls.VersionTLS12}}}
	if code := readyz(t, base, https); code != http.StatusOK {
		t.Errorf("HTTPS /readyz = %d", code)
	}
	if resp, err := http.Get(s.url + "/healthz"); err == nil {
		resp.Body.Close()
		if resp.StatusCode == http.StatusOK {
			t.Error("plain HTTP was served on the TLS listener")
		}
	}

	health := func(c *tls.Config) error {
		conn, err := grpc.NewClient(s.svc.GRPCAddr(), grpc.WithTransportCredentials(credentials.NewTLS(c)))
		if err != nil {
			return err
		}
		defer conn.Close()
		ctx, cancel := context.WithTimeout(context.Background(), 10*time.Second)
		defer cancel()
		r, err := healthpb.NewHealthClient(conn).Check(ctx, &healthpb.HealthCheckRequest{})
		if err != nil {
			return err
		}
		if r.Status != healthpb.HealthCheckResponse_SERVING {
			return fmt.Errorf("status %v", r.Status)
		}
		return nil
	}
	withCert, err := tlsconf.ClientConfig(ca.CertFile, clientCert.CertFile, clientCert.KeyFile)
	if err != nil {
		t.Fatal(err)
	}
	if err := health(withCert); err != nil {
		t.Errorf("gRPC health with a client certificate: %v", err)
	}
	withoutCert, err := tlsconf.ClientConfig(ca.CertFile, "", "")
	if err != nil {
		t.Fatal(err)
	}
	if err := health(withoutCert); err == nil {
		t.Error("gRPC answered a client without a certificate under mutual TLS")
	}

	// The commands that call gRPC present the certificate their flags name.
	for _, tc := range []struct {
		name string
		args []string
		code int
	}{
		{"with the client certificate", []string{"--grpc-ca", ca.CertFile, "--grpc-cert", clientCert.CertFile, "--grpc-key", clientCert.KeyFile}, 0},
		{"without it", []string{"--grpc-ca", ca.CertFile}, 1},
	} {
		t.Run("deadletters "+tc.name, func(t *testing.T) {
			var out, errOut strings.Builder
			args := append([]string{"--grpc", s.svc.GRPCAddr()}, append(tc.args, "list")...)
			code := deadletters.Main(context.Background(), args, func(string) string { return "" }, &out, &errOut)
			if code != tc.code || (code == 0) != strings.Contains(out.String(), "0 dead letters") {
				t.Errorf("exit %d, want %d; stdout %q, stderr %q", code, tc.code, out.String(), errOut.String())
			}
		})
	}
}

// TestHostileWebhookInput sends what an attacker or a broken sender might:
// each gets a clear status, nothing is stored, and the service keeps
// serving.
func TestHostileWebhookInput(t *testing.T) {
	cfg := testConfig("", t.TempDir())
	cfg.MaxBodyBytes = 8 << 20
	s := start(t, cfg)
	obs := func(id, value string) string {
		return `{"resourceType":"Observation","id":"` + id + `","meta":{"versionId":"1","lastUpdated":"2026-11-30T10:00:00Z"},"status":"final",` +
			`"code":{"coding":[{"system":"http://loinc.org","code":"2019-8"}]},"subject":{"reference":"Patient/hostile"},` +
			`"effectiveDateTime":"2026-11-30T09:50:00Z","valueQuantity":{"value":` + value + `,"unit":"mm[Hg]","system":"http://unitsofmeasure.org","code":"mm[Hg]"}}`
	}
	var big strings.Builder
	big.WriteString(`{"resourceType":"Bundle","type":"collection","entry":[`)
	for i := 0; i < 100000; i++ {
		if i > 0 {
			big.WriteByte(',')
		}
		big.WriteString(`{"fullUrl":"urn:uuid:x"}`)
	}
	big.WriteString(`]}`)
	cases := []struct {
		name, method, path, body string
		want                     []int
		wantText                 string
	}{
		{"truncated JSON", http.MethodPost, "/notify", `{"resourceType":"Bundle","entry":[{"resource":{"resourceType":"Obs`, []int{400}, "OperationOutcome"},
		{"deep nesting", http.MethodPost, "/notify", strings.Repeat(`{"a":`, 20000) + `1` + strings.Repeat(`}`, 20000), []int{400}, "OperationOutcome"},
		{"a huge number", http.MethodPut, "/notify/Observation/huge", obs("huge", "1e400"), []int{200, 400}, ""},
		{"a value of the wrong type", http.MethodPut, "/notify/Observation/wrongtype", obs("wrongtype", `"forty"`), []int{200, 400}, ""},
		{"a Bundle of 100,000 entries", http.MethodPost, "/notify", big.String(), []int{200, 400}, "OperationOutcome"},
		{"unicode in identifiers", http.MethodPut, "/notify/Observation/%E2%98%83", obs("☃", "40"), []int{400}, "OperationOutcome"},
		{"a PUT to a path that is not an Observation", http.MethodPut, "/notify/Medication/m1", `{"resourceType":"Medication","id":"m1"}`, []int{400, 404}, "OperationOutcome"},
		{"a PUT to a nested path", http.MethodPut, "/notify/Observation/a/b", obs("a", "40"), []int{400, 404}, "OperationOutcome"},
		{"a method not allowed", http.MethodDelete, "/notify", ``, []int{405}, ""},
	}
	for _, tc := range cases {
		t.Run(tc.name, func(t *testing.T) {
			code, body := post(t, s.url, tc.method, tc.path, []byte(tc.body), secret)
			ok := false
			for _, w := range tc.want {
				ok = ok || code == w
			}
			if !ok || !strings.Contains(body, tc.wantText) {
				t.Errorf("HTTP %d %.200q, want one of %v containing %q", code, body, tc.want, tc.wantText)
			}
		})
	}
	waitIdle(t, s)
	// The huge-number and wrong-type Observations are refused as values,
	// the snowman id fails the id rules: nothing usable is kept for the
	// patient (an unusable version with an id is kept, inert, so that an
	// older version of its resource arriving later is refused).
	stored, err := s.svc.Engine().StoredReadings(context.Background(), "Patient/hostile")
	if err != nil {
		t.Fatal(err)
	}
	for _, r := range stored {
		if r.Usable {
			t.Errorf("stored a usable reading from hostile requests: %+v", r.Reading)
		}
	}
	if resp, err := http.Get(s.url + "/healthz"); err != nil || resp.StatusCode != http.StatusOK {
		t.Fatalf("the service stopped serving: %v", err)
	}
}

// scrapeByReason reads a metric's samples by reason label from /metrics.
func scrapeByReason(t *testing.T, s *service, name string) map[string]int {
	t.Helper()
	resp, err := http.Get(s.url + "/metrics")
	if err != nil {
		t.Fatal(err)
	}
	body, err := readAll(resp)
	if err != nil {
		t.Fatal(err)
	}
	out := map[string]int{}
	re := regexp.MustCompile(`(?m)^` + name + `\{reason="([^"]+)"\} (\d+)$`)
	for _, m := range re.FindAllStringSubmatch(body, -1) {
		n, _ := strconv.Atoi(m[2])
		out[m[1]] = n
	}
	if len(out) < len(derive.AllReasons()) {
		t.Fatalf("%s has %d reasons at /metrics, want every one of %d (series exist at zero)", name, len(out), len(derive.AllReasons()))
	}
	return out
}

// TestMetricsAgreeWithReplay sends the demo through the service in
// several orders and runs replay on the same files with the same settings:
// once the service is idle, /metrics must count the same inputs left out
// and values not emitted, reason by reason, as replay's summary, whatever
// order the data arrived in. In the README's order (patients first, then
// blood gases, then device readings) every evaluation after a patient's
// first is incremental, so the gauges hold only if the picture is
// refreshed after incremental evaluations.
func TestMetricsAgreeWithReplay(t *testing.T) {
	files := demoFiles(t)
	byName := map[string][]string{}
	for _, f := range files {
		byName[filepath.Base(f)] = readLines(t, f)
	}
	var all []string
	for _, f := range files {
		all = append(all, byName[filepath.Base(f)]...)
	}
	const seed = 20260302
	shuffled := slices.Clone(all)
	rand.New(rand.NewPCG(seed, seed)).Shuffle(len(shuffled), func(i, j int) { shuffled[i], shuffled[j] = shuffled[j], shuffled[i] })
	readme := slices.Concat(byName["Patient.ndjson"], byName["Encounter.ndjson"], byName["Observation.bloodgas.ndjson"], byName["Observation.devices.ndjson"])
	if len(readme) != len(all) {
		t.Fatalf("the README's order sends %d lines of %d: a demo file is not named", len(readme), len(all))
	}

	// A transaction Bundle of DELETE entries, as a server forwards it: a
	// blood gas deleted after its version, and a resource never sent.
	deletions := `{"resourceType":"Bundle","type":"transaction","entry":[` +
		`{"request":{"method":"DELETE","url":"Observation/bed1-stable-abg-1"},"response":{"lastModified":"2026-03-15T07:00:00Z"}},` +
		`{"request":{"method":"DELETE","url":"Observation/never-sent"},"response":{"lastModified":"2026-03-15T07:00:00Z"}}]}`
	deletionFile := filepath.Join(t.TempDir(), "deleted.ndjson")
	if err := os.WriteFile(deletionFile, []byte(deletions+"\n"), 0o600); err != nil {
		t.Fatal(err)
	}
	cfg := testConfig("", t.TempDir())
	opts, err := cfg.Derivation.Resolve("test")
	if err != nil {
		t.Fatal(err)
	}
	// summary is what replay's summary counts of files, by reason.
	summary := func(t *testing.T, files []string) (inputs, values map[string]int) {
		t.Helper()
		out, err := replay.Run(context.Background(), replay.Options{Derive: opts.Derive, Decode: opts.Decode, Encode: opts.Encode}, files)
		if err != nil {
			t.Fatal(err)
		}
		inputs, values = map[string]int{}, map[string]int{}
		for _, c := range replay.ReasonCounts(out.Report.Inputs) {
			inputs[string(c.Reason)] = c.N
		}
		inputs[string(derive.ReasonUnrecognised)] += out.Report.Unrecognised
		for _, c := range replay.ReasonCounts(out.Report.Values) {
			values[string(c.Reason)] = c.N
		}
		return inputs, values
	}
	wantInputs, wantValues := summary(t, files)
	if wantInputs[string(derive.ReasonUnpaired)]+wantValues[string(derive.ReasonMissingInput)] == 0 {
		t.Fatal("replay left nothing out: the comparison checks nothing")
	}
	deletedInputs, deletedValues := summary(t, append(slices.Clone(files), deletionFile))
	if deletedInputs[string(derive.ReasonDeleted)] != 1 {
		t.Fatalf("replay counts %d inputs deleted, want 1", deletedInputs[string(derive.ReasonDeleted)])
	}

	for _, tc := range []struct {
		name  string
		lines []string
		// byFile posts each file apart, as sendDemo does.
		byFile bool
		// deleted: the Bundle of DELETE entries is posted last, and
		// replay reads it as a file of its own.
		deleted bool
	}{
		{name: "files in alphabetical order, the Patient file last", byFile: true},
		{name: "files in alphabetical order, then a Bundle of DELETE entries", byFile: true, deleted: true},
		{name: "the README's order: patients, then blood gases, then device readings", lines: readme},
		{name: fmt.Sprintf("every line shuffled (seed %d)", seed), lines: shuffled},
	} {
		t.Run(tc.name, func(t *testing.T) {
			cfg := testConfig("", t.TempDir())
			cfg.Retention = 10 * 365 * 24 * time.Hour
			s := start(t, cfg)
			before := scrapeByReason(t, s, "deadspace_inputs_left_out")
			for r, n := range before {
				if n != 0 {
					t.Errorf("inputs left out for %s is %d before any input", r, n)
				}
			}
			if tc.byFile {
				sendDemo(t, s)
			} else {
				sendLines(t, s, tc.lines)
			}
			wantInputs, wantValues := wantInputs, wantValues
			if tc.deleted {
				if code, out := post(t, s.url, http.MethodPost, "/notify", []byte(deletions), secret); code != http.StatusOK {
					t.Fatalf("HTTP %d: %.300s", code, out)
				}
				wantInputs, wantValues = deletedInputs, deletedValues
			}
			waitIdle(t, s)
			for _, m := range []struct {
				name string
				want map[string]int
			}{{"deadspace_inputs_left_out", wantInputs}, {"deadspace_values_not_emitted", wantValues}} {
				got := scrapeByReason(t, s, m.name)
				for _, r := range derive.AllReasons() {
					if got[string(r)] != m.want[string(r)] {
						t.Errorf("%s{reason=%q} = %d, replay's summary says %d", m.name, r, got[string(r)], m.want[string(r)])
					}
				}
			}
		})
	}
}
