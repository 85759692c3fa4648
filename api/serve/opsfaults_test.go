package serve_test

import (
	"bytes"
	"context"
	"encoding/json"
	"fmt"
	"io"
	"net/http"
	"net/http/httptest"
	"os"
	"path/filepath"
	"strings"
	"sync"
	"testing"
	"time"

	"github.com/deadspace-fhir/deadspace/api/serve"
	"github.com/deadspace-fhir/deadspace/fhir/fhirtest/fakefhir"
)

// handshake is the handshake notification a server sends when it starts
// (or starts again) delivering a subscription: it counts no events.
func handshake(sub string) []byte {
	return []byte(fmt.Sprintf(`{"resourceType":"Bundle","type":"history","entry":[{"fullUrl":"urn:uuid:5e1f7c1a-0000-4000-8000-0000000000cc",`+
		`"resource":{"resourceType":"Parameters","parameter":[{"name":"subscription","valueReference":{"reference":"%s"}},`+
		`{"name":"status","valueCode":"requested"},{"name":"type","valueCode":"handshake"},`+
		`{"name":"events-since-subscription-start","valueString":"0"}]},"request":{"method":"GET","url":"%s/$status"},"response":{"status":"200"}}]}`,
		sub, sub))
}

// waitUpTo is waitFor with a bound of its own, so a test of a fault fails
// in seconds rather than minutes.
func waitUpTo(t *testing.T, d time.Duration, what string, cond func() bool) {
	t.Helper()
	deadline := time.Now().Add(d)
	for !cond() {
		if time.Now().After(deadline) {
			t.Fatalf("after %v, still waiting for %s", d, what)
		}
		time.Sleep(100 * time.Millisecond)
	}
}

// A server that restarts a subscription (its in-memory counters lost, or the
// subscription re-created under the same id) sends a handshake and numbers
// its events from 1 again. A gap in the new numbering must be caught up as
// any other gap is: the highest number seen before the restart must not
// hide every gap until the new numbers pass it.
func TestFakeRestartedSubscriptionGapCatchesUp(t *testing.T) {
	f := fakefhir.Start(t)
	const grace = 300 * time.Millisecond
	s := startOnFake(t, f, func(c *serve.Config) { c.GapGrace = grace })
	const sub = "Subscription/restarted"

	// Before the restart: the subscription had run a while; its last
	// events are delivered.
	old := fakeBed(t, f, time.Now().Add(-90*time.Minute), true)
	before := f.Count(http.MethodGet, "Observation")
	post(t, s.url, http.MethodPost, "/notify", heartbeat(sub, 472), secret)
	waitUpTo(t, 20*time.Second, "the catch-up of the events before this test", func() bool { return f.Count(http.MethodGet, "Observation") > before })
	time.Sleep(2 * grace)
	post(t, s.url, http.MethodPost, "/notify", notification(sub, 473, old.resources), secret)
	waitDerived(t, f, old.subject, wantValues)
	waitIdle(t, s)

	// The server restarts the subscription: a handshake, then events from 1.
	if code, body := post(t, s.url, http.MethodPost, "/notify", handshake(sub), secret); code != http.StatusOK {
		t.Fatalf("handshake: HTTP %d: %s", code, body)
	}
	b := fakeBed(t, f, time.Now().Add(-30*time.Minute), false)
	post(t, s.url, http.MethodPost, "/notify", notification(sub, 1, b.resources), secret)
	waitIdle(t, s)
	searches := f.Count(http.MethodGet, "Observation")

	// The blood gas is event len+1; its notification is lost. The next
	// notification (event len+2) skips it.
	if _, err := f.Put([]byte(observation(b.subject, "http://loinc.org", "2019-8", "mm[Hg]", 44, time.Now().Add(-30*time.Minute), "final"))); err != nil {
		t.Fatal(err)
	}
	later, err := f.Put([]byte(observation(b.subject, "http://loinc.org", "8867-4", "/min", 88, time.Now(), "final")))
	if err != nil {
		t.Fatal(err)
	}
	post(t, s.url, http.MethodPost, "/notify", notification(sub, len(b.resources)+2, []json.RawMessage{later}), secret)
	waitUpTo(t, 20*grace+10*time.Second, "a catch-up search for the event the restarted subscription skipped", func() bool {
		return f.Count(http.MethodGet, "Observation") > searches
	})
	waitUpTo(t, 20*time.Second, "the skipped blood gas's values", func() bool { return len(derivedOn(f, b.subject)) == wantValues })
}

// entryFaultProxy stands in front of a FHIR base. The first transaction
// that carries a Provenance is sent on without it, and the server's answer
// gets, in the Provenance's place, an entry that failed: the answer of a
// server that does not keep a transaction all or nothing and reports a
// failed entry inside a 200 transaction-response.
type entryFaultProxy struct {
	target string
	mu     sync.Mutex
	done   bool
}

func (p *entryFaultProxy) ServeHTTP(w http.ResponseWriter, r *http.Request) {
	body, _ := io.ReadAll(r.Body)
	var bundle struct {
		ResourceType string            `json:"resourceType"`
		Type         string            `json:"type"`
		Entry        []json.RawMessage `json:"entry"`
	}
	failAt := -1
	p.mu.Lock()
	if !p.done && r.Method == http.MethodPost && strings.TrimSuffix(r.URL.Path, "/") == "/fhir" && json.Unmarshal(body, &bundle) == nil && bundle.Type == "transaction" {
		for i, e := range bundle.Entry {
			var en struct {
				Resource struct{ ResourceType string } `json:"resource"`
			}
			if json.Unmarshal(e, &en) == nil && en.Resource.ResourceType == "Provenance" {
				failAt = i
			}
		}
		if failAt >= 0 {
			p.done = true
			bundle.Entry = append(bundle.Entry[:failAt:failAt], bundle.Entry[failAt+1:]...)
			body, _ = json.Marshal(map[string]any{"resourceType": "Bundle", "type": "transaction", "entry": bundle.Entry})
		}
	}
	p.mu.Unlock()
	req, _ := http.NewRequest(r.Method, p.target+r.URL.RequestURI(), bytes.NewReader(body))
	req.Header = r.Header.Clone()
	resp, err := http.DefaultTransport.RoundTrip(req)
	if err != nil {
		http.Error(w, err.Error(), http.StatusBadGateway)
		return
	}
	defer resp.Body.Close()
	out, _ := io.ReadAll(resp.Body)
	if failAt >= 0 && resp.StatusCode == http.StatusOK {
		var answer map[string]any
		if json.Unmarshal(out, &answer) == nil {
			entries, _ := answer["entry"].([]any)
			failed := map[string]any{"response": map[string]any{"status": "400 Bad Request",
				"outcome": map[string]any{"resourceType": "OperationOutcome", "issue": []any{map[string]any{"severity": "error", "code": "invalid", "diagnostics": "Provenance.agent is invalid"}}}}}
			entries = append(entries[:failAt:failAt], append([]any{failed}, entries[failAt:]...)...)
			answer["entry"] = entries
			out, _ = json.Marshal(answer)
		}
	}
	for k, vs := range resp.Header {
		if k != "Content-Length" {
			w.Header()[k] = vs
		}
	}
	w.WriteHeader(resp.StatusCode)
	_, _ = w.Write(out)
}

// A transaction answered 200 whose Provenance entry failed (a server that
// reports entry-level errors in a transaction-response instead of failing
// the whole transaction) is not an acknowledged write: the Provenance is
// not on the server, and the write must be sent again (or go to the dead
// letters), never counted as done with its Provenance lost.
func TestFakeTransactionEntryErrorIsNotAcknowledged(t *testing.T) {
	f := fakefhir.Start(t)
	proxy := &entryFaultProxy{target: strings.TrimSuffix(f.BaseURL, "/fhir")}
	ps := httptest.NewServer(proxy)
	t.Cleanup(ps.Close)
	cfg := testConfig(ps.URL+"/fhir", t.TempDir())
	cfg.MaxTxEntries = 16 // the values and their Provenance in one transaction
	s := start(t, cfg)
	waitUpTo(t, 20*time.Second, "the start-up catch-up", func() bool { return f.Count(http.MethodGet, "Observation") > 0 })
	b := fakeBed(t, f, time.Now().Add(-30*time.Minute), true)
	post(t, s.url, http.MethodPost, "/notify", notification("Subscription/entryfault", 1, b.resources), secret)
	waitUpTo(t, 30*time.Second, "the derived values", func() bool { return len(derivedOn(f, b.subject)) == wantValues })
	waitIdle(t, s)
	if !proxy.done {
		t.Fatal("no transaction carried a Provenance: the test did not inject its fault")
	}
	h, err := s.svc.Engine().Health(context.Background())
	if err != nil {
		t.Fatal(err)
	}
	if n := len(f.Current("Provenance")); n != 1 {
		t.Fatalf("%d Provenance on the server after its entry failed inside a 200 transaction-response, want 1 (outbox %d, dead letters %d: the write was counted as done)",
			n, h.Stats.OutboxDepth, h.Stats.DeadLetters)
	}
}

// --heartbeat-timeout is there to notice a subscription that stopped
// delivering. After a restart, a subscription the server turned off while
// the service was down sends nothing at all: the silence must count from
// the start, so the service catches up once the timeout passes, as it does
// after a silence that follows a notification
// (TestFakeHeartbeatSilenceCatchesUp).
func TestFakeSilenceFromStartCatchesUp(t *testing.T) {
	f := fakefhir.Start(t)
	startOnFake(t, f, func(c *serve.Config) { c.Heartbeat = 2 * time.Second })
	// No notification ever arrives; data does reach the server.
	b := fakeBed(t, f, time.Now().Add(-30*time.Minute), true)
	waitUpTo(t, 20*time.Second, "the values of data the silent subscription never announced", func() bool {
		return len(derivedOn(f, b.subject)) == wantValues
	})
}

// A Patient deleted on the server (merged into another record, say) answers
// 410 Gone to a read, as one that never existed answers 404. Either way the
// service cannot learn the patient's facts: the blood gas must still be
// derived (the values that need the facts left out with
// patient-facts-missing), not kept pending and evaluated again for ever.
func TestFakePatientGoneStillDerives(t *testing.T) {
	f := fakefhir.Start(t)
	s := startOnFake(t, f, nil)
	b := fakeBed(t, f, time.Now().Add(-30*time.Minute), true)
	if !f.Delete("Patient", strings.TrimPrefix(b.subject, "Patient/")) {
		t.Fatal("the fake did not delete the Patient")
	}
	// The notification carries the Observations only: the facts must be read.
	post(t, s.url, http.MethodPost, "/notify", notification("Subscription/gone", 1, b.resources[1:]), secret)
	waitUpTo(t, 20*time.Second, "the blood gas of a patient whose Patient resource is gone to be evaluated", func() bool {
		h, err := s.svc.Engine().Health(context.Background())
		return err == nil && h.Stats.DirtyPatients == 0 && len(derivedOn(f, b.subject)) > 0
	})
}

// tokenProxy passes requests to a FHIR base only with the bearer token it
// currently accepts, and answers 401 otherwise, as a server does once a
// short-lived token has expired.
type tokenProxy struct {
	target string
	mu     sync.Mutex
	token  string
}

func (p *tokenProxy) accept(token string) {
	p.mu.Lock()
	p.token = token
	p.mu.Unlock()
}

func (p *tokenProxy) ServeHTTP(w http.ResponseWriter, r *http.Request) {
	p.mu.Lock()
	want := "Bearer " + p.token
	p.mu.Unlock()
	if r.Header.Get("Authorization") != want {
		w.Header().Set("Content-Type", "application/fhir+json")
		w.Header().Set("WWW-Authenticate", `Bearer error="invalid_token"`)
		w.WriteHeader(http.StatusUnauthorized)
		_, _ = io.WriteString(w, `{"resourceType":"OperationOutcome","issue":[{"severity":"error","code":"login","diagnostics":"token expired"}]}`)
		return
	}
	body, _ := io.ReadAll(r.Body)
	req, _ := http.NewRequest(r.Method, p.target+r.URL.RequestURI(), bytes.NewReader(body))
	req.Header = r.Header.Clone()
	resp, err := http.DefaultTransport.RoundTrip(req)
	if err != nil {
		http.Error(w, err.Error(), http.StatusBadGateway)
		return
	}
	defer resp.Body.Close()
	for k, vs := range resp.Header {
		w.Header()[k] = vs
	}
	w.WriteHeader(resp.StatusCode)
	_, _ = io.Copy(w, resp.Body)
}

// --fhir-token-file is how a short-lived token is handed to the service by
// whatever renews it (a mounted secret, a token agent): the file is
// replaced before the old token expires. Once the server refuses the old
// token (401), the service must use the token the file now holds, not
// retry the expired one until it is restarted.
func TestFakeRotatedTokenFileIsUsedAfter401(t *testing.T) {
	f := fakefhir.Start(t)
	proxy := &tokenProxy{target: strings.TrimSuffix(f.BaseURL, "/fhir"), token: "first-token-0123456789"}
	ps := httptest.NewServer(proxy)
	t.Cleanup(ps.Close)
	tokenFile := filepath.Join(t.TempDir(), "fhir-token")
	if err := os.WriteFile(tokenFile, []byte("first-token-0123456789\n"), 0o600); err != nil {
		t.Fatal(err)
	}
	cfg := testConfig(ps.URL+"/fhir", t.TempDir())
	cfg.FHIRTokenFile = tokenFile
	if err := cfg.ValidateFHIR(); err != nil { // as the command line does
		t.Fatal(err)
	}
	s := start(t, cfg)
	first := fakeBed(t, f, time.Now().Add(-90*time.Minute), true)
	post(t, s.url, http.MethodPost, "/notify", notification("Subscription/token", 1, first.resources), secret)
	waitUpTo(t, 20*time.Second, "the values written with the first token", func() bool { return len(derivedOn(f, first.subject)) == wantValues })

	// The token is renewed: the file holds the new one, and the server
	// refuses the old one from now on.
	if err := os.WriteFile(tokenFile, []byte("second-token-0123456789\n"), 0o600); err != nil {
		t.Fatal(err)
	}
	proxy.accept("second-token-0123456789")
	second := fakeBed(t, f, time.Now().Add(-30*time.Minute), true)
	post(t, s.url, http.MethodPost, "/notify", notification("Subscription/token", len(first.resources)+1, second.resources), secret)
	waitUpTo(t, 30*time.Second, "the values written after the token file was renewed", func() bool { return len(derivedOn(f, second.subject)) == wantValues })
}
