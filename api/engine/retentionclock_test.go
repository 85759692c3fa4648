package engine_test

import (
	"context"
	"encoding/json"
	"testing"
	"time"

	"github.com/deadspace-fhir/deadspace/api/engine"
	"github.com/deadspace-fhir/deadspace/api/engine/enginetest"
	"github.com/deadspace-fhir/deadspace/api/store/boltstore"
	"github.com/deadspace-fhir/deadspace/derive"
	"github.com/deadspace-fhir/deadspace/fhir/decode"
)

// TestUnusableVersionIsKeptByTheEnginesClock: a version without an
// effective time of its own (a withdrawal without meta.lastUpdated) is
// kept for the retention from when it arrived, on the engine's clock
// (Config.Now), the clock its pruning and its retention check run on.
func TestUnusableVersionIsKeptByTheEnginesClock(t *testing.T) {
	clock := time.Date(2026, 3, 1, 6, 0, 0, 0, time.UTC)
	st := enginetest.OpenStore(t, boltstore.Options{NoSync: true})
	eng, err := engine.New(engine.Config{
		Store: st, Decoder: decode.New(decode.Options{}), Encoder: enginetest.Encoder(t), Derive: derive.DefaultConfig(),
		Now: func() time.Time { return clock },
	})
	if err != nil {
		t.Fatal(err)
	}
	ctx := context.Background()
	withdrawal := json.RawMessage(`{"resourceType":"Observation","id":"g","meta":{"versionId":"2"},"status":"entered-in-error",` +
		`"code":{"coding":[{"system":"http://loinc.org","code":"2019-8"}]},"subject":{"reference":"Patient/c1"},` +
		`"effectiveDateTime":"2026-03-01T05:00:00Z","valueQuantity":{"value":45,"unit":"mm[Hg]","system":"http://unitsofmeasure.org","code":"mm[Hg]"}}`)
	if _, err := eng.Ingest(ctx, "test", []json.RawMessage{withdrawal}); err != nil {
		t.Fatal(err)
	}
	in, err := st.Input(ctx, "Patient/c1", "Observation/g")
	if err != nil {
		t.Fatal(err)
	}
	if !in.EffectiveAt.Equal(clock) {
		t.Errorf("the withdrawal is kept from %v, want the engine's clock %v", in.EffectiveAt, clock)
	}
}
