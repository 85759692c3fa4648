package engine_test

import (
	"cmp"
	"context"
	"encoding/json"
	"fmt"
	"math/rand/v2"
	"path/filepath"
	"slices"
	"sync/atomic"
	"testing"
	"time"

	"github.com/deadspace-fhir/deadspace/api/engine"
	"github.com/deadspace-fhir/deadspace/api/store"
	"github.com/deadspace-fhir/deadspace/api/store/boltstore"
	"github.com/deadspace-fhir/deadspace/derive"
	"github.com/deadspace-fhir/deadspace/fhir/decode"
	"github.com/deadspace-fhir/deadspace/fhir/encode"
)

// rangeCounting counts the evaluations (commits) and the reads of a range
// of inputs, which only an evaluation that resumed the fall detector makes.
type rangeCounting struct {
	*boltstore.Store
	ranged, commits atomic.Int64
}

func (r *rangeCounting) InputsFrom(ctx context.Context, subject string, from time.Time) ([]store.Input, error) {
	r.ranged.Add(1)
	return r.Store.InputsFrom(ctx, subject, from)
}

func (r *rangeCounting) Commit(ctx context.Context, c store.Change, now time.Time) error {
	r.commits.Add(1)
	return r.Store.Commit(ctx, c, now)
}

// TestIncrementalAgreesWithReplay: readings arrive roughly in time order,
// some late by minutes and a few by over an hour (a change before the
// saved detector state), and the engine evaluates after every few. Its
// values (falls and rises included, found by a detector resumed from its
// saved state) must be replay's, for several arrival orders.
func TestIncrementalAgreesWithReplay(t *testing.T) {
	t.Parallel()
	base := time.Date(2026, 1, 10, 0, 0, 0, 0, time.UTC)
	type item struct {
		raw     json.RawMessage
		arrival time.Duration
	}
	var items []item
	add := func(raw json.RawMessage, at time.Duration) { items = append(items, item{raw, at}) }
	for p := 1; p <= 2; p++ {
		subj := fmt.Sprintf("Patient/inc%d", p)
		for m := range 6 * 60 {
			at := base.Add(time.Duration(m) * time.Minute)
			v := 37 + float64(m%4)/2
			switch {
			case m >= 100 && m < 130: // a fall
				v = 22 + float64(m%3)/2
			case m >= 200 && m < 215: // a rise
				v = 52 + float64(m%2)
			case p == 2 && m >= 300: // a fall that does not end
				v = 18
			}
			add(obsOf(subj, fmt.Sprintf("inc%d-et%d", p, m), "1", "final", "19891-1", "mm[Hg]", v, at, at.Add(time.Minute)), time.Duration(m)*time.Minute)
		}
		for g, m := range []int{60, 125, 240, 320} {
			at := base.Add(time.Duration(m) * time.Minute)
			// Blood gases come back from the laboratory 20 minutes later.
			add(obsOf(subj, fmt.Sprintf("inc%d-gas%d", p, g), "1", "final", "2019-8", "mm[Hg]", 40+float64(g), at, at.Add(20*time.Minute)), time.Duration(m+20)*time.Minute)
		}
	}
	for seed := range uint64(3) {
		t.Run(fmt.Sprint("order ", seed), func(t *testing.T) {
			t.Parallel()
			rng := rand.New(rand.NewPCG(seed, 7))
			order := slices.Clone(items)
			for i := range order {
				order[i].arrival += time.Duration(rng.IntN(10)) * time.Minute
				if rng.IntN(60) == 0 {
					order[i].arrival += 90 * time.Minute // very late
				}
			}
			slices.SortStableFunc(order, func(a, b item) int { return cmp.Compare(a.arrival, b.arrival) })
			var stream []json.RawMessage
			for _, it := range order {
				stream = append(stream, it.raw)
			}
			bs, err := boltstore.Open(filepath.Join(t.TempDir(), "s.db"), boltstore.Options{NoSync: true})
			if err != nil {
				t.Fatal(err)
			}
			defer bs.Close()
			st := &rangeCounting{Store: bs}
			enc, err := encode.New(encode.DefaultOptions())
			if err != nil {
				t.Fatal(err)
			}
			eng, err := engine.New(engine.Config{
				Store: st, Decoder: decode.New(decode.Options{}), Encoder: enc, Derive: derive.DefaultConfig(),
				Now: func() time.Time { return base.Add(8 * time.Hour) },
			})
			if err != nil {
				t.Fatal(err)
			}
			ctx := context.Background()
			for from := 0; from < len(stream); from += 9 {
				if _, err := eng.Ingest(ctx, "test", stream[from:min(from+9, len(stream))]); err != nil {
					t.Fatal(err)
				}
				if err := eng.EvaluateNow(ctx); err != nil {
					t.Fatal(err)
				}
			}
			var live []json.RawMessage
			for p := 1; p <= 2; p++ {
				recs, err := eng.Derivations(ctx, fmt.Sprintf("Patient/inc%d", p), time.Time{}, base.Add(24*time.Hour), "", 1000)
				if err != nil {
					t.Fatal(err)
				}
				for _, r := range recs {
					live = append(live, r.Payload.Observation)
				}
			}
			rep, err := eng.Compute(ctx, stream)
			if err != nil {
				t.Fatal(err)
			}
			var replayed []json.RawMessage
			falls := 0
			for _, r := range rep.Results {
				if r.Fall != nil {
					falls++
				}
				for _, o := range r.Bundle.Observations {
					raw, err := json.Marshal(o)
					if err != nil {
						t.Fatal(err)
					}
					replayed = append(replayed, raw)
				}
			}
			if falls < 4 {
				t.Fatalf("replay found %d falls and rises; the stream should give at least 4", falls)
			}
			got, want := valuesOfObservations(t, live), valuesOfObservations(t, replayed)
			for series, w := range want {
				if g, ok := got[series]; !ok || g != w {
					t.Errorf("series %s: live %+v (present %v), replay %+v", series, g, ok, w)
				}
			}
			for series, g := range got {
				if _, ok := want[series]; !ok {
					t.Errorf("the live engine has series %s (key %s), replay has not", series, g.key)
				}
			}
			// The test means something only if most evaluations resumed.
			if r, c := st.ranged.Load(), st.commits.Load(); 10*r < 8*c {
				t.Errorf("%d of %d evaluations read a range of inputs: the detector's state was hardly used", r, c)
			}
			t.Logf("%d values agree; %d of %d evaluations read a range of inputs", len(want), st.ranged.Load(), st.commits.Load())
		})
	}
}
