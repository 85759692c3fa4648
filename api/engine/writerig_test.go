package engine_test

import (
	"context"
	"encoding/json"
	"fmt"
	"net/http"
	"net/http/httptest"
	"net/http/httputil"
	"net/url"
	"path/filepath"
	"strings"
	"sync"
	"testing"
	"time"

	"github.com/deadspace-fhir/deadspace/api/engine"
	"github.com/deadspace-fhir/deadspace/api/store"
	"github.com/deadspace-fhir/deadspace/api/store/boltstore"
	"github.com/deadspace-fhir/deadspace/derive"
	"github.com/deadspace-fhir/deadspace/fhir/client"
	"github.com/deadspace-fhir/deadspace/fhir/decode"
	"github.com/deadspace-fhir/deadspace/fhir/encode"
	"github.com/deadspace-fhir/deadspace/fhir/fhirtest/fakefhir"
)

// stepClock is a clock the test moves forward, so backoffs can be skipped.
type stepClock struct {
	mu  sync.Mutex
	off time.Duration
}

func (c *stepClock) Now() time.Time {
	c.mu.Lock()
	defer c.mu.Unlock()
	return time.Now().Add(c.off)
}

func (c *stepClock) Advance(d time.Duration) {
	c.mu.Lock()
	defer c.mu.Unlock()
	c.off += d
}

// writeRig is an engine over a store in a directory of the test's own (so
// it can be closed and opened again, as a restart does), writing to the Go
// FHIR fake or to base (something in front of it), with a clock the test
// moves past backoffs.
type writeRig struct {
	t           *testing.T
	fake        *fakefhir.Server
	base        string
	path        string
	st          *boltstore.Store
	eng         *engine.Engine
	clock       *stepClock
	maxEntries  int
	hooks       engine.Hooks // the engine's hooks, from the next open
	at, updated time.Time
	inputs      []json.RawMessage // the end-tidal readings
}

// newWriteRig is a rig whose transactions hold at most maxEntries entries
// (0: the engine's default).
func newWriteRig(t *testing.T, maxEntries int) *writeRig {
	t.Helper()
	fake := fakefhir.Start(t)
	r := &writeRig{t: t, fake: fake, base: fake.BaseURL, path: filepath.Join(t.TempDir(), "s.db"), clock: &stepClock{}, maxEntries: maxEntries}
	r.at = time.Now().Add(-time.Hour).Truncate(time.Minute)
	r.updated = r.at.Add(10 * time.Minute)
	for m := -2; m <= 2; m++ {
		r.inputs = append(r.inputs, obs(fmt.Sprintf("et%d", m+2), "1", "final", "19891-1", "mm[Hg]", 36, r.at.Add(time.Duration(m)*time.Minute), r.updated))
	}
	t.Cleanup(func() {
		if r.st != nil {
			_ = r.st.Close()
		}
	})
	return r
}

// open opens the store in the rig's directory and starts a new engine on it.
func (r *writeRig) open() {
	r.t.Helper()
	st, err := boltstore.Open(r.path, boltstore.Options{NoSync: true})
	if err != nil {
		r.t.Fatal(err)
	}
	enc, err := encode.New(encode.DefaultOptions())
	if err != nil {
		r.t.Fatal(err)
	}
	cl, err := client.New(client.Config{BaseURL: r.base, MaxRetries: -1, HTTPClient: &http.Client{Timeout: 2 * time.Second}})
	if err != nil {
		r.t.Fatal(err)
	}
	eng, err := engine.New(engine.Config{
		Store: st, Decoder: decode.New(decode.Options{}), Encoder: enc, Derive: derive.DefaultConfig(), Client: cl,
		MaxTransactionEntries: r.maxEntries, Now: r.clock.Now, Hooks: r.hooks,
	})
	if err != nil {
		r.t.Fatal(err)
	}
	r.st, r.eng = st, eng
}

// restart closes the store and opens it again with a new engine, as a
// process restart does.
func (r *writeRig) restart() {
	r.t.Helper()
	if err := r.st.Close(); err != nil {
		r.t.Fatal(err)
	}
	r.st = nil
	r.open()
}

// gasVersion is version v of the blood gas sampled at, with PaCO2 value:
// final first, amended after, each last updated v minutes after updated.
func gasVersion(v int, value float64, at, updated time.Time) json.RawMessage {
	status := "final"
	if v > 1 {
		status = "amended"
	}
	return obs("gas", fmt.Sprint(v), status, "2019-8", "mm[Hg]", value, at, updated.Add(time.Duration(v)*time.Minute))
}

// ingestNow ingests raws and evaluates at once.
func ingestNow(t *testing.T, eng *engine.Engine, raws ...json.RawMessage) {
	t.Helper()
	ctx := context.Background()
	if _, err := eng.Ingest(ctx, "test", raws); err != nil {
		t.Fatal(err)
	}
	if err := eng.EvaluateNow(ctx); err != nil {
		t.Fatal(err)
	}
}

// gas is version v of the blood gas, with PaCO2 value.
func (r *writeRig) gas(v int, value float64) json.RawMessage {
	return gasVersion(v, value, r.at, r.updated)
}

func (r *writeRig) ingest(raws ...json.RawMessage) {
	r.t.Helper()
	ingestNow(r.t, r.eng, raws...)
}

// openAndCreate opens the engine and writes the values derived from the
// readings and version 1 of the blood gas (PaCO2 44): two series.
func (r *writeRig) openAndCreate() {
	r.t.Helper()
	r.open()
	r.ingest(append(r.inputs, r.gas(1, 44))...)
	r.mustDrain(5)
}

func (r *writeRig) health() engine.Health {
	r.t.Helper()
	h, err := r.eng.Health(context.Background())
	if err != nil {
		r.t.Fatal(err)
	}
	return h
}

// drain flushes, moving the clock past every backoff, until the outbox is
// empty or rounds run out; it returns the outbox depth left.
func (r *writeRig) drain(rounds int) int {
	r.t.Helper()
	for range rounds {
		r.eng.FlushNow(context.Background())
		if d := r.health().Stats.OutboxDepth; d == 0 {
			return 0
		}
		r.clock.Advance(3 * time.Minute)
	}
	return r.health().Stats.OutboxDepth
}

// mustDrain drains and fails the test when writes are left or buried.
func (r *writeRig) mustDrain(rounds int) {
	r.t.Helper()
	if left := r.drain(rounds); left != 0 {
		r.t.Fatalf("%d writes left in the outbox", left)
	}
	if dl := r.health().Stats.DeadLetters; dl != 0 {
		r.t.Fatalf("%d dead letters: %v", dl, r.deadLetters())
	}
}

// deadLetters returns the reasons of the dead letters.
func (r *writeRig) deadLetters() []string {
	r.t.Helper()
	dls, err := r.st.DeadLetters(context.Background(), 100)
	if err != nil {
		r.t.Fatal(err)
	}
	var out []string
	for _, dl := range dls {
		out = append(out, dl.Reason)
	}
	return out
}

// outbox returns the writes in the outbox, due or not.
func (r *writeRig) outbox() []store.Write {
	r.t.Helper()
	ws, err := r.st.DueWrites(context.Background(), time.Date(9999, 1, 1, 0, 0, 0, 0, time.UTC), 100)
	if err != nil {
		r.t.Fatal(err)
	}
	return ws
}

// values returns the derived Observations the fake holds now, by series.
func (r *writeRig) values() map[string][]serverValue {
	r.t.Helper()
	out := map[string][]serverValue{}
	for _, raw := range r.fake.Current("Observation") {
		if series, v := parseServerValue(r.t, raw); series != "" {
			out[series] = append(out[series], v)
		}
	}
	return out
}

// anyValue returns one of the derived Observations on the server.
func (r *writeRig) anyValue() serverValue {
	r.t.Helper()
	for _, vs := range r.values() {
		return vs[0]
	}
	r.t.Fatal("no derived Observation on the server")
	return serverValue{}
}

// wantCurrent: every series has one Observation on the server, carrying
// the ledger's key, at the version the ledger knows.
func (r *writeRig) wantCurrent(nSeries int) {
	r.t.Helper()
	values := r.values()
	if len(values) != nSeries {
		r.t.Errorf("%d series on the server, want %d", len(values), nSeries)
	}
	for series, vs := range values {
		if len(vs) != 1 {
			r.t.Errorf("series %s has %d Observations on the server, want 1", series, len(vs))
			continue
		}
		rec, err := r.eng.Entry(context.Background(), series)
		if err != nil {
			r.t.Fatal(err)
		}
		if vs[0].key != rec.Key {
			r.t.Errorf("series %s: the server holds key %s, the ledger %s", series, vs[0].key, rec.Key)
		}
		if rec.ServerID != vs[0].id || rec.ServerVersion != vs[0].version {
			r.t.Errorf("series %s: ledger knows %s/%s, the server holds %s/%s", series, rec.ServerID, rec.ServerVersion, vs[0].id, vs[0].version)
		}
	}
}

// provenances returns the Provenances on the server.
func (r *writeRig) provenances() []map[string]any {
	r.t.Helper()
	var out []map[string]any
	for _, raw := range r.fake.Current("Provenance") {
		var m map[string]any
		if err := json.Unmarshal(raw, &m); err != nil {
			r.t.Fatal(err)
		}
		out = append(out, m)
	}
	return out
}

// activities counts the Provenances on the server by activity code.
func (r *writeRig) activities() map[string]int {
	out := map[string]int{}
	for _, p := range r.provenances() {
		act, _ := p["activity"].(map[string]any)
		cs, _ := act["coding"].([]any)
		for _, c := range cs {
			cm, _ := c.(map[string]any)
			code, _ := cm["code"].(string)
			out[code]++
		}
	}
	return out
}

// revisedVersions returns the references the Provenances with activity
// UPDATE cite with role revision.
func (r *writeRig) revisedVersions() []string {
	var out []string
	for _, p := range r.provenances() {
		act, _ := json.Marshal(p["activity"])
		if !strings.Contains(string(act), `"UPDATE"`) {
			continue
		}
		ents, _ := p["entity"].([]any)
		for _, e := range ents {
			em, _ := e.(map[string]any)
			if em["role"] != "revision" {
				continue
			}
			what, _ := em["what"].(map[string]any)
			ref, _ := what["reference"].(string)
			out = append(out, ref)
		}
	}
	return out
}

// editOnServer changes a derived Observation on the server as someone
// else would, keeping everything edit does not touch (its identifiers
// among them).
func (r *writeRig) editOnServer(v serverValue, edit func(m map[string]any)) {
	r.t.Helper()
	var m map[string]any
	if err := json.Unmarshal(v.raw, &m); err != nil {
		r.t.Fatal(err)
	}
	edit(m)
	raw, err := json.Marshal(m)
	if err != nil {
		r.t.Fatal(err)
	}
	if _, err := r.fake.Put(raw); err != nil {
		r.t.Fatal(err)
	}
}

// failTransactions stands in front of the fake and answers the
// transactions it is told to with a 500, without passing them on.
type failTransactions struct {
	mu     sync.Mutex
	n      int
	failAt map[int]bool
}

// failNext makes the transaction k after the ones seen so far fail (k = 1:
// the next one).
func (f *failTransactions) failNext(k int) {
	f.mu.Lock()
	defer f.mu.Unlock()
	f.failAt[f.n+k] = true
}

// newFailTransactions puts a failTransactions in front of the rig's fake;
// call it before open.
func newFailTransactions(r *writeRig) *failTransactions {
	u, err := url.Parse(r.fake.BaseURL)
	if err != nil {
		r.t.Fatal(err)
	}
	f := &failTransactions{failAt: map[int]bool{}}
	proxy := httputil.NewSingleHostReverseProxy(&url.URL{Scheme: u.Scheme, Host: u.Host})
	srv := httptest.NewServer(http.HandlerFunc(func(w http.ResponseWriter, rq *http.Request) {
		if rq.Method == http.MethodPost && strings.TrimSuffix(rq.URL.Path, "/") == u.Path {
			f.mu.Lock()
			f.n++
			fail := f.failAt[f.n]
			f.mu.Unlock()
			if fail {
				w.Header().Set("Content-Type", "application/fhir+json")
				w.WriteHeader(http.StatusInternalServerError)
				fmt.Fprint(w, `{"resourceType":"OperationOutcome","issue":[{"severity":"error","code":"exception"}]}`)
				return
			}
		}
		proxy.ServeHTTP(w, rq)
	}))
	r.t.Cleanup(srv.Close)
	r.base = srv.URL + u.Path
	return f
}
