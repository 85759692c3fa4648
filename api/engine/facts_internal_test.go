package engine

import (
	"fmt"
	"net/http"
	"net/http/httptest"
	"sync/atomic"
	"testing"
	"time"

	"github.com/deadspace-fhir/deadspace/api/engine/enginetest"
	"github.com/deadspace-fhir/deadspace/api/store/boltstore"
	"github.com/deadspace-fhir/deadspace/derive"
	"github.com/deadspace-fhir/deadspace/fhir/client"
	"github.com/deadspace-fhir/deadspace/fhir/decode"
)

// A Patient read the server refuses for good (no such patient, deleted,
// not allowed) gives unknown facts, so the patient is evaluated rather
// than left pending for ever, and the refusal is remembered for a while,
// so evaluations every few seconds do not each read it again. A failure a
// retry can mend (the server down, throttling, a credential being
// renewed) keeps the patient pending.
func TestPatientReadRefusals(t *testing.T) {
	t.Parallel()
	cases := []struct {
		name    string
		status  int
		unknown bool // evaluated with unknown facts (else: pending)
	}{
		{"not found", http.StatusNotFound, true},
		{"gone", http.StatusGone, true},
		{"forbidden", http.StatusForbidden, true},
		{"bad request", http.StatusBadRequest, true},
		{"unauthorized", http.StatusUnauthorized, false},
		{"throttled", http.StatusTooManyRequests, false},
		{"unavailable", http.StatusServiceUnavailable, false},
		{"server error", http.StatusInternalServerError, false},
	}
	for _, c := range cases {
		t.Run(c.name, func(t *testing.T) {
			t.Parallel()
			var reads atomic.Int32
			srv := httptest.NewServer(http.HandlerFunc(func(w http.ResponseWriter, r *http.Request) {
				reads.Add(1)
				w.Header().Set("Content-Type", "application/fhir+json")
				w.WriteHeader(c.status)
				fmt.Fprint(w, `{"resourceType":"OperationOutcome","issue":[{"severity":"error","code":"processing"}]}`)
			}))
			defer srv.Close()
			cl, err := client.New(client.Config{BaseURL: srv.URL + "/fhir", MaxRetries: -1})
			if err != nil {
				t.Fatal(err)
			}
			e, err := New(Config{Store: enginetest.OpenStore(t, boltstore.Options{NoSync: true}), Decoder: decode.New(decode.Options{}),
				Encoder: enginetest.Encoder(t), Derive: derive.DefaultConfig(), Client: cl})
			if err != nil {
				t.Fatal(err)
			}
			for range 3 {
				facts, err := e.patientFacts(t.Context(), "Patient/pf-1")
				if got := err == nil; got != c.unknown {
					t.Fatalf("HTTP %d: error %v; want evaluated with unknown facts: %v", c.status, err, c.unknown)
				}
				if err == nil && facts != (derive.Patient{}) {
					t.Fatalf("HTTP %d gave facts %+v", c.status, facts)
				}
			}
			want := int32(3)
			if c.unknown {
				want = 1
			}
			if n := reads.Load(); n != want {
				t.Errorf("HTTP %d: %d reads for three evaluations, want %d", c.status, n, want)
			}
		})
	}
}

// The refusals remembered expire, and are bounded in number.
func TestFactsUnavailableExpiresAndIsBounded(t *testing.T) {
	t.Parallel()
	var f factsUnavailable
	t0 := time.Date(2026, 3, 1, 8, 0, 0, 0, time.UTC)
	f.remember("Patient/a", t0)
	if !f.known("Patient/a", t0.Add(factsUnavailableFor-time.Second)) {
		t.Error("forgotten before its time")
	}
	if f.known("Patient/a", t0.Add(factsUnavailableFor)) {
		t.Error("remembered after its time")
	}
	for i := range maxFactsUnavailable + 10 {
		f.remember(fmt.Sprintf("Patient/b%d", i), t0.Add(time.Duration(i)*time.Millisecond))
	}
	if n := len(f.until); n > maxFactsUnavailable {
		t.Errorf("%d remembered, want at most %d", n, maxFactsUnavailable)
	}
	if !f.known(fmt.Sprintf("Patient/b%d", maxFactsUnavailable+9), t0.Add(time.Second)) {
		t.Error("the newest was dropped")
	}
}
