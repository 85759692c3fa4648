package engine_test

import (
	"context"
	"encoding/json"
	"fmt"
	"path/filepath"
	"slices"
	"testing"
	"time"

	"github.com/deadspace-fhir/deadspace/api/engine"
	"github.com/deadspace-fhir/deadspace/api/store/boltstore"
	"github.com/deadspace-fhir/deadspace/derive"
	"github.com/deadspace-fhir/deadspace/fhir/decode"
	"github.com/deadspace-fhir/deadspace/fhir/encode"
)

// BenchmarkPostToRecorded measures, for one patient with 1 h and with 12 h
// of minute readings of five kinds (and a blood gas an hour) in the store,
// the time from handing the engine a new blood gas to its derivation being
// committed (ingest, evaluation, commit, with fsync). The goal (issue 9) is
// a 12 h p50 at most 1.5 times the 1 h p50: the work per notification must
// not grow with retained history.
func BenchmarkPostToRecorded(b *testing.B) {
	for _, hours := range []int{1, 12} {
		b.Run(fmt.Sprintf("history=%dh", hours), func(b *testing.B) {
			st, err := boltstore.Open(filepath.Join(b.TempDir(), "s.db"), boltstore.Options{})
			if err != nil {
				b.Fatal(err)
			}
			defer st.Close()
			enc, err := encode.New(encode.DefaultOptions())
			if err != nil {
				b.Fatal(err)
			}
			eng, err := engine.New(engine.Config{Store: st, Decoder: decode.New(decode.Options{}), Encoder: enc, Derive: derive.DefaultConfig()})
			if err != nil {
				b.Fatal(err)
			}
			ctx := context.Background()
			now := time.Now().UTC().Truncate(time.Minute)
			subject := "Patient/w1"
			var batch []json.RawMessage
			for m := hours * 60; m > 0; m-- {
				at := now.Add(-time.Duration(m) * time.Minute)
				for k, c := range []struct {
					code, unit string
					v          float64
				}{{"19891-1", "mm[Hg]", 36}, {"76222-9", "mL", 480}, {"19840-8", "/min", 16}, {"76008-2", "L/min", 7.7}, {"60825-7", "mL/min", 210}} {
					batch = append(batch, obs(fmt.Sprintf("r-%d-%d", m, k), "1", "final", c.code, c.unit, c.v, at, at.Add(time.Minute)))
				}
				if m%60 == 30 {
					batch = append(batch, obs(fmt.Sprintf("hist-gas-%d", m), "1", "final", "2019-8", "mm[Hg]", 42, at, at.Add(time.Minute)))
				}
				if len(batch) >= 500 || m == 1 {
					if _, err := eng.Ingest(ctx, "bench", batch); err != nil {
						b.Fatal(err)
					}
					batch = batch[:0]
				}
			}
			if err := eng.EvaluateNow(ctx); err != nil {
				b.Fatal(err)
			}
			_ = subject
			var lat []time.Duration
			i := 0
			for b.Loop() {
				i++
				// The same blood gas, amended each time, so every iteration
				// derives one blood gas against the same history.
				at := now.Add(-5 * time.Minute)
				gas := obs("gas", fmt.Sprint(i), "amended", "2019-8", "mm[Hg]", 40+float64(i%7), at, now.Add(time.Duration(i)*time.Millisecond))
				t0 := time.Now()
				if _, err := eng.Ingest(ctx, "bench", []json.RawMessage{gas}); err != nil {
					b.Fatal(err)
				}
				if err := eng.EvaluateNow(ctx); err != nil {
					b.Fatal(err)
				}
				lat = append(lat, time.Since(t0))
			}
			slices.Sort(lat)
			b.ReportMetric(float64(lat[len(lat)/2].Microseconds())/1000, "p50-ms")
			b.ReportMetric(float64(lat[len(lat)*99/100].Microseconds())/1000, "p99-ms")
		})
	}
}
