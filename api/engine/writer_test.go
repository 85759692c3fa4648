package engine_test

import (
	"context"
	"encoding/json"
	"fmt"
	"io"
	"net/http"
	"net/http/httptest"
	"strings"
	"sync"
	"testing"
	"time"

	"github.com/deadspace-fhir/deadspace/api/engine"
	"github.com/deadspace-fhir/deadspace/api/engine/enginetest"
	"github.com/deadspace-fhir/deadspace/api/store/boltstore"
	"github.com/deadspace-fhir/deadspace/derive"
	"github.com/deadspace-fhir/deadspace/fhir/client"
	"github.com/deadspace-fhir/deadspace/fhir/decode"
	"github.com/deadspace-fhir/deadspace/fhir/encode"
)

// fakeServer acknowledges transactions and records, in order, the status
// of every Observation written with PUT. It can be told to answer the next
// transactions with a status instead.
type fakeServer struct {
	mu      sync.Mutex
	next    int
	failN   int
	failAs  int
	puts    []string // "id status"
	creates int
}

func (f *fakeServer) ServeHTTP(w http.ResponseWriter, r *http.Request) {
	body, _ := io.ReadAll(r.Body)
	f.mu.Lock()
	defer f.mu.Unlock()
	w.Header().Set("Content-Type", "application/fhir+json")
	if r.Method == http.MethodGet {
		if strings.Contains(r.URL.Path, "/Patient/") {
			w.WriteHeader(http.StatusNotFound)
			fmt.Fprint(w, `{"resourceType":"OperationOutcome","issue":[{"severity":"error","code":"not-found"}]}`)
			return
		}
		fmt.Fprint(w, `{"resourceType":"Bundle","type":"searchset"}`)
		return
	}
	if r.URL.Path != "/fhir" {
		f.next++
		w.WriteHeader(http.StatusCreated)
		fmt.Fprintf(w, `{"resourceType":"Device","id":"d%d","meta":{"versionId":"1"}}`, f.next)
		return
	}
	if f.failN > 0 {
		f.failN--
		w.WriteHeader(f.failAs)
		fmt.Fprint(w, `{"resourceType":"OperationOutcome","issue":[{"severity":"error","code":"transient"}]}`)
		return
	}
	var b struct {
		Entry []struct {
			Resource json.RawMessage
			Request  struct{ Method, URL string }
		}
	}
	_ = json.Unmarshal(body, &b)
	var out []string
	for _, e := range b.Entry {
		var m struct{ ResourceType, Status string }
		_ = json.Unmarshal(e.Resource, &m)
		f.next++
		id := fmt.Sprintf("s%d", f.next)
		if e.Request.Method == http.MethodPut {
			id = strings.TrimPrefix(e.Request.URL, "Observation/")
			f.puts = append(f.puts, id+" "+m.Status)
		} else if m.ResourceType == "Observation" {
			f.creates++
		}
		out = append(out, fmt.Sprintf(`{"response":{"status":"201","location":"%s/%s/_history/%d"},"resource":{"resourceType":"%s","id":"%s","meta":{"versionId":"%d"}}}`,
			m.ResourceType, id, f.next, m.ResourceType, id, f.next))
	}
	fmt.Fprintf(w, `{"resourceType":"Bundle","type":"transaction-response","entry":[%s]}`, strings.Join(out, ","))
}

func (f *fakeServer) state() ([]string, int) {
	f.mu.Lock()
	defer f.mu.Unlock()
	return append([]string(nil), f.puts...), f.creates
}

func obs(id, version, status, code, unit string, v float64, at, updated time.Time) json.RawMessage {
	return json.RawMessage(fmt.Sprintf(`{"resourceType":"Observation","id":"%s","meta":{"versionId":"%s","lastUpdated":"%s"},"status":"%s",`+
		`"code":{"coding":[{"system":"http://loinc.org","code":"%s"}]},"subject":{"reference":"Patient/w1"},"effectiveDateTime":"%s",`+
		`"valueQuantity":{"value":%g,"unit":"%s","system":"http://unitsofmeasure.org","code":"%s"}}`,
		id, version, updated.UTC().Format(time.RFC3339), status, code, at.UTC().Format(time.RFC3339), v, unit, unit))
}

// TestWritesOfOneSeriesKeepTheirOrder: a revision that fails and waits must
// not be overtaken by the withdrawal queued after it, or the server would
// end with the revision and the withdrawn value would come back.
func TestWritesOfOneSeriesKeepTheirOrder(t *testing.T) {
	fake := &fakeServer{}
	srv := httptest.NewServer(fake)
	defer srv.Close()
	st := enginetest.OpenStore(t, boltstore.Options{})
	enc := enginetest.Encoder(t)
	cl, err := client.New(client.Config{BaseURL: srv.URL + "/fhir", MaxRetries: -1})
	if err != nil {
		t.Fatal(err)
	}
	eng, err := engine.New(engine.Config{
		Store: st, Decoder: decode.New(decode.Options{}), Encoder: enc, Derive: derive.DefaultConfig(), Client: cl,
	})
	if err != nil {
		t.Fatal(err)
	}
	ctx := context.Background()
	at := time.Now().Add(-time.Hour).Truncate(time.Minute)
	updated := at.Add(10 * time.Minute)
	inputs := []json.RawMessage{obs("gas", "1", "final", "2019-8", "mm[Hg]", 44, at, updated)}
	for m := -2; m <= 2; m++ {
		inputs = append(inputs, obs(fmt.Sprintf("et%d", m+2), "1", "final", "19891-1", "mm[Hg]", 36, at.Add(time.Duration(m)*time.Minute), updated))
	}
	flush := func() {
		t.Helper()
		if err := eng.EvaluateNow(ctx); err != nil {
			t.Fatal(err)
		}
		eng.FlushNow(ctx)
	}
	if _, err := eng.Ingest(ctx, "test", inputs); err != nil {
		t.Fatal(err)
	}
	flush()
	if _, creates := fake.state(); creates != 2 {
		t.Fatalf("%d Observations created, want the gradient and the alveolar fraction", creates)
	}

	// The gas is amended; the revision meets a 503 and is put back.
	fake.mu.Lock()
	fake.failN, fake.failAs = 1, http.StatusServiceUnavailable
	fake.mu.Unlock()
	if _, err := eng.Ingest(ctx, "test", []json.RawMessage{obs("gas", "2", "amended", "2019-8", "mm[Hg]", 47, at, updated.Add(time.Minute))}); err != nil {
		t.Fatal(err)
	}
	flush()
	// Then it is withdrawn, while the revision still waits for its retry.
	if _, err := eng.Ingest(ctx, "test", []json.RawMessage{obs("gas", "3", "entered-in-error", "2019-8", "mm[Hg]", 47, at, updated.Add(2*time.Minute))}); err != nil {
		t.Fatal(err)
	}
	flush()
	// The retry's back-off has full jitter and may be close to zero, so the
	// revision can already have gone out here; what must hold is the order
	// on the server, checked below once the outbox is empty.
	deadline := time.Now().Add(30 * time.Second)
	for {
		h, err := eng.Health(ctx)
		if err != nil {
			t.Fatal(err)
		}
		if h.Stats.OutboxDepth == 0 {
			break
		}
		if time.Now().After(deadline) {
			t.Fatalf("outbox still holds %d writes", h.Stats.OutboxDepth)
		}
		time.Sleep(100 * time.Millisecond)
		eng.FlushNow(ctx)
	}
	puts, _ := fake.state()
	last := map[string]string{}
	var order []string
	for _, p := range puts {
		id, status, _ := strings.Cut(p, " ")
		if last[id] == "" {
			order = append(order, id)
		}
		if last[id] == "entered-in-error" {
			t.Errorf("Observation %s was written as %s after its withdrawal", id, status)
		}
		last[id] = status
	}
	if len(order) != 2 {
		t.Fatalf("PUTs %v: want the two derived Observations revised, then withdrawn", puts)
	}
	for _, id := range order {
		if last[id] != "entered-in-error" {
			t.Errorf("Observation %s ends as %q on the server, want entered-in-error; PUTs %v", id, last[id], puts)
		}
	}
}

// TestRefusalsThatRetryAndRefusalsThatBury: a refused content goes to the
// dead letters; a refused credential or a conflict waits and is retried,
// so a rotated token during an outage does not bury a whole backlog. A
// create refused with 412 (its condition matched several resources) is
// buried: no retry changes that.
func TestRefusalsThatRetryAndRefusalsThatBury(t *testing.T) {
	cases := []struct {
		name   string
		status int
		buried bool
	}{
		{"unprocessable content is buried", http.StatusUnprocessableEntity, true},
		{"bad request is buried", http.StatusBadRequest, true},
		{"unauthorized is retried", http.StatusUnauthorized, false},
		{"forbidden is retried", http.StatusForbidden, false},
		{"conflict is retried", http.StatusConflict, false},
		{"precondition failed on a create is buried", http.StatusPreconditionFailed, true},
	}
	for _, tc := range cases {
		t.Run(tc.name, func(t *testing.T) {
			fake := &fakeServer{failN: 1, failAs: tc.status}
			srv := httptest.NewServer(fake)
			defer srv.Close()
			st := enginetest.OpenStore(t, boltstore.Options{})
			enc, _ := encode.New(encode.DefaultOptions())
			cl, _ := client.New(client.Config{BaseURL: srv.URL + "/fhir", MaxRetries: -1})
			eng, err := engine.New(engine.Config{Store: st, Decoder: decode.New(decode.Options{}), Encoder: enc, Derive: derive.DefaultConfig(), Client: cl})
			if err != nil {
				t.Fatal(err)
			}
			ctx := context.Background()
			at := time.Now().Add(-time.Hour).Truncate(time.Minute)
			in := []json.RawMessage{obs("gas", "1", "final", "2019-8", "mm[Hg]", 44, at, at), obs("et", "1", "final", "19891-1", "mm[Hg]", 36, at, at)}
			if _, err := eng.Ingest(ctx, "test", in); err != nil {
				t.Fatal(err)
			}
			if err := eng.EvaluateNow(ctx); err != nil {
				t.Fatal(err)
			}
			eng.FlushNow(ctx)
			h, err := eng.Health(ctx)
			if err != nil {
				t.Fatal(err)
			}
			if got := h.Stats.DeadLetters == 1 && h.Stats.OutboxDepth == 0; got != tc.buried {
				t.Errorf("after HTTP %d: %d dead letters, %d in the outbox; buried = %v, want %v", tc.status, h.Stats.DeadLetters, h.Stats.OutboxDepth, got, tc.buried)
			}
		})
	}
}

// TestRefiledInputWithdrawsWhatTheFirstPatientGot: a blood gas corrected
// in place to name the right patient must leave nothing derived from it
// under the wrong one.
func TestRefiledInputWithdrawsWhatTheFirstPatientGot(t *testing.T) {
	st := enginetest.OpenStore(t, boltstore.Options{})
	enc, _ := encode.New(encode.DefaultOptions())
	eng, err := engine.New(engine.Config{Store: st, Decoder: decode.New(decode.Options{}), Encoder: enc, Derive: derive.DefaultConfig()})
	if err != nil {
		t.Fatal(err)
	}
	ctx := context.Background()
	at := time.Now().Add(-time.Hour).Truncate(time.Minute)
	inputs := []json.RawMessage{obs("gas", "1", "final", "2019-8", "mm[Hg]", 44, at, at)}
	for _, p := range []string{"w1", "w2"} {
		et := strings.Replace(string(obs("et-"+p, "1", "final", "19891-1", "mm[Hg]", 36, at, at)), "Patient/w1", "Patient/"+p, 1)
		inputs = append(inputs, json.RawMessage(et))
	}
	if _, err := eng.Ingest(ctx, "test", inputs); err != nil {
		t.Fatal(err)
	}
	if err := eng.EvaluateNow(ctx); err != nil {
		t.Fatal(err)
	}
	statuses := func(subject string) map[string]int {
		recs, err := eng.Derivations(ctx, subject, time.Time{}, time.Now(), "", 100)
		if err != nil {
			t.Fatal(err)
		}
		out := map[string]int{}
		for _, r := range recs {
			out[r.Status]++
		}
		return out
	}
	if got := statuses("Patient/w1"); got["final"] != 2 {
		t.Fatalf("before the correction Patient/w1 has %v, want 2 final values", got)
	}
	moved := strings.Replace(string(obs("gas", "2", "corrected", "2019-8", "mm[Hg]", 44, at, at.Add(time.Minute))), "Patient/w1", "Patient/w2", 1)
	if _, err := eng.Ingest(ctx, "test", []json.RawMessage{json.RawMessage(moved)}); err != nil {
		t.Fatal(err)
	}
	if err := eng.EvaluateNow(ctx); err != nil {
		t.Fatal(err)
	}
	// The derived Observations follow their blood gas: the same series, now
	// filed under Patient/w2 and amended, so the server updates them in
	// place and the wrong patient keeps no live value.
	if got := statuses("Patient/w1"); got["final"]+got["amended"] != 0 {
		t.Errorf("after the correction Patient/w1 still has live values %v", got)
	}
	if got := statuses("Patient/w2"); got["amended"] != 2 {
		t.Errorf("after the correction Patient/w2 has %v, want the 2 values moved to it, amended", got)
	}
}
