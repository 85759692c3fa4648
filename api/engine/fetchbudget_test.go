package engine_test

import (
	"context"
	"encoding/json"
	"errors"
	"net/http"
	"sync"
	"testing"
	"time"

	"github.com/deadspace-fhir/deadspace/api/engine"
	"github.com/deadspace-fhir/deadspace/api/engine/enginetest"
	"github.com/deadspace-fhir/deadspace/api/store/boltstore"
	"github.com/deadspace-fhir/deadspace/derive"
	"github.com/deadspace-fhir/deadspace/fhir/client"
	"github.com/deadspace-fhir/deadspace/fhir/decode"
	"github.com/deadspace-fhir/deadspace/fhir/fhirtest/fakefhir"
)

// fetchEngine is an engine reading from f with the fetch budget given and
// the client serve builds (default retries, real waits), except that each
// backoff waits its whole ceiling: without a budget, a server that answers
// 429 without Retry-After to every attempt holds a read 7.5 s.
func fetchEngine(t *testing.T, f *fakefhir.Server, budget time.Duration, hooks engine.Hooks) *engine.Engine {
	t.Helper()
	cl, err := client.New(client.Config{BaseURL: f.BaseURL, Jitter: func(ceil time.Duration) time.Duration { return ceil }})
	if err != nil {
		t.Fatal(err)
	}
	eng, err := engine.New(engine.Config{
		Store: enginetest.OpenStore(t, boltstore.Options{NoSync: true}), Decoder: decode.New(decode.Options{}),
		Encoder: enginetest.Encoder(t), Derive: derive.DefaultConfig(), Client: cl, FetchBudget: budget, Hooks: hooks,
		Retention: 400 * 24 * time.Hour, Freeze: 2 * time.Hour,
	})
	if err != nil {
		t.Fatal(err)
	}
	return eng
}

// TestFetchWithinItsBudget: the reads of an id-only notification are made
// while the sender waits. Whatever keeps the FHIR server from giving the
// resource within the fetch budget (a Retry-After longer than what is left
// of it, a server that does not answer, a 429 or 503 without Retry-After
// that the client's own backoff keeps meeting) ends the read at once with
// a ReadDeferred carrying the wait to ask of the sender: the server's
// Retry-After, or DeferredRetryAfter. A wait that fits in the budget is
// waited, and the read succeeds. Once the server gives the resource, the
// same Fetch stores it.
func TestFetchWithinItsBudget(t *testing.T) {
	const budget = time.Second
	for _, tc := range []struct {
		name      string
		fault     fakefhir.Fault
		wantAfter time.Duration // 0: the read succeeds within the budget
	}{
		{"429 with Retry-After: 60", fakefhir.Fault{Status: http.StatusTooManyRequests, RetryAfter: "60", Times: 1}, time.Minute},
		{"503 with Retry-After: 120", fakefhir.Fault{Status: http.StatusServiceUnavailable, RetryAfter: "120", Times: 1}, 2 * time.Minute},
		{"429 with a Retry-After past the cap", fakefhir.Fault{Status: http.StatusTooManyRequests, RetryAfter: "86400", Times: 1}, 15 * time.Minute},
		{"503 with an HTTP-date Retry-After", fakefhir.Fault{Status: http.StatusServiceUnavailable,
			RetryAfter: time.Now().Add(10 * time.Minute).UTC().Format(http.TimeFormat), Times: 1}, 10 * time.Minute},
		{"a server that never answers", fakefhir.Fault{Delay: time.Hour}, engine.DeferredRetryAfter},
		{"429 without Retry-After, every time", fakefhir.Fault{Status: http.StatusTooManyRequests}, engine.DeferredRetryAfter},
		{"503 without Retry-After, every time", fakefhir.Fault{Status: http.StatusServiceUnavailable}, engine.DeferredRetryAfter},
		{"429 with a Retry-After within the budget", fakefhir.Fault{Status: http.StatusTooManyRequests, RetryAfter: "0", Times: 1}, 0},
		{"a slow answer within the budget", fakefhir.Fault{Delay: 100 * time.Millisecond, Times: 1}, 0},
	} {
		t.Run(tc.name, func(t *testing.T) {
			f := fakefhir.Start(t)
			eng := fetchEngine(t, f, budget, engine.Hooks{})
			created, err := f.Put(orderObs("Patient/b1", "", "", time.Time{}, "final", "2019-8", "mm[Hg]", 44, orderAt(60)))
			if err != nil {
				t.Fatal(err)
			}
			ref := "Observation/" + idOf(t, created)
			fault := tc.fault
			fault.Method, fault.Path = http.MethodGet, ref
			f.Inject(fault)

			start := time.Now()
			rec, err := eng.Fetch(context.Background(), []string{ref})
			took := time.Since(start)
			if tc.wantAfter == 0 {
				if err != nil || rec.Accepted != 1 {
					t.Fatalf("Fetch: %+v, %v; want the resource stored", rec, err)
				}
				return
			}
			var d *engine.ReadDeferred
			if !errors.As(err, &d) {
				t.Fatalf("Fetch after %v: %+v, %v; want a ReadDeferred", took, rec, err)
			}
			t.Logf("deferred after %v: %v", took.Round(10*time.Millisecond), err)
			if d.RetryAfter != tc.wantAfter && (tc.wantAfter != 10*time.Minute || d.RetryAfter < 9*time.Minute || d.RetryAfter > tc.wantAfter) {
				t.Errorf("RetryAfter %v, want %v", d.RetryAfter, tc.wantAfter)
			}
			// The budget, not the server's wait nor the client's retries,
			// bounds the read: a few seconds' margin for a loaded machine.
			if took > budget+5*time.Second {
				t.Errorf("deferred after %v with a budget of %v", took, budget)
			}
			if !client.IsRetryable(err) && !errors.Is(err, context.DeadlineExceeded) {
				t.Errorf("the deferral hides its cause: %v", err)
			}

			f.ClearFaults()
			if rec, err := eng.Fetch(context.Background(), []string{ref}); err != nil || rec.Accepted != 1 {
				t.Fatalf("Fetch once the server answers: %+v, %v; want the resource stored", rec, err)
			}
		})
	}
}

// TestDeferredReadIsCaughtUp: a read deferred for the fetch budget is not
// left to the sender alone. After the server's Retry-After a catch-up
// search runs (trigger read-deferred) and stores the resource, though the
// notification is never delivered again.
func TestDeferredReadIsCaughtUp(t *testing.T) {
	f := fakefhir.Start(t)
	var mu sync.Mutex
	var triggers []string
	polled := 0
	eng := fetchEngine(t, f, 500*time.Millisecond, engine.Hooks{
		CatchUp: func(trigger string) { mu.Lock(); triggers = append(triggers, trigger); mu.Unlock() },
		Received: func(mode, resourceType string) {
			if mode == "poll" && resourceType == "Observation" {
				mu.Lock()
				polled++
				mu.Unlock()
			}
		},
	})
	ctx, cancel := context.WithCancel(context.Background())
	done := make(chan struct{})
	go func() { _ = eng.Run(ctx); close(done) }()
	t.Cleanup(func() { cancel(); <-done })
	seen := func(trigger string) bool {
		mu.Lock()
		defer mu.Unlock()
		for _, tr := range triggers {
			if tr == trigger {
				return true
			}
		}
		return false
	}
	waitWithin(t, 10*time.Second, "the start-up catch-up", func() bool { return seen("start") })

	created, err := f.Put(orderObs("Patient/b1", "", "", time.Time{}, "final", "2019-8", "mm[Hg]", 44, orderAt(60)))
	if err != nil {
		t.Fatal(err)
	}
	ref := "Observation/" + idOf(t, created)
	f.Fail(http.MethodGet, ref, http.StatusTooManyRequests, "2", 1)
	var d *engine.ReadDeferred
	if _, err := eng.Fetch(ctx, []string{ref}); !errors.As(err, &d) || d.RetryAfter != 2*time.Second {
		t.Fatalf("Fetch: %v; want a ReadDeferred asking for 2s", err)
	}
	waitWithin(t, 20*time.Second, "the catch-up search after the Retry-After", func() bool { return seen("read-deferred") })
	waitWithin(t, 10*time.Second, "the blood gas stored by the catch-up", func() bool {
		mu.Lock()
		defer mu.Unlock()
		return polled > 0
	})
}

func idOf(t *testing.T, resource []byte) string {
	t.Helper()
	var r struct{ ID string }
	if err := json.Unmarshal(resource, &r); err != nil || r.ID == "" {
		t.Fatalf("no id in %s", resource)
	}
	return r.ID
}

func waitWithin(t *testing.T, d time.Duration, what string, cond func() bool) {
	t.Helper()
	deadline := time.Now().Add(d)
	for !cond() {
		if time.Now().After(deadline) {
			t.Fatalf("timed out after %v waiting for %s", d, what)
		}
		time.Sleep(20 * time.Millisecond)
	}
}
