package engine_test

import (
	"context"
	"encoding/json"
	"errors"
	"fmt"
	"net/http"
	"strings"
	"testing"
	"time"

	"github.com/deadspace-fhir/deadspace/api/deadletters"
	"github.com/deadspace-fhir/deadspace/api/engine"
	"github.com/deadspace-fhir/deadspace/api/engine/enginetest"
	"github.com/deadspace-fhir/deadspace/api/store"
	"github.com/deadspace-fhir/deadspace/api/store/boltstore"
	"github.com/deadspace-fhir/deadspace/derive"
	"github.com/deadspace-fhir/deadspace/fhir/client"
	"github.com/deadspace-fhir/deadspace/fhir/decode"
	"github.com/deadspace-fhir/deadspace/fhir/encode"
	"github.com/deadspace-fhir/deadspace/fhir/fhirtest/fakefhir"
)

// outboxRig is an engine over its own store writing to the Go FHIR fake,
// for the outbox's own rules (no Node peer).
type outboxRig struct {
	t    *testing.T
	fake *fakefhir.Server
	st   *boltstore.Store
	eng  *engine.Engine
	at   time.Time
}

func newOutboxRig(t *testing.T, wrap func(store.Store) store.Store) *outboxRig {
	t.Helper()
	fake := fakefhir.Start(t)
	st := enginetest.OpenStore(t, boltstore.Options{NoSync: true})
	cl, err := client.New(client.Config{BaseURL: fake.BaseURL, MaxRetries: -1})
	if err != nil {
		t.Fatal(err)
	}
	var s store.Store = st
	if wrap != nil {
		s = wrap(st)
	}
	eng, err := engine.New(engine.Config{Store: s, Decoder: decode.New(decode.Options{}), Encoder: enginetest.Encoder(t),
		Derive: derive.DefaultConfig(), Client: cl})
	if err != nil {
		t.Fatal(err)
	}
	return &outboxRig{t: t, fake: fake, st: st, eng: eng, at: time.Now().Add(-time.Hour).Truncate(time.Minute)}
}

// bed is a patient's end-tidal readings around r.at and version v of its
// blood gas with PaCO2 value.
func (r *outboxRig) bed(patient string, v int, value float64) []json.RawMessage {
	updated := r.at.Add(10 * time.Minute)
	var out []json.RawMessage
	for m := -2; m <= 2; m++ {
		out = append(out, obs(fmt.Sprintf("%s-et%d", patient, m+2), "1", "final", "19891-1", "mm[Hg]", 36, r.at.Add(time.Duration(m)*time.Minute), updated))
	}
	status := "final"
	if v > 1 {
		status = "amended"
	}
	out = append(out, obs(patient+"-gas", fmt.Sprint(v), status, "2019-8", "mm[Hg]", value, r.at, updated.Add(time.Duration(v)*time.Minute)))
	for i := range out {
		out[i] = json.RawMessage(strings.ReplaceAll(string(out[i]), "Patient/w1", "Patient/"+patient))
	}
	return out
}

func (r *outboxRig) ingest(raws []json.RawMessage) {
	r.t.Helper()
	ctx := context.Background()
	if _, err := r.eng.Ingest(ctx, "test", raws); err != nil {
		r.t.Fatal(err)
	}
	if err := r.eng.EvaluateNow(ctx); err != nil {
		r.t.Fatal(err)
	}
	r.eng.FlushNow(ctx)
}

// serverKeys returns the key of each derived Observation on the server,
// by series, and how many Observations each series has.
func (r *outboxRig) serverKeys(patient string) (map[string]string, map[string]int) {
	r.t.Helper()
	opts := encode.DefaultOptions()
	keys, counts := map[string]string{}, map[string]int{}
	for _, raw := range r.fake.Current("Observation") {
		if !strings.Contains(string(raw), "Patient/"+patient+`"`) {
			continue
		}
		var o struct {
			Identifier []struct{ System, Value string }
		}
		if err := json.Unmarshal(raw, &o); err != nil {
			r.t.Fatal(err)
		}
		var key, series string
		for _, id := range o.Identifier {
			switch id.System {
			case opts.IdentifierSystem:
				key = id.Value
			case opts.SeriesSystem:
				series = id.Value
			}
		}
		if series != "" {
			keys[series] = key
			counts[series]++
		}
	}
	return keys, counts
}

// wantLedgerOnServer checks that the server holds, for each of the
// patient's series, one Observation with the key the ledger records.
func (r *outboxRig) wantLedgerOnServer(patient string) {
	r.t.Helper()
	keys, counts := r.serverKeys(patient)
	if len(keys) == 0 {
		r.t.Fatalf("no derived value of %s on the server", patient)
	}
	for series, key := range keys {
		if counts[series] != 1 {
			r.t.Errorf("series %.20s has %d Observations on the server, want 1", series, counts[series])
		}
		en, err := r.eng.Entry(context.Background(), series)
		if err != nil {
			r.t.Fatal(err)
		}
		if en.Key != key {
			r.t.Errorf("series %.20s: the server holds key %.20s, the ledger %.20s: an older value is back", series, key, en.Key)
		}
	}
}

// A revision refused for good goes to the dead letters; a later revision
// of the same blood gas reaches the server. Retrying the first letter must
// not put its older values back: the writer sends only what the ledger
// still records, whatever the order writes are sent in, and the letter
// shows as superseded before the retry.
func TestRetriedSupersededRevisionLeavesTheLaterValue(t *testing.T) {
	r := newOutboxRig(t, nil)
	ctx := context.Background()
	r.ingest(r.bed("w1", 1, 44))
	r.wantLedgerOnServer("w1")
	r.fake.Inject(fakefhir.Fault{Method: http.MethodPost, Status: http.StatusUnprocessableEntity, Times: 1, Text: "refused"})
	r.ingest(r.bed("w1", 2, 50)[5:])
	dls, err := r.st.DeadLetters(ctx, 10)
	if err != nil || len(dls) != 1 {
		t.Fatalf("dead letters %d (%v), want the refused revision", len(dls), err)
	}
	op := deadletters.Local(r.st)
	if v, err := op.Show(ctx, dls[0].ID); err != nil || v.Superseded {
		t.Fatalf("before the later revision: superseded %v (%v), want false", v.Superseded, err)
	}
	r.ingest(r.bed("w1", 3, 56)[5:])
	r.wantLedgerOnServer("w1")
	if v, err := op.Show(ctx, dls[0].ID); err != nil || !v.Superseded {
		t.Fatalf("after the later revision: superseded %v (%v), want true", v.Superseded, err)
	}
	before := r.fake.Count(http.MethodPost, "")
	if _, err := op.Retry(ctx, dls[0].ID); err != nil {
		t.Fatal(err)
	}
	r.eng.FlushNow(ctx)
	h, err := r.eng.Health(ctx)
	if err != nil {
		t.Fatal(err)
	}
	if h.Stats.OutboxDepth != 0 || h.Stats.DeadLetters != 0 {
		t.Errorf("after the retry: %d in the outbox, %d dead letters, want none", h.Stats.OutboxDepth, h.Stats.DeadLetters)
	}
	if n := r.fake.Count(http.MethodPost, "") - before; n != 0 {
		t.Errorf("the retried superseded revision sent %d transactions, want none", n)
	}
	r.wantLedgerOnServer("w1")
}

// ackFailing is a store whose Acknowledge fails for one patient's writes,
// as when the store cannot settle one write.
type ackFailing struct {
	store.Store
	subject string
}

func (s ackFailing) Acknowledge(ctx context.Context, id uint64, server map[string][2]string) error {
	ws, err := s.DueWrites(ctx, time.Now().Add(time.Hour), 100)
	if err != nil {
		return err
	}
	for _, w := range ws {
		if w.ID == id && w.Subject == s.subject {
			return errors.New("the store cannot settle this write")
		}
	}
	return s.Store.Acknowledge(ctx, id, server)
}

// A write whose outcome the store cannot record stays in the outbox, and
// holds up the later writes of its own series only: another patient's
// values are still sent in the same drain.
func TestAnUnsettledWriteHoldsUpOnlyItsSeries(t *testing.T) {
	r := newOutboxRig(t, func(s store.Store) store.Store { return ackFailing{Store: s, subject: "Patient/stuck"} })
	ctx := context.Background()
	if _, err := r.eng.Ingest(ctx, "test", r.bed("stuck", 1, 44)); err != nil {
		t.Fatal(err)
	}
	if _, err := r.eng.Ingest(ctx, "test", r.bed("free", 1, 45)); err != nil {
		t.Fatal(err)
	}
	if err := r.eng.EvaluateNow(ctx); err != nil {
		t.Fatal(err)
	}
	r.eng.FlushNow(ctx)
	r.wantLedgerOnServer("free")
	ws, err := r.st.DueWrites(ctx, time.Now().Add(time.Hour), 10)
	if err != nil {
		t.Fatal(err)
	}
	if len(ws) != 1 || ws[0].Subject != "Patient/stuck" {
		t.Errorf("outbox after the drain: %d writes, want the unsettled one only", len(ws))
	}
}
