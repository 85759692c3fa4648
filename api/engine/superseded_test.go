package engine_test

import (
	"context"
	"encoding/json"
	"fmt"
	"strings"
	"testing"
	"time"

	"github.com/deadspace-fhir/deadspace/api/engine"
	"github.com/deadspace-fhir/deadspace/api/engine/enginetest"
	"github.com/deadspace-fhir/deadspace/api/store/boltstore"
	"github.com/deadspace-fhir/deadspace/derive"
	"github.com/deadspace-fhir/deadspace/fhir/decode"
)

// TestExplainSupersededValue: the key a clinician may have acted on stays
// explainable after a correction replaced it: the explanation is of the
// earlier value, from the derivation it was computed from, marked
// superseded with the key that replaced it and why.
func TestExplainSupersededValue(t *testing.T) {
	st := enginetest.OpenStore(t, boltstore.Options{NoSync: true})
	enc := enginetest.Encoder(t)
	eng, err := engine.New(engine.Config{Store: st, Decoder: decode.New(decode.Options{}), Encoder: enc, Derive: derive.DefaultConfig()})
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
	step := func(raws ...json.RawMessage) []engine.Record {
		t.Helper()
		if _, err := eng.Ingest(ctx, "test", raws); err != nil {
			t.Fatal(err)
		}
		if err := eng.EvaluateNow(ctx); err != nil {
			t.Fatal(err)
		}
		recs, err := eng.Derivations(ctx, "Patient/w1", time.Time{}, at.Add(time.Hour), "", 10)
		if err != nil {
			t.Fatal(err)
		}
		return recs
	}
	first := step(inputs...)
	if len(first) == 0 {
		t.Fatal("nothing derived")
	}
	second := step(obs("gas", "2", "amended", "2019-8", "mm[Hg]", 47, at, updated.Add(time.Minute)))
	third := step(obs("gas", "3", "entered-in-error", "2019-8", "mm[Hg]", 47, at, updated.Add(2*time.Minute)))

	for i, old := range first {
		rec, err := eng.Derivation(ctx, old.Key)
		if err != nil {
			t.Fatal(err)
		}
		if rec.Superseded == nil {
			t.Fatalf("value %d: an earlier key explained without being marked superseded", i)
		}
		if rec.Key != old.Key || rec.Status != "final" {
			t.Errorf("value %d: explained key %s status %s, want the earlier %s, final", i, rec.Key, rec.Status, old.Key)
		}
		if rec.Superseded.Key != second[i].Key || rec.Superseded.Status != "entered-in-error" || !strings.Contains(rec.Superseded.Because, "withdrawn") {
			t.Errorf("value %d: superseded by %+v, want key %s, withdrawn, with the reason", i, rec.Superseded, third[i].Key)
		}
		ex, err := eng.Explain(ctx, rec)
		if err != nil {
			t.Fatal(err)
		}
		if ex.Derivation == nil || !strings.HasSuffix(ex.Derivation.Gas.Ref, "/_history/1") || ex.Derivation.Gas.Value != 44 {
			t.Errorf("value %d: explained from %+v, want the first version of the blood gas (44)", i, ex.Derivation)
		}
		if ex.AlgorithmVersion == "" {
			t.Errorf("value %d: the earlier value's key did not match its own derivation", i)
		}
	}
	// The current key is explained as current.
	rec, err := eng.Derivation(ctx, third[0].Key)
	if err != nil {
		t.Fatal(err)
	}
	if rec.Superseded != nil {
		t.Errorf("the current key was marked superseded: %+v", rec.Superseded)
	}
}

// TestInputOlderThanRetentionIsRefusedWithItsReason: a reading whose
// retention is already over is not stored (it would be pruned and never
// derived), and the answer and the metrics say so with a reason of its
// own.
func TestInputOlderThanRetentionIsRefusedWithItsReason(t *testing.T) {
	st := enginetest.OpenStore(t, boltstore.Options{NoSync: true})
	enc := enginetest.Encoder(t)
	counted := map[derive.Reason]int{}
	eng, err := engine.New(engine.Config{Store: st, Decoder: decode.New(decode.Options{}), Encoder: enc, Derive: derive.DefaultConfig(),
		Retention: 24 * time.Hour, Hooks: engine.Hooks{LeftOut: func(r derive.Reason) { counted[r]++ }}})
	if err != nil {
		t.Fatal(err)
	}
	old := time.Now().Add(-25 * time.Hour)
	rec, err := eng.Ingest(context.Background(), "test", []json.RawMessage{
		obs("old", "1", "final", "19891-1", "mm[Hg]", 36, old, old),
		obs("new", "1", "final", "19891-1", "mm[Hg]", 36, time.Now().Add(-time.Hour), time.Now()),
	})
	if err != nil {
		t.Fatal(err)
	}
	if rec.Accepted != 1 || len(rec.Rejected) != 1 || rec.Rejected[0].Reason != derive.ReasonPastRetention || rec.Rejected[0].Index != 0 {
		t.Fatalf("receipt %+v: want the old reading rejected as %s and the new one accepted", rec, derive.ReasonPastRetention)
	}
	if counted[derive.ReasonPastRetention] != 1 {
		t.Errorf("left-out counts %v, want one %s", counted, derive.ReasonPastRetention)
	}
	if n, err := eng.InputCount(context.Background(), "Patient/w1"); err != nil || n != 1 {
		t.Errorf("stored inputs %d (%v), want only the new one", n, err)
	}
}
