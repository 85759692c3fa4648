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
	"sync/atomic"
	"testing"
	"time"

	"github.com/deadspace-fhir/deadspace/api/engine"
	"github.com/deadspace-fhir/deadspace/api/engine/enginetest"
	"github.com/deadspace-fhir/deadspace/api/store/pgstore"
	"github.com/deadspace-fhir/deadspace/api/store/pgstore/pgtest"
	"github.com/deadspace-fhir/deadspace/derive"
	"github.com/deadspace-fhir/deadspace/fhir/client"
	"github.com/deadspace-fhir/deadspace/fhir/decode"
	"github.com/deadspace-fhir/deadspace/fhir/fhirtest/fakefhir"
)

// TestSlowEvaluationKeepsItsClaimOnThePatient: two replicas on one
// PostgreSQL database with a job lease of 300 ms. Replica A, alive and
// well, evaluates a patient whose facts it must read from the FHIR server,
// and the server takes three leases to answer that read (a busy EHR; the
// same holds for a slow query on a loaded database). Replica B is asked to
// evaluate the patient meanwhile.
//
// An operator expects what the README says of replicas on PostgreSQL: "One
// replica evaluates a patient at a time", a claim lapsing only when its
// replica died. The writer already renews its claim on an outbox write
// while a send runs (TestSlowSendKeepsItsClaim); an evaluation should keep
// its claim on the patient the same way. Today the claim is taken once
// (Engine.claimPatient) for the job lease and never renewed: once it
// lapses, B claims the patient and evaluates it while A's evaluation is
// still running, reading the same series and the same Patient, and the
// commit's compare-and-swap is left to throw one of the two away (the loser
// marks the patient dirty and evaluates again: twice the work at the time
// the server is slowest, and the fall detector's kept states dropped).
func TestSlowEvaluationKeepsItsClaimOnThePatient(t *testing.T) {
	const lease = 300 * time.Millisecond
	f := fakefhir.Start(t)
	const bed = "slowfacts"
	if _, err := f.Put(json.RawMessage(`{"resourceType":"Patient","id":"` + bed + `","gender":"female","birthDate":"1961-04-02"}`)); err != nil {
		t.Fatal(err)
	}
	target, err := url.Parse(f.BaseURL)
	if err != nil {
		t.Fatal(err)
	}
	proxy := httputil.NewSingleHostReverseProxy(&url.URL{Scheme: target.Scheme, Host: target.Host})
	var patientReads atomic.Int64
	release := make(chan struct{})
	slow := httptest.NewServer(http.HandlerFunc(func(w http.ResponseWriter, r *http.Request) {
		if r.Method == http.MethodGet && strings.Contains(r.URL.Path, "/Patient/") && patientReads.Add(1) == 1 {
			// The server holds replica A's read of the patient.
			select {
			case <-release:
			case <-r.Context().Done():
			}
		}
		proxy.ServeHTTP(w, r)
	}))
	t.Cleanup(slow.Close)
	base := slow.URL + target.Path

	dbURL := pgtest.NewDatabase(t)
	var evaluations [2]atomic.Int64
	var engines [2]*engine.Engine
	for i, name := range []string{"replica-a", "replica-b"} {
		ps, err := pgstore.Open(context.Background(), dbURL, pgstore.Options{Holder: name})
		if err != nil {
			t.Fatal(err)
		}
		t.Cleanup(func() { ps.Close() })
		cl, err := client.New(client.Config{BaseURL: base, UserAgent: name, MaxRetries: -1})
		if err != nil {
			t.Fatal(err)
		}
		engines[i], err = engine.New(engine.Config{
			Store: ps, Decoder: decode.New(decode.Options{}), Encoder: enginetest.Encoder(t), Derive: derive.DefaultConfig(), Client: cl,
			JobLease: lease, Logger: slog.New(slog.NewTextHandler(tWriter{t, name}, nil)),
			Hooks: engine.Hooks{Evaluation: func(bool) { evaluations[i].Add(1) }},
		})
		if err != nil {
			t.Fatal(err)
		}
	}
	ctx := context.Background()
	at := time.Now().Add(-time.Hour).Truncate(time.Minute)
	updated := at.Add(10 * time.Minute)
	inputs := []json.RawMessage{obsOf("Patient/"+bed, "slow-gas", "1", "final", "2019-8", "mm[Hg]", 45, at, updated)}
	for m := -2; m <= 2; m++ {
		inputs = append(inputs, obsOf("Patient/"+bed, fmt.Sprintf("slow-et%d", m+2), "1", "final", "19891-1", "mm[Hg]", 36, at.Add(time.Duration(m)*time.Minute), updated))
	}
	if _, err := engines[0].Ingest(ctx, "test", inputs); err != nil {
		t.Fatal(err)
	}

	doneA := make(chan error, 1)
	go func() { doneA <- engines[0].EvaluateNow(ctx) }()
	waitUntil(t, "replica A to read the patient's facts", func() bool { return patientReads.Load() > 0 })
	// A is still working (its read is in flight) three leases later.
	time.Sleep(3 * lease)
	if err := engines[1].EvaluateNow(ctx); err != nil {
		t.Log("replica B:", err)
	}
	overlapped := evaluations[1].Load()
	close(release)
	if err := <-doneA; err != nil {
		t.Log("replica A:", err)
	}
	if evaluations[0].Load() == 0 {
		t.Fatal("replica A never began its evaluation; the test no longer holds it")
	}
	if overlapped != 0 {
		t.Errorf("replica B began %d evaluation(s) of the patient while replica A's evaluation of it was still running (A's claim lapsed after the %v job lease and was never renewed); want B to leave the patient to A", overlapped, lease)
	}
}
