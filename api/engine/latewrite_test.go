package engine_test

import (
	"context"
	"encoding/json"
	"fmt"
	"net/http"
	"testing"
	"time"

	"github.com/deadspace-fhir/deadspace/api/engine"
	"github.com/deadspace-fhir/deadspace/api/engine/enginetest"
	"github.com/deadspace-fhir/deadspace/api/store/boltstore"
	"github.com/deadspace-fhir/deadspace/derive"
	"github.com/deadspace-fhir/deadspace/fhir/client"
	"github.com/deadspace-fhir/deadspace/fhir/decode"
	"github.com/deadspace-fhir/deadspace/fhir/encode"
	"github.com/deadspace-fhir/deadspace/fhir/fhirtest"
)

// lateRig is an engine writing to the Medplum peer through a proxy that
// holds writes and commits them after the engine gave up on them.
type lateRig struct {
	t           *testing.T
	peer        *fhirtest.Server
	proxy       *fhirtest.Proxy
	eng         *engine.Engine
	st          *boltstore.Store
	at, updated time.Time
	inputs      []json.RawMessage // the end-tidal readings
}

func newLateRig(t *testing.T) *lateRig {
	t.Helper()
	peer := fhirtest.Start(t)
	proxy := fhirtest.NewProxy(t, peer.BaseURL)
	eng, st := newLateEngine(t, proxy.BaseURL)
	at := time.Now().Add(-time.Hour).Truncate(time.Minute)
	r := &lateRig{t: t, peer: peer, proxy: proxy, eng: eng, st: st, at: at, updated: at.Add(10 * time.Minute)}
	var inputs []json.RawMessage
	for m := -2; m <= 2; m++ {
		inputs = append(inputs, obs(fmt.Sprintf("et%d", m+2), "1", "final", "19891-1", "mm[Hg]", 36, at.Add(time.Duration(m)*time.Minute), r.updated))
	}
	r.inputs = inputs
	r.ingest(inputs...)
	return r
}

// newLateEngine is an engine with a store of its own, writing to baseURL.
func newLateEngine(t *testing.T, baseURL string) (*engine.Engine, *boltstore.Store) {
	t.Helper()
	st := enginetest.OpenStore(t, boltstore.Options{})
	enc := enginetest.Encoder(t)
	// The engine gives up on a request after a second, as a real client
	// gives up after its timeout.
	cl, err := client.New(client.Config{BaseURL: baseURL, MaxRetries: -1, HTTPClient: &http.Client{Timeout: 2 * time.Second}})
	if err != nil {
		t.Fatal(err)
	}
	eng, err := engine.New(engine.Config{
		Store: st, Decoder: decode.New(decode.Options{}), Encoder: enc, Derive: derive.DefaultConfig(), Client: cl,
	})
	if err != nil {
		t.Fatal(err)
	}
	return eng, st
}

// gas is version v of the blood gas, with PaCO2 value.
func (r *lateRig) gas(v int, value float64) json.RawMessage {
	return gasVersion(v, value, r.at, r.updated)
}

func (r *lateRig) ingest(raws ...json.RawMessage) {
	r.t.Helper()
	ingestNow(r.t, r.eng, raws...)
}

// flush sends due writes until the outbox is empty.
func (r *lateRig) flush() {
	r.t.Helper()
	ctx := context.Background()
	deadline := time.Now().Add(60 * time.Second)
	for {
		r.eng.FlushNow(ctx)
		h, err := r.eng.Health(ctx)
		if err != nil {
			r.t.Fatal(err)
		}
		if h.Stats.OutboxDepth == 0 {
			if h.Stats.DeadLetters != 0 {
				r.t.Fatalf("%d writes went to the dead letters", h.Stats.DeadLetters)
			}
			return
		}
		if time.Now().After(deadline) {
			r.t.Fatalf("outbox still holds %d writes", h.Stats.OutboxDepth)
		}
		time.Sleep(200 * time.Millisecond)
	}
}

// flushHeld sends writes while the proxy holds the next transaction, and
// returns once the engine has given up on it.
func (r *lateRig) flushHeld() {
	r.t.Helper()
	before := r.proxy.Held()
	r.proxy.HoldNext(1, fhirtest.TransactionPOST)
	// The write may wait out a backoff first on a busy machine.
	deadline := time.Now().Add(30 * time.Second)
	for r.eng.FlushNow(context.Background()); r.proxy.Held() != before+1; r.eng.FlushNow(context.Background()) {
		if time.Now().After(deadline) {
			r.t.Fatalf("the proxy holds %d transactions, want %d", r.proxy.Held(), before+1)
		}
		time.Sleep(100 * time.Millisecond)
	}
}

// serverValue is one derived Observation on the server.
type serverValue struct {
	id, version, key, status string
	raw                      json.RawMessage
}

// parseServerValue reads a derived Observation from the server; series
// is empty for any other Observation.
func parseServerValue(t testing.TB, raw json.RawMessage) (series string, v serverValue) {
	t.Helper()
	opts := encode.DefaultOptions()
	var o struct {
		ID         string
		Status     string
		Meta       struct{ VersionID string }
		Identifier []struct{ System, Value string }
	}
	if err := json.Unmarshal(raw, &o); err != nil {
		t.Fatal(err)
	}
	v = serverValue{id: o.ID, version: o.Meta.VersionID, status: o.Status, raw: raw}
	for _, id := range o.Identifier {
		switch id.System {
		case opts.IdentifierSystem:
			v.key = id.Value
		case opts.SeriesSystem:
			series = id.Value
		}
	}
	return series, v
}

// values returns the derived Observations on the server by series.
func (r *lateRig) values() map[string][]serverValue {
	r.t.Helper()
	out := map[string][]serverValue{}
	for _, raw := range r.peer.Search(r.t, "Observation?_count=100") {
		if series, v := parseServerValue(r.t, raw); series != "" {
			out[series] = append(out[series], v)
		}
	}
	return out
}

// wantCurrent checks that every series has one Observation on the server,
// carrying the key the ledger holds now.
func (r *lateRig) wantCurrent(values map[string][]serverValue) {
	r.t.Helper()
	if len(values) != 2 {
		r.t.Fatalf("%d series on the server, want 2 (gradient and alveolar fraction)", len(values))
	}
	for series, vs := range values {
		if len(vs) != 1 {
			r.t.Errorf("series has %d live Observations on the server, want 1: %+v", len(vs), vs)
			continue
		}
		rec, err := r.eng.Entry(context.Background(), series)
		if err != nil {
			r.t.Fatal(err)
		}
		if vs[0].key != rec.Key {
			r.t.Errorf("the server holds key %s, the ledger %s: an older value won", vs[0].key, rec.Key)
		}
		if rec.ServerID != vs[0].id || rec.ServerVersion != vs[0].version {
			r.t.Errorf("ledger knows %s/%s, the server holds %s/%s", rec.ServerID, rec.ServerVersion, vs[0].id, vs[0].version)
		}
	}
}

// A create that the server commits after the engine gave up on it, and
// after the engine's retry created the value and a revision updated it,
// adds no second live Observation: creates are conditional on the series,
// which a revision keeps (issue 9: a create conditional on the key made a
// second one).
func TestLateCreateAddsNoSecondValue(t *testing.T) {
	r := newLateRig(t)
	r.ingest(r.gas(1, 44))
	r.flushHeld()
	r.flush() // the retry creates the values
	r.ingest(r.gas(2, 47))
	r.flush() // the revision updates them
	if got := r.proxy.Release(false); len(got) != 1 || got[0] >= 300 {
		t.Fatalf("the late create was answered %v", got)
	}
	r.wantCurrent(r.values())
}

// A revision that the server commits after the engine gave up on it, and
// after a later revision was written, is refused by its If-Match: the
// newer revision stays (issue 9: a plain PUT overwrote it). Released in
// reverse order with another held copy, the result is the same.
func TestLateRevisionNeverOverwritesANewerOne(t *testing.T) {
	r := newLateRig(t)
	r.ingest(r.gas(1, 44))
	r.flush()
	r.ingest(r.gas(2, 47))
	r.flushHeld() // the revision to version 2 is held
	r.flush()     // its retry lands
	r.ingest(r.gas(3, 49))
	r.flushHeld() // the revision to version 3 is held too
	r.flush()
	statuses := r.proxy.Release(true)
	statuses = append(statuses, r.proxy.Release(false)...)
	for _, s := range statuses {
		if s != http.StatusPreconditionFailed {
			t.Errorf("a late revision was answered %d, want 412", s)
		}
	}
	r.wantCurrent(r.values())
}

// When the held revision is committed before the engine retries it, the
// retry fails its If-Match; the engine reads the server's Observation,
// finds its own value there, and records the write as done, with the
// server's version, instead of writing it again or burying it.
func TestPreconditionFailureOnOwnLandedWrite(t *testing.T) {
	r := newLateRig(t)
	r.ingest(r.gas(1, 44))
	r.flush()
	r.ingest(r.gas(2, 47))
	r.flushHeld()
	if got := r.proxy.Release(false); len(got) != 1 || got[0] >= 300 {
		t.Fatalf("the held revision was answered %v", got)
	}
	r.flush()
	r.wantCurrent(r.values())
	// Another revision then goes through against the version read.
	r.ingest(r.gas(3, 49))
	r.flush()
	r.wantCurrent(r.values())
}

// A revision made on the server by someone else is never overwritten:
// the update fails its If-Match, the engine reads a value it did not
// write, and the write goes to the dead letters for an operator.
func TestForeignRevisionIsNeverOverwritten(t *testing.T) {
	r := newLateRig(t)
	r.ingest(r.gas(1, 44))
	r.flush()
	vals := r.values()
	var target serverValue
	for _, vs := range vals {
		target = vs[0]
		break
	}
	status, _, body := r.peer.Do(t, http.MethodGet, "Observation/"+target.id, nil, nil)
	if status != http.StatusOK {
		t.Fatalf("read: %d", status)
	}
	var o map[string]any
	if err := json.Unmarshal(body, &o); err != nil {
		t.Fatal(err)
	}
	o["identifier"] = []any{map[string]any{"system": "https://other.example/id", "value": "theirs"}}
	edited, _ := json.Marshal(o)
	if status, _, body := r.peer.Do(t, http.MethodPut, "Observation/"+target.id, edited, nil); status >= 300 {
		t.Fatalf("foreign edit: %d %s", status, body)
	}
	r.ingest(r.gas(2, 47))
	ctx := context.Background()
	deadline := time.Now().Add(30 * time.Second)
	for {
		r.eng.FlushNow(ctx)
		h, err := r.eng.Health(ctx)
		if err != nil {
			t.Fatal(err)
		}
		if h.Stats.DeadLetters > 0 {
			break
		}
		if time.Now().After(deadline) {
			t.Fatal("the write that met a foreign revision was never buried")
		}
		time.Sleep(200 * time.Millisecond)
	}
	_, _, body = r.peer.Do(t, http.MethodGet, "Observation/"+target.id, nil, nil)
	var now struct{ Identifier []struct{ Value string } }
	if err := json.Unmarshal(body, &now); err != nil {
		t.Fatal(err)
	}
	if len(now.Identifier) != 1 || now.Identifier[0].Value != "theirs" {
		t.Fatalf("the foreign revision was overwritten: %s", body)
	}
}

// A create that the server commits after the engine gave up on it, for an
// earlier version of the inputs, is found by a later create of the series
// that carries the newer value: its condition matches (200) rather than
// creates. The later create comes from a ledger that never saw the first
// (as when serve wrote a value and backfill then derives the series again
// from its own ledger). The server must end with the newer value, updated
// in place, not keep the older one while the ledger records its own key
// there (the ledger acknowledged the matched id as if it held its value).
func TestLateCreateMatchedByANewerCreateIsUpdated(t *testing.T) {
	r := newLateRig(t)
	r.ingest(r.gas(1, 44))
	r.flushHeld() // the create of version 1 is held
	// The inputs are revised before any retry, in a ledger that knows
	// only the newer version: its create carries the newer key.
	r.eng, r.st = newLateEngine(t, r.proxy.BaseURL)
	r.ingest(append(r.inputs, r.gas(2, 47))...)
	if got := r.proxy.Release(false); len(got) != 1 || got[0] >= 300 {
		t.Fatalf("the late create was answered %v", got)
	}
	r.flush() // the newer create's condition matches the late one
	r.wantCurrent(r.values())
	// One Provenance per derivation the server received: the late
	// create's, and the newer one's, which the update does not repeat.
	if got := len(r.peer.Search(t, "Provenance?_count=100")); got != 2 {
		t.Errorf("%d Provenances on the server, want 2", got)
	}
}
