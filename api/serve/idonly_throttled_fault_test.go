package serve_test

import (
	"bytes"
	"io"
	"net/http"
	"testing"
	"time"

	"github.com/deadspace-fhir/deadspace/fhir/fhirtest/fakefhir"
)

// TestFakeThrottledIDOnlyReadIsAnsweredPromptly: an id-only notification
// names a new blood gas, and the FHIR server, busy, answers the service's
// read of it 429 Too Many Requests with Retry-After: 60 (well under the
// client's 2-minute cap). The server that sent the notification waits for
// the webhook's answer with a timeout of its own, commonly 10–30 s, and
// retries the notification when it gets none.
//
// The operator expects the webhook to answer that sender promptly: 200
// once the gas is durably stored, or 503 with a Retry-After so the sender
// delivers again later (the README: "A store failure answers 503 so the
// sender retries"), and in the end the gas's values to be derived. Today
// the webhook's handler sits in the client's retry loop for as long as
// the server's Retry-After (engine.Fetch reads with every retry and
// Retry-After wait, up to 4 retries of up to 2 minutes each) while the
// sender waits; the HTTP server's 60 s write timeout then cuts the
// connection with no answer at all. The sender sees a dropped connection,
// the request holds a --max-concurrent-requests slot meanwhile, and a
// throttled server makes every id-only notification take a minute or more.
// The read in the request path should have a budget of its own (no
// Retry-After wait longer than a sender's patience), and the webhook should
// pass a throttling answer on as 503 with Retry-After.
func TestFakeThrottledIDOnlyReadIsAnsweredPromptly(t *testing.T) {
	f := fakefhir.Start(t)
	s := startOnFake(t, f, nil)
	b := fakeBed(t, f, time.Now().Add(-30*time.Minute), true)
	// Everything but the blood gas arrives in full.
	if code, body := post(t, s.url, http.MethodPost, "/notify", notification("Subscription/throttled", 1, b.resources[:len(b.resources)-1]), secret); code != http.StatusOK {
		t.Fatalf("HTTP %d: %s", code, body)
	}
	waitIdle(t, s)

	f.Fail(http.MethodGet, "Observation/"+b.gasID, http.StatusTooManyRequests, "60", 1)
	// The sender's patience: 20 s.
	sender := &http.Client{Timeout: 20 * time.Second}
	deliver := func() (int, http.Header, error) {
		req, err := http.NewRequest(http.MethodPost, s.url+"/notify",
			bytes.NewReader(idOnlyNotification("Subscription/throttled", len(b.resources), []string{"Observation/" + b.gasID})))
		if err != nil {
			t.Fatal(err)
		}
		req.Header.Set("Content-Type", "application/fhir+json")
		req.Header.Set("Authorization", "Bearer "+secret)
		resp, err := sender.Do(req)
		if err != nil {
			return 0, nil, err
		}
		defer resp.Body.Close()
		_, _ = io.Copy(io.Discard, resp.Body)
		return resp.StatusCode, resp.Header, nil
	}
	start := time.Now()
	code, header, err := deliver()
	if err != nil {
		t.Fatalf("the sender got no answer to an id-only notification within %v while the FHIR server throttled the read: %v",
			sender.Timeout, err)
	}
	t.Logf("answered %d after %v", code, time.Since(start).Round(100*time.Millisecond))
	switch code {
	case http.StatusOK:
	case http.StatusServiceUnavailable, http.StatusTooManyRequests:
		if header.Get("Retry-After") == "" {
			t.Errorf("answered %d without Retry-After", code)
		}
		// The sender delivers again; the server no longer throttles.
		if code, _, err = deliver(); err != nil || code != http.StatusOK {
			t.Fatalf("the notification delivered again: %d, %v", code, err)
		}
	default:
		t.Fatalf("answered %d, want 200, or 503 with Retry-After", code)
	}
	waitUpTo(t, 30*time.Second, "the blood gas's values", func() bool { return len(derivedOn(f, b.subject)) == wantValues })
}
