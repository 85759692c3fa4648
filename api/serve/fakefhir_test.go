package serve_test

import (
	"bytes"
	"context"
	"encoding/json"
	"fmt"
	"io"
	"net/http"
	"strings"
	"testing"
	"time"

	"github.com/deadspace-fhir/deadspace/api/deadletters"
	"github.com/deadspace-fhir/deadspace/api/serve"
	"github.com/deadspace-fhir/deadspace/fhir/encode"
	"github.com/deadspace-fhir/deadspace/fhir/fhirtest/fakefhir"
)

// These tests run the service against the Go fake FHIR server: no Node, so
// they never skip, and they finish in seconds. They cover how the service
// learns of data (gaps, heartbeats, silence, polling with paging, id-only
// notifications, catch-up at start); the Medplum peer tests cover the same
// against a real server implementation.

// fakeBed puts a patient with the readings of newBed (and a blood gas when
// withGas) on the fake server.
func fakeBed(t *testing.T, f *fakefhir.Server, at time.Time, withGas bool) bed {
	t.Helper()
	var b bed
	put := func(resource string) (json.RawMessage, string) {
		t.Helper()
		r, err := f.Put([]byte(resource))
		if err != nil {
			t.Fatal(err)
		}
		var id struct{ ID string }
		_ = json.Unmarshal(r, &id)
		return r, id.ID
	}
	var pid string
	b.patient, pid = put(`{"resourceType":"Patient","gender":"female","birthDate":"1961-04-12"}`)
	b.subject = "Patient/" + pid
	b.resources = append(b.resources, b.patient)
	add := func(system, code, unit string, v float64, ts time.Time) {
		r, _ := put(observation(b.subject, system, code, unit, v, ts, "final"))
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
		b.gas, b.gasID = put(observation(b.subject, "http://loinc.org", "2019-8", "mm[Hg]", 44, at, "final"))
		b.resources = append(b.resources, b.gas)
	}
	return b
}

// derivedOn returns the current derived Observations on the fake for subject.
func derivedOn(f *fakefhir.Server, subject string) []map[string]any {
	var out []map[string]any
	for _, raw := range f.Current("Observation") {
		var m map[string]any
		_ = json.Unmarshal(raw, &m)
		ids, _ := m["identifier"].([]any)
		if len(ids) == 0 {
			continue
		}
		if id, _ := ids[0].(map[string]any); id["system"] != encode.DefaultIdentifierSystem {
			continue
		}
		if s, _ := m["subject"].(map[string]any); s["reference"] == subject {
			out = append(out, m)
		}
	}
	return out
}

// startOnFake starts the service against f and waits for its start-up
// catch-up to finish.
func startOnFake(t *testing.T, f *fakefhir.Server, tweak func(*serve.Config)) *service {
	t.Helper()
	cfg := testConfig(f.BaseURL, t.TempDir())
	if tweak != nil {
		tweak(&cfg)
	}
	s := start(t, cfg)
	waitFor(t, "the start-up catch-up", func() bool { return f.Count(http.MethodGet, "Observation") > 0 })
	waitIdle(t, s)
	return s
}

// idOnlyNotification names resources by reference only; the service must
// read them from the server.
func idOnlyNotification(sub string, firstEvent int, refs []string) []byte {
	var events, entries []string
	for i, ref := range refs {
		events = append(events, fmt.Sprintf(`{"name":"notification-event","part":[{"name":"event-number","valueString":"%d"},{"name":"focus","valueReference":{"reference":"%s"}}]}`, firstEvent+i, ref))
		entries = append(entries, fmt.Sprintf(`{"fullUrl":"http://fhir.invalid/%s","request":{"method":"PUT","url":"%s"},"response":{"status":"200"}}`, ref, ref))
	}
	status := fmt.Sprintf(`{"fullUrl":"urn:uuid:5e1f7c1a-0000-4000-8000-0000000000aa","resource":{"resourceType":"Parameters","parameter":[`+
		`{"name":"subscription","valueReference":{"reference":"%s"}},{"name":"status","valueCode":"active"},`+
		`{"name":"type","valueCode":"event-notification"},{"name":"events-since-subscription-start","valueString":"%d"}%s]},`+
		`"request":{"method":"GET","url":"%s/$status"},"response":{"status":"200"}}`,
		sub, firstEvent+len(refs)-1, prefixComma(events), sub)
	return []byte(`{"resourceType":"Bundle","type":"history","entry":[` + status + prefixComma(entries) + `]}`)
}

// heartbeat is a heartbeat notification that counts events since the
// subscription started.
func heartbeat(sub string, eventsSinceStart int) []byte {
	return []byte(fmt.Sprintf(`{"resourceType":"Bundle","type":"history","entry":[{"fullUrl":"urn:uuid:5e1f7c1a-0000-4000-8000-0000000000bb",`+
		`"resource":{"resourceType":"Parameters","parameter":[{"name":"subscription","valueReference":{"reference":"%s"}},`+
		`{"name":"status","valueCode":"active"},{"name":"type","valueCode":"heartbeat"},`+
		`{"name":"events-since-subscription-start","valueString":"%d"}]},"request":{"method":"GET","url":"%s/$status"},"response":{"status":"200"}}]}`,
		sub, eventsSinceStart, sub))
}

func waitDerived(t *testing.T, f *fakefhir.Server, subject string, n int) {
	t.Helper()
	waitFor(t, fmt.Sprintf("%d derived values for a patient", n), func() bool { return len(derivedOn(f, subject)) == n })
}

func TestFakeCatchUpAtStartTakesWhatIsAlreadyThere(t *testing.T) {
	f := fakefhir.Start(t)
	b := fakeBed(t, f, time.Now().Add(-40*time.Minute), true)
	startOnFake(t, f, nil)
	waitDerived(t, f, b.subject, wantValues)
}

func TestFakeEventNumberJumpCatchesUp(t *testing.T) {
	f := fakefhir.Start(t)
	s := startOnFake(t, f, nil)
	b := fakeBed(t, f, time.Now().Add(-30*time.Minute), false)
	post(t, s.url, http.MethodPost, "/notify", notification("Subscription/gap", 1, b.resources), secret)
	waitIdle(t, s)
	if n := len(derivedOn(f, b.subject)); n != 0 {
		t.Fatalf("%d derived values before any blood gas", n)
	}
	searches := f.Count(http.MethodGet, "Observation")
	// The blood gas is stored, its notification is lost, and the next one
	// arrives with a higher event number.
	fakeBed(t, f, time.Now().Add(-30*time.Minute), false) // unrelated traffic
	gas, _ := f.Put([]byte(observation(b.subject, "http://loinc.org", "2019-8", "mm[Hg]", 44, time.Now().Add(-30*time.Minute), "final")))
	_ = gas
	unrelated, _ := f.Put([]byte(observation(b.subject, "http://loinc.org", "8867-4", "/min", 88, time.Now(), "final")))
	post(t, s.url, http.MethodPost, "/notify", notification("Subscription/gap", len(b.resources)+2, []json.RawMessage{unrelated}), secret)
	waitDerived(t, f, b.subject, wantValues)
	if f.Count(http.MethodGet, "Observation") == searches {
		t.Fatal("derived without a search: the gap was not what caught it up")
	}
	// Consecutive numbers afterwards are no gap: no further search.
	waitIdle(t, s)
	searches = f.Count(http.MethodGet, "Observation")
	more, _ := f.Put([]byte(observation(b.subject, "http://loinc.org", "8867-4", "/min", 90, time.Now(), "final")))
	post(t, s.url, http.MethodPost, "/notify", notification("Subscription/gap", len(b.resources)+3, []json.RawMessage{more}), secret)
	waitIdle(t, s)
	if got := f.Count(http.MethodGet, "Observation"); got != searches {
		t.Fatalf("%d searches after a notification without a gap, want none", got-searches)
	}
}

// Notifications that a server sends over several connections at once
// arrive out of order: one skips an event number that the next one
// brings. Within --gap-grace that is no loss, and the service does not
// search the server for it; an event that never comes is still searched
// for once its grace is over.
func TestFakeReorderedNotificationsDoNotSearch(t *testing.T) {
	f := fakefhir.Start(t)
	const grace = 500 * time.Millisecond
	s := startOnFake(t, f, func(c *serve.Config) { c.GapGrace = grace })
	b := fakeBed(t, f, time.Now().Add(-30*time.Minute), true)
	searches := f.Count(http.MethodGet, "Observation")
	// Event 1 carries the patient; then the readings' events, in pairs
	// sent the other way round (3 before 2, 5 before 4, …).
	post(t, s.url, http.MethodPost, "/notify", notification("Subscription/reorder", 1, b.resources[:1]), secret)
	rest := b.resources[1:]
	for i := 0; i+1 < len(rest); i += 2 {
		post(t, s.url, http.MethodPost, "/notify", notification("Subscription/reorder", i+3, rest[i+1:i+2]), secret)
		post(t, s.url, http.MethodPost, "/notify", notification("Subscription/reorder", i+2, rest[i:i+1]), secret)
	}
	if len(rest)%2 == 1 {
		post(t, s.url, http.MethodPost, "/notify", notification("Subscription/reorder", len(rest)+1, rest[len(rest)-1:]), secret)
	}
	waitDerived(t, f, b.subject, wantValues)
	time.Sleep(3 * grace) // every skipped number has arrived; nothing is left to expire
	if got := f.Count(http.MethodGet, "Observation"); got != searches {
		t.Fatalf("%d searches for notifications that only arrived out of order, want none", got-searches)
	}
	// An event that never comes: searched for after the grace, not before.
	next := len(b.resources) + 2
	post(t, s.url, http.MethodPost, "/notify", notification("Subscription/reorder", next, rest[:1]), secret)
	if got := f.Count(http.MethodGet, "Observation"); got != searches {
		t.Fatalf("searched at once for an event skipped a moment ago")
	}
	waitFor(t, "the search for the missing event", func() bool { return f.Count(http.MethodGet, "Observation") > searches })
}

func TestFakeHeartbeatCountAheadCatchesUp(t *testing.T) {
	f := fakefhir.Start(t)
	s := startOnFake(t, f, nil)
	b := fakeBed(t, f, time.Now().Add(-30*time.Minute), true)
	post(t, s.url, http.MethodPost, "/notify", heartbeat("Subscription/hb", 0), secret)
	waitIdle(t, s)
	// The heartbeat now counts 27 events that never arrived.
	post(t, s.url, http.MethodPost, "/notify", heartbeat("Subscription/hb", len(b.resources)), secret)
	waitDerived(t, f, b.subject, wantValues)
}

func TestFakeHeartbeatSilenceCatchesUp(t *testing.T) {
	f := fakefhir.Start(t)
	s := startOnFake(t, f, func(c *serve.Config) { c.Heartbeat = 2 * time.Second })
	post(t, s.url, http.MethodPost, "/notify", heartbeat("Subscription/quiet", 0), secret)
	// Data arrives on the server, but no notification does; after the
	// heartbeat timeout the service searches.
	b := fakeBed(t, f, time.Now().Add(-30*time.Minute), true)
	waitDerived(t, f, b.subject, wantValues)
}

func TestFakePollingFollowsNextLinks(t *testing.T) {
	f := fakefhir.Start(t)
	s := startOnFake(t, f, func(c *serve.Config) { c.PollInterval = time.Second })
	// Five beds are 135 Observations: more than one page of the service's
	// searches (100), so the poll has to follow next links.
	var beds []bed
	for i := range 5 {
		beds = append(beds, fakeBed(t, f, time.Now().Add(-time.Duration(30+i*10)*time.Minute), true))
	}
	for _, b := range beds {
		waitDerived(t, f, b.subject, wantValues)
	}
	waitIdle(t, s)
	paged := 0
	for _, r := range f.Requests() {
		if r.Method == http.MethodGet && r.Path == "Observation" && strings.Contains(r.Query, "_offset=") {
			paged++
		}
	}
	if paged == 0 {
		t.Fatal("no search followed a next link")
	}
}

func TestFakeIDOnlyNotificationReadsTheResources(t *testing.T) {
	f := fakefhir.Start(t)
	s := startOnFake(t, f, nil)
	b := fakeBed(t, f, time.Now().Add(-30*time.Minute), true)
	var refs []string
	for _, r := range b.resources {
		var id struct{ ResourceType, ID string }
		_ = json.Unmarshal(r, &id)
		refs = append(refs, id.ResourceType+"/"+id.ID)
	}
	searches := f.Count(http.MethodGet, "Observation")
	code, body := post(t, s.url, http.MethodPost, "/notify", idOnlyNotification("Subscription/ids", 1, refs), secret)
	if code != http.StatusOK {
		t.Fatalf("HTTP %d: %s", code, body)
	}
	waitDerived(t, f, b.subject, wantValues)
	if got := f.Count(http.MethodGet, "Observation/"+b.gasID); got == 0 {
		t.Fatal("the blood gas was never read by id")
	}
	if got := f.Count(http.MethodGet, "Observation") - f.Count(http.MethodGet, "Observation/"); got != searches {
		t.Fatalf("%d searches: id-only content must be read by id, not searched", got-searches)
	}
}

func TestFakeServerFaultsAreRetriedWithoutLoss(t *testing.T) {
	f := fakefhir.Start(t)
	s := startOnFake(t, f, nil)
	b := fakeBed(t, f, time.Now().Add(-30*time.Minute), true)
	// The first two transactions are refused as throttled, the third is done
	// but its answer is lost: the outbox retries, and the conditional creates
	// keep the retry from storing a second copy.
	f.Fail(http.MethodPost, "", http.StatusTooManyRequests, "1", 1)
	f.Fail(http.MethodPost, "", http.StatusServiceUnavailable, "1", 1)
	f.Drop(http.MethodPost, "", 1)
	post(t, s.url, http.MethodPost, "/notify", notification("Subscription/faults", 1, b.resources), secret)
	waitDerived(t, f, b.subject, wantValues)
	waitIdle(t, s)
	if got := len(derivedOn(f, b.subject)); got != wantValues {
		t.Fatalf("%d derived values after faults, want %d", got, wantValues)
	}
	if n := len(f.Current("Provenance")); n != 1 {
		t.Fatalf("%d Provenance after faults, want 1", n)
	}
}

// TestErrorPathLogsCarryNoIdentifiers runs the demo through the service
// against the fake server while the server misbehaves in every way that
// puts identifiers into error text: failed transactions and a failed
// catch-up search whose OperationOutcome names patients and Observations,
// a write refused for good (a dead letter), an id-only notification for a
// resource the server does not have, and webhook input the service refuses.
// With debug logs on, no identifier may reach them.
func TestErrorPathLogsCarryNoIdentifiers(t *testing.T) {
	f := fakefhir.Start(t)
	leaky := "Observation/obs-leak-4471 of Patient/bed1-stable (birth 1961-04-12) failed: subject bed2-sedated, urn:uuid:77aa0c1e-9d1b-4b1e-8a0e-1f2e3d4c5b6a"
	f.Inject(fakefhir.Fault{Method: http.MethodGet, Path: "Observation", Status: http.StatusInternalServerError, Text: leaky, Times: 5})
	cfg := testConfig(f.BaseURL, t.TempDir())
	cfg.Retention = 10 * 365 * 24 * time.Hour
	cfg.LogLevel = "debug"
	s := start(t, cfg)
	waitFor(t, "the start-up catch-up", func() bool { return f.Count(http.MethodGet, "Observation") > 5 })
	// The first transactions fail as server errors, then one is refused
	// for good, with the identifiers in the server's answer.
	f.Inject(fakefhir.Fault{Method: http.MethodPost, Path: "", Status: http.StatusInternalServerError, Text: leaky, Times: 6})
	f.Inject(fakefhir.Fault{Method: http.MethodPost, Path: "", Status: http.StatusUnprocessableEntity, Text: leaky, Times: 1})
	secrets := sendDemo(t, s)
	secrets = append(secrets, "obs-leak-4471", "77aa0c1e-9d1b-4b1e-8a0e-1f2e3d4c5b6a")

	// A resource the server does not have is taken as deleted (the
	// service never held it, so nothing changes) and answered 200, with
	// the server's 404 in an information line.
	code, _ := post(t, s.url, http.MethodPost, "/notify", idOnlyNotification("Subscription/leak", 1, []string{"Observation/missing-obs-5521"}), secret)
	if code != http.StatusOK {
		t.Fatalf("id-only notification for a missing resource answered %d, want 200", code)
	}
	secrets = append(secrets, "missing-obs-5521")
	bad := `{"resourceType":"Bundle","type":"collection","entry":[{"resource":{"resourceType":"Observation","id":"refused-obs-6631","status":"final",` +
		`"code":{"coding":[{"system":"http://loinc.org","code":"2019-8"}]},"subject":{"reference":"Patient/refused-pat-6632"},` +
		`"effectiveDateTime":"2026-01-01T00:00:00Z","valueQuantity":{"value":"forty","unit":"mm[Hg]"}}}]}`
	post(t, s.url, http.MethodPost, "/notify", []byte(bad), secret)
	post(t, s.url, http.MethodPost, "/notify", []byte(`{"resourceType":"Bundle","type":"collection","entry":[{"resource":{"resourceType":"Observation","id":"not json`), secret)
	secrets = append(secrets, "refused-obs-6631", "refused-pat-6632")

	waitFor(t, "a dead letter and an empty outbox", func() bool {
		h, err := s.svc.Engine().Health(context.Background())
		return err == nil && h.Stats.DeadLetters > 0 && h.Stats.OutboxDepth == 0 && h.Stats.DirtyPatients == 0
	})
	for _, typ := range []string{"Observation", "Provenance", "Device"} {
		for _, raw := range f.Current(typ) {
			var id struct{ ID string }
			_ = json.Unmarshal(raw, &id)
			secrets = append(secrets, id.ID)
		}
	}
	s.stop()
	logs := s.logs.String()
	for _, path := range []string{"HTTP 500", "HTTP 422", "HTTP 404"} {
		if !strings.Contains(logs, path) {
			t.Errorf("no log line shows %q: the error path was not exercised", path)
		}
	}
	checkLogs(t, logs, secrets)
	if testing.Verbose() {
		for _, line := range strings.Split(logs, "\n") {
			if strings.Contains(line, "HTTP ") {
				t.Log(line)
			}
		}
	}
}

// metricValue reads one unlabelled sample from /metrics.
func metricValue(t *testing.T, s *service, name string) string {
	t.Helper()
	resp, err := http.Get(s.url + "/metrics")
	if err != nil {
		t.Fatal(err)
	}
	defer resp.Body.Close()
	body, _ := io.ReadAll(resp.Body)
	for _, line := range strings.Split(string(body), "\n") {
		if v, ok := strings.CutPrefix(line, name+" "); ok {
			return v
		}
	}
	t.Fatalf("%s not in /metrics", name)
	return ""
}

// TestDeadLettersOverGRPC refuses a write for good, then has an operator
// list, show and retry it with `deadspace deadletters --grpc` against the
// running service; the retried write reaches the server, and the
// dead-letter gauge the alert reads falls back to 0.
func TestDeadLettersOverGRPC(t *testing.T) {
	f := fakefhir.Start(t)
	s := startOnFake(t, f, nil)
	f.Inject(fakefhir.Fault{Method: http.MethodPost, Path: "", Status: http.StatusUnprocessableEntity, Times: 1,
		Text: "Observation.subject: Patient/leaky-7731 is unknown"})
	b := fakeBed(t, f, time.Now().Add(-30*time.Minute), true)
	post(t, s.url, http.MethodPost, "/notify", notification("Subscription/dl", 1, b.resources), secret)
	waitFor(t, "a dead letter", func() bool {
		h, err := s.svc.Engine().Health(context.Background())
		return err == nil && h.Stats.DeadLetters == 1 && h.Stats.OutboxDepth == 0
	})
	if got := metricValue(t, s, "deadspace_dead_letters"); got != "1" {
		t.Errorf("deadspace_dead_letters %s, want 1", got)
	}
	if n := len(derivedOn(f, b.subject)); n != 0 {
		t.Fatalf("%d derived values on the server before the retry", n)
	}
	cmd := deadLettersCommand(t, s)
	list := cmd("list")
	if !strings.Contains(list, "1 dead letters") {
		t.Fatalf("list:\n%s", list)
	}
	id := strings.Fields(strings.Split(list, "\n")[2])[0]
	show := cmd("show", id)
	if !strings.Contains(show, "HTTP 422 Unprocessable Entity: Observation.subject: Patient/[redacted] is unknown") || strings.Contains(show, "leaky-7731") {
		t.Errorf("show:\n%s", show)
	}
	if out := cmd("retry", id); !strings.Contains(out, "back in the outbox") {
		t.Errorf("retry: %s", out)
	}
	waitDerived(t, f, b.subject, wantValues)
	waitIdle(t, s)
	if got := metricValue(t, s, "deadspace_dead_letters"); got != "0" {
		t.Errorf("deadspace_dead_letters %s after the retry, want 0", got)
	}
	if got := metricValue(t, s, "deadspace_dead_lettered_total"); got != "1" {
		t.Errorf("deadspace_dead_lettered_total %s, want 1 (it counts burials, which a retry does not undo)", got)
	}
	var errOut bytes.Buffer
	if code := deadletters.Main(context.Background(), []string{"--grpc", s.svc.GRPCAddr(), "show", id}, func(string) string { return "" }, io.Discard, &errOut); code != 1 || !strings.Contains(errOut.String(), "no dead letter") {
		t.Errorf("show after retry: exit %d %s", code, errOut.String())
	}
}

// deadLettersCommand runs `deadspace deadletters` against the service's
// gRPC API and returns what it printed; a non-zero exit fails the test.
func deadLettersCommand(t *testing.T, s *service) func(args ...string) string {
	return func(args ...string) string {
		t.Helper()
		var out, errOut bytes.Buffer
		if code := deadletters.Main(context.Background(), append([]string{"--grpc", s.svc.GRPCAddr()}, args...), func(string) string { return "" }, &out, &errOut); code != 0 {
			t.Fatalf("deadletters %v: exit %d: %s", args, code, errOut.String())
		}
		return out.String()
	}
}
