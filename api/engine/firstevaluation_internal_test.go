package engine

import (
	"context"
	"encoding/json"
	"path/filepath"
	"strings"
	"testing"
	"time"

	"github.com/deadspace-fhir/deadspace/api/engine/enginetest"
	"github.com/deadspace-fhir/deadspace/api/store"
	"github.com/deadspace-fhir/deadspace/api/store/boltstore"
	"github.com/deadspace-fhir/deadspace/derive"
	"github.com/deadspace-fhir/deadspace/fhir/decode"
)

// TestFirstEvaluationDerivesEveryBloodGas: a dirty mark written by an
// earlier build says when an input was taken, not from which blood gas on
// results may change. An end-tidal reading two minutes after a blood gas,
// marked that way, is left out of the gas's derivation by an engine that
// trusts the mark; the first evaluation of a patient in a process derives
// every blood gas, so a restarted (upgraded) service takes it in.
func TestFirstEvaluationDerivesEveryBloodGas(t *testing.T) {
	t.Parallel()
	path := filepath.Join(t.TempDir(), "s.db")
	st, err := boltstore.Open(path, boltstore.Options{NoSync: true})
	if err != nil {
		t.Fatal(err)
	}
	defer st.Close()
	enc := enginetest.Encoder(t)
	newEngine := func() *Engine {
		e, err := New(Config{Store: st, Decoder: decode.New(decode.Options{}), Encoder: enc, Derive: derive.DefaultConfig()})
		if err != nil {
			t.Fatal(err)
		}
		return e
	}
	ctx := context.Background()
	at := time.Now().Add(-2 * time.Hour).Truncate(time.Minute)
	first := newEngine()
	if _, err := first.Ingest(ctx, "test", []json.RawMessage{
		reading("gas", "2019-8", 44, at), reading("et0", "19891-1", 36, at.Add(-time.Minute)),
	}); err != nil {
		t.Fatal(err)
	}
	if err := first.EvaluateNow(ctx); err != nil {
		t.Fatal(err)
	}
	cites := func(e *Engine, ref string) bool {
		recs, err := e.Derivations(ctx, "Patient/p1", time.Time{}, at.Add(time.Hour), "", 20)
		if err != nil {
			t.Fatal(err)
		}
		if len(recs) == 0 {
			t.Fatal("nothing derived")
		}
		for _, r := range recs {
			if r.Payload.Derivation != nil && r.Payload.Code == derive.CodeGradient {
				raw, _ := json.Marshal(r.Payload.Derivation.Used)
				return strings.Contains(string(raw), ref)
			}
		}
		t.Fatal("no gradient derived")
		return false
	}
	// The late reading, stored as an earlier build stored it: its mark
	// starts at its own time, after the blood gas.
	it, err := decode.New(decode.Options{}).Decode(reading("et2", "19891-1", 30, at.Add(2*time.Minute)))
	if err != nil {
		t.Fatal(err)
	}
	in, err := first.toStored(it, time.Now())
	if err != nil {
		t.Fatal(err)
	}
	in.ChangedAt, in.ChangedUntil = it.Reading.At(), time.Time{}
	if _, err := st.PutInputs(ctx, []store.Input{in}, time.Now()); err != nil {
		t.Fatal(err)
	}
	// The process that evaluated the patient before trusts the mark.
	if err := first.EvaluateNow(ctx); err != nil {
		t.Fatal(err)
	}
	if cites(first, "Observation/et2") {
		t.Fatal("the engine that evaluated the patient before took in a reading its mark put after the blood gas; the test shows nothing")
	}
	// A restarted process: the same store, a new engine, a mark of the
	// same kind (a newer version of the reading).
	in.VersionID, in.LastUpdated = "2", in.LastUpdated.Add(time.Second)
	if _, err := st.PutInputs(ctx, []store.Input{in}, time.Now()); err != nil {
		t.Fatal(err)
	}
	restarted := newEngine()
	if err := restarted.EvaluateNow(ctx); err != nil {
		t.Fatal(err)
	}
	if !cites(restarted, "Observation/et2") {
		t.Error("the first evaluation after a restart left a reading within the blood gas's window out")
	}
}
