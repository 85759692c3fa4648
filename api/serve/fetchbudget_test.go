package serve_test

import (
	"bytes"
	"io"
	"net/http"
	"testing"
	"time"

	"github.com/deadspace-fhir/deadspace/api/serve"
	"github.com/deadspace-fhir/deadspace/fhir/fhirtest/fakefhir"
)

// TestFakeIDOnlyReadOverItsBudgetIsAnsweredPromptly: whatever keeps the
// FHIR server from giving a resource an id-only notification names within
// the fetch budget (--fetch-budget), the sender gets a prompt 503 with a
// Retry-After (the server's own, or 30 s when it gave none) instead of
// waiting on the service's retries or on a server that does not answer,
// and nothing is lost: delivered again once the server answers, the
// notification is taken and the blood gas's values derived.
func TestFakeIDOnlyReadOverItsBudgetIsAnsweredPromptly(t *testing.T) {
	const budget = 2 * time.Second
	for _, tc := range []struct {
		name       string
		fault      fakefhir.Fault
		retryAfter string
	}{
		{"429 with Retry-After", fakefhir.Fault{Status: http.StatusTooManyRequests, RetryAfter: "60", Times: 1}, "60"},
		{"503 with Retry-After", fakefhir.Fault{Status: http.StatusServiceUnavailable, RetryAfter: "120", Times: 1}, "120"},
		{"a server that never answers the read", fakefhir.Fault{Delay: time.Hour, Times: 1}, "30"},
		{"429 without Retry-After, to every retry", fakefhir.Fault{Status: http.StatusTooManyRequests}, "30"},
	} {
		t.Run(tc.name, func(t *testing.T) {
			f := fakefhir.Start(t)
			s := startOnFake(t, f, func(c *serve.Config) { c.FetchBudget = budget })
			b := fakeBed(t, f, time.Now().Add(-30*time.Minute), true)
			if code, body := post(t, s.url, http.MethodPost, "/notify", notification("Subscription/budget", 1, b.resources[:len(b.resources)-1]), secret); code != http.StatusOK {
				t.Fatalf("HTTP %d: %s", code, body)
			}
			waitIdle(t, s)

			fault := tc.fault
			fault.Method, fault.Path = http.MethodGet, "Observation/"+b.gasID
			f.Inject(fault)
			sender := &http.Client{Timeout: 20 * time.Second}
			note := idOnlyNotification("Subscription/budget", len(b.resources), []string{"Observation/" + b.gasID})
			start := time.Now()
			code, header, err := deliverTo(sender, s.url, note)
			if err != nil {
				t.Fatalf("no answer within the sender's %v: %v", sender.Timeout, err)
			}
			t.Logf("answered %d after %v", code, time.Since(start).Round(100*time.Millisecond))
			if code != http.StatusServiceUnavailable || header.Get("Retry-After") != tc.retryAfter {
				t.Fatalf("answered %d with Retry-After %q, want 503 with %q", code, header.Get("Retry-After"), tc.retryAfter)
			}

			f.ClearFaults()
			if code, _, err := deliverTo(sender, s.url, note); err != nil || code != http.StatusOK {
				t.Fatalf("delivered again once the server answers: %d, %v", code, err)
			}
			waitUpTo(t, 30*time.Second, "the blood gas's values", func() bool { return len(derivedOn(f, b.subject)) == wantValues })
		})
	}
}

// TestFakeDeferredIDOnlyReadIsCaughtUpWithoutTheSender: the sender is
// answered 503 for a read the server throttled, and never delivers the
// notification again. The service does not rely on it: a catch-up search
// after the server's Retry-After finds the blood gas, and its values are
// derived.
func TestFakeDeferredIDOnlyReadIsCaughtUpWithoutTheSender(t *testing.T) {
	f := fakefhir.Start(t)
	s := startOnFake(t, f, func(c *serve.Config) { c.FetchBudget = time.Second })
	b := fakeBed(t, f, time.Now().Add(-30*time.Minute), true)
	if code, body := post(t, s.url, http.MethodPost, "/notify", notification("Subscription/once", 1, b.resources[:len(b.resources)-1]), secret); code != http.StatusOK {
		t.Fatalf("HTTP %d: %s", code, body)
	}
	waitIdle(t, s)

	f.Fail(http.MethodGet, "Observation/"+b.gasID, http.StatusTooManyRequests, "3", 1)
	searches := f.Count(http.MethodGet, "Observation") - f.Count(http.MethodGet, "Observation/")
	code, header, err := deliverTo(&http.Client{Timeout: 20 * time.Second}, s.url,
		idOnlyNotification("Subscription/once", len(b.resources), []string{"Observation/" + b.gasID}))
	if err != nil || code != http.StatusServiceUnavailable || header.Get("Retry-After") != "3" {
		t.Fatalf("answered %d with Retry-After %q (%v), want 503 with the server's 3", code, header.Get("Retry-After"), err)
	}
	waitUpTo(t, 30*time.Second, "the blood gas's values, caught up", func() bool { return len(derivedOn(f, b.subject)) == wantValues })
	if got := f.Count(http.MethodGet, "Observation") - f.Count(http.MethodGet, "Observation/"); got == searches {
		t.Fatal("no catch-up search ran: the values came some other way")
	}
}

// deliverTo posts an id-only notification as a sender with a timeout of
// its own would.
func deliverTo(sender *http.Client, url string, note []byte) (int, http.Header, error) {
	req, err := http.NewRequest(http.MethodPost, url+"/notify", bytes.NewReader(note))
	if err != nil {
		return 0, nil, err
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
