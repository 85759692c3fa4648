package engine_test

import (
	"bytes"
	"context"
	"encoding/json"
	"fmt"
	"net/http"
	"net/http/httptest"
	"sync"
	"testing"
	"time"

	"github.com/deadspace-fhir/deadspace/api/engine"
	"github.com/deadspace-fhir/deadspace/api/engine/enginetest"
	"github.com/deadspace-fhir/deadspace/api/store/boltstore"
	"github.com/deadspace-fhir/deadspace/derive"
	"github.com/deadspace-fhir/deadspace/fhir/client"
	"github.com/deadspace-fhir/deadspace/fhir/decode"
)

// entryFaults answers every transaction 200 as fakeServer does, except that
// each Provenance entry's response carries status: a server that does not
// keep a transaction all or nothing and reports a failed entry inside it.
type entryFaults struct {
	fakeServer
	status       string
	mu           sync.Mutex
	transactions int
}

func (f *entryFaults) ServeHTTP(w http.ResponseWriter, r *http.Request) {
	if r.Method != http.MethodPost || r.URL.Path != "/fhir" {
		f.fakeServer.ServeHTTP(w, r)
		return
	}
	rec := httptest.NewRecorder()
	f.fakeServer.ServeHTTP(rec, r)
	var answer struct {
		ResourceType string `json:"resourceType"`
		Type         string `json:"type"`
		Entry        []struct {
			Response map[string]any  `json:"response"`
			Resource json.RawMessage `json:"resource,omitempty"`
		} `json:"entry"`
	}
	if err := json.Unmarshal(rec.Body.Bytes(), &answer); err != nil {
		http.Error(w, err.Error(), http.StatusInternalServerError)
		return
	}
	for i, e := range answer.Entry {
		var m struct{ ResourceType string }
		_ = json.Unmarshal(e.Resource, &m)
		if m.ResourceType == "Provenance" {
			answer.Entry[i].Resource = nil
			answer.Entry[i].Response = map[string]any{"status": f.status,
				"outcome": map[string]any{"resourceType": "OperationOutcome", "issue": []any{map[string]any{"severity": "error", "code": "processing"}}}}
		}
	}
	f.mu.Lock()
	f.transactions++
	f.mu.Unlock()
	out, _ := json.Marshal(answer)
	w.Header().Set("Content-Type", "application/fhir+json")
	_, _ = w.Write(bytes.TrimSpace(out))
}

func (f *entryFaults) sent() int {
	f.mu.Lock()
	defer f.mu.Unlock()
	return f.transactions
}

// A transaction answered 200 with a failed entry is never an acknowledged
// write (R4 http.html: a transaction is all or nothing, so the server kept
// part of it). A transient entry status leaves the write in the outbox to
// be retried; a status that refuses the content is sent again a few times
// (part of the transaction landed, and only a resend shows whether the
// rest is refused on its own) and then goes to the dead letters.
func TestFailedTransactionEntryIsNeverAcknowledged(t *testing.T) {
	cases := []struct {
		name   string
		status string
		buried bool
	}{
		{"an invalid Provenance is buried after resends", "400 Bad Request", true},
		{"an unprocessable Provenance is buried after resends", "422", true},
		{"an unavailable server is retried", "503 Service Unavailable", false},
	}
	for _, tc := range cases {
		t.Run(tc.name, func(t *testing.T) {
			fake := &entryFaults{status: tc.status}
			srv := httptest.NewServer(fake)
			defer srv.Close()
			st := enginetest.OpenStore(t, boltstore.Options{})
			cl, err := client.New(client.Config{BaseURL: srv.URL + "/fhir", MaxRetries: -1})
			if err != nil {
				t.Fatal(err)
			}
			eng, err := engine.New(engine.Config{Store: st, Decoder: decode.New(decode.Options{}), Encoder: enginetest.Encoder(t), Derive: derive.DefaultConfig(), Client: cl})
			if err != nil {
				t.Fatal(err)
			}
			ctx := context.Background()
			at := time.Now().Add(-time.Hour).Truncate(time.Minute)
			in := []json.RawMessage{obs("gas", "1", "final", "2019-8", "mm[Hg]", 44, at, at)}
			for m := -2; m <= 2; m++ {
				in = append(in, obs(fmt.Sprintf("et%d", m+2), "1", "final", "19891-1", "mm[Hg]", 36, at.Add(time.Duration(m)*time.Minute), at))
			}
			if _, err := eng.Ingest(ctx, "test", in); err != nil {
				t.Fatal(err)
			}
			if err := eng.EvaluateNow(ctx); err != nil {
				t.Fatal(err)
			}
			// Back-offs of the first attempts are a few seconds at most.
			deadline := time.Now().Add(20 * time.Second)
			for {
				eng.FlushNow(ctx)
				h, err := eng.Health(ctx)
				if err != nil {
					t.Fatal(err)
				}
				if h.Stats.OutboxDepth == 0 && h.Stats.DeadLetters == 0 {
					t.Fatal("the write left the outbox without a dead letter: counted as done with its Provenance refused")
				}
				if tc.buried && h.Stats.DeadLetters == 1 {
					if n := fake.sent(); n < 2 {
						t.Errorf("buried after %d transaction, want it sent again before", n)
					}
					return
				}
				if !tc.buried && h.Stats.DeadLetters > 0 {
					t.Fatalf("a transient entry status buried the write")
				}
				if !tc.buried && fake.sent() >= 3 {
					return // retried, still waiting
				}
				if time.Now().After(deadline) {
					t.Fatalf("after 20 s: outbox %d, dead letters %d, %d transactions sent", h.Stats.OutboxDepth, h.Stats.DeadLetters, fake.sent())
				}
				time.Sleep(100 * time.Millisecond)
			}
		})
	}
}
