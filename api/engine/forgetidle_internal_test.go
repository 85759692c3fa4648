package engine

import (
	"encoding/json"
	"fmt"
	"slices"
	"sync/atomic"
	"testing"
	"time"

	"github.com/deadspace-fhir/deadspace/api/engine/enginetest"
	"github.com/deadspace-fhir/deadspace/api/store"
	"github.com/deadspace-fhir/deadspace/api/store/boltstore"
	"github.com/deadspace-fhir/deadspace/derive"
	"github.com/deadspace-fhir/deadspace/fhir/decode"
)

// TestForgetIdleDropsOnlyWork: a patient not evaluated since the horizon
// is forgotten (its detector states, its falls' series, that it was
// evaluated here), one evaluated since is not; and an engine that forgot
// a patient between two changes records the same ledger as one that did
// not, the forgetting engine evaluating the second change whole.
func TestForgetIdleDropsOnlyWork(t *testing.T) {
	t.Parallel()
	base := time.Now().UTC().Truncate(time.Minute)
	var clock atomic.Int64
	clock.Store(base.UnixNano())
	now := func() time.Time { return time.Unix(0, clock.Load()).UTC() }
	newEngine := func() (*Engine, store.Store) {
		st := enginetest.OpenStore(t, boltstore.Options{NoSync: true})
		e, err := New(Config{Store: st, Decoder: decode.New(decode.Options{}), Encoder: enginetest.Encoder(t), Derive: derive.DefaultConfig(), Now: now})
		if err != nil {
			t.Fatal(err)
		}
		return e, st
	}
	const subject = "Patient/fi-0"
	obs := func(id, code, unit string, v float64, at time.Time) json.RawMessage {
		return benchReadingOf(subject, id, code, unit, v, at)
	}
	first := []json.RawMessage{json.RawMessage(`{"resourceType":"Patient","id":"fi-0","meta":{"versionId":"1","lastUpdated":"2026-01-01T00:00:00Z"},"gender":"male","birthDate":"1961-01-01"}`),
		obs("ht", "8302-2", "cm", 180, base.Add(-3*time.Hour))}
	for m := 60; m > 0; m-- {
		at := base.Add(-time.Duration(m) * time.Minute)
		// A fall over the last 20 minutes, so the ledger holds a fall too.
		et := 38.0
		if m <= 20 {
			et = 24
		}
		first = append(first, obs(fmt.Sprintf("et-%d", m), "19891-1", "mm[Hg]", et, at), obs(fmt.Sprintf("vt-%d", m), "76222-9", "mL", 500, at),
			obs(fmt.Sprintf("rr-%d", m), "9279-1", "/min", 16, at), obs(fmt.Sprintf("vco2-%d", m), "60825-7", "mL/min", 200, at))
	}
	first = append(first, obs("gas-1", "2019-8", "mm[Hg]", 45, base.Add(-40*time.Minute)))
	second := []json.RawMessage{obs("et-new", "19891-1", "mm[Hg]", 23, base), obs("gas-2", "2019-8", "mm[Hg]", 47, base.Add(-10*time.Minute))}

	run := func(forget bool) []store.Entry {
		e, st := newEngine()
		d := ingestOneMark(t, e, st, first...)
		if err := e.evaluatePatient(t.Context(), d); err != nil {
			t.Fatal(err)
		}
		if _, ok := e.fallStates.Load(subject); !ok {
			t.Fatal("no detector states kept after the first evaluation")
		}
		clock.Add(int64(time.Hour))
		if n := e.forgetIdle(now().Add(-2 * time.Hour)); n != 0 {
			t.Errorf("forgot %d patients evaluated after the horizon", n)
		}
		if forget {
			if n := e.forgetIdle(now()); n != 1 {
				t.Errorf("forgot %d patients, want 1", n)
			}
			for name, m := range map[string]interface{ Load(any) (any, bool) }{"evaluated here": &e.evaluatedHere, "detector states": &e.fallStates, "falls' series": &e.fallSeries} {
				if _, ok := m.Load(subject); ok {
					t.Errorf("%s still held after forgetting", name)
				}
			}
		}
		d = ingestOneMark(t, e, st, second...)
		if err := e.evaluatePatient(t.Context(), d); err != nil {
			t.Fatal(err)
		}
		ledger, err := st.Ledger(t.Context(), subject)
		if err != nil {
			t.Fatal(err)
		}
		return ledger
	}
	kept, forgot := run(false), run(true)
	key := func(en store.Entry) string { return en.Series + " " + en.Key + " " + en.Status }
	keys := func(l []store.Entry) []string {
		out := make([]string, len(l))
		for i, en := range l {
			out[i] = key(en)
		}
		slices.Sort(out)
		return out
	}
	if len(kept) == 0 || !slices.Equal(keys(kept), keys(forgot)) {
		t.Errorf("ledger with the patient kept:\n%v\nforgotten:\n%v", keys(kept), keys(forgot))
	}
	falls := 0
	for _, en := range kept {
		if isFall(en) {
			falls++
		}
	}
	if falls == 0 {
		t.Errorf("no fall in the ledger (%d entries): the case does not cover the falls' series", len(kept))
	}
}
