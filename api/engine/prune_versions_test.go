package engine_test

import (
	"context"
	"encoding/json"
	"fmt"
	"testing"
	"time"

	"github.com/deadspace-fhir/deadspace/api/engine"
	"github.com/deadspace-fhir/deadspace/api/engine/enginetest"
	"github.com/deadspace-fhir/deadspace/api/store/boltstore"
	"github.com/deadspace-fhir/deadspace/derive"
	"github.com/deadspace-fhir/deadspace/fhir/decode"
)

// TestPrunedCorrectionStaysInForce: a blood gas sampled an hour ago is
// corrected to an earlier sample time near the retention horizon (under
// the same patient, or re-filed to another). Once the corrected version's
// row is pruned, a late copy of the first version (a retried
// notification, a catch-up overlap) is still within the retention, and
// must still be refused: nothing is derived again at the first sample
// time.
func TestPrunedCorrectionStaysInForce(t *testing.T) {
	for _, tc := range []struct {
		name   string
		second string // the patient the correction names
	}{
		{"corrected under the same patient", "Patient/o1"},
		{"corrected and re-filed to another patient", "Patient/o2"},
	} {
		t.Run(tc.name, func(t *testing.T) {
			now := orderNight.Add(30 * time.Hour)
			st := enginetest.OpenStore(t, boltstore.Options{NoSync: true})
			eng, err := engine.New(engine.Config{
				Store: st, Decoder: decode.New(decode.Options{}), Encoder: enginetest.Encoder(t), Derive: derive.DefaultConfig(),
				Retention: 24 * time.Hour, Now: func() time.Time { return now },
			})
			if err != nil {
				t.Fatal(err)
			}
			ctx := context.Background()
			t1 := now.Add(-time.Hour)
			t2 := now.Add(-24*time.Hour + 10*time.Minute)
			var stream []json.RawMessage
			for _, at := range []time.Time{t1, t2} {
				for m := -3; m <= 3; m++ {
					a := at.Add(time.Duration(m) * time.Minute)
					id := fmt.Sprint(a.Unix())
					stream = append(stream,
						orderObs("Patient/o1", "et"+id, "1", a, "final", "19891-1", "mm[Hg]", 35, a),
						orderObs("Patient/o1", "vt"+id, "1", a, "final", "75958-9", "mL", 500, a),
						orderObs("Patient/o1", "rr"+id, "1", a, "final", "19840-8", "/min", 16, a))
				}
			}
			v1 := orderObs("Patient/o1", "g", "1", t1.Add(20*time.Minute), "final", "2019-8", "mm[Hg]", 45, t1)
			v2 := orderObs(tc.second, "g", "2", t1.Add(40*time.Minute), "corrected", "2019-8", "mm[Hg]", 45, t2)
			feedInChunks(t, eng, append(stream, v1, v2), 1000)
			if n := liveAt(t, eng, "Patient/o1", t1); n != 0 {
				t.Fatalf("%d values at the first sample time before pruning, want none", n)
			}
			// Fifteen minutes later the corrected version is past the
			// retention and pruned.
			now = now.Add(15 * time.Minute)
			if _, err := st.Prune(ctx, now.Add(-24*time.Hour)); err != nil {
				t.Fatal(err)
			}
			rec, err := eng.Ingest(ctx, "test", []json.RawMessage{v1})
			if err != nil {
				t.Fatal(err)
			}
			if err := eng.EvaluateNow(ctx); err != nil {
				t.Fatal(err)
			}
			if n := liveAt(t, eng, "Patient/o1", t1); n != 0 {
				t.Errorf("a late copy of version 1 (receipt %+v) made %d values live from the superseded sample time", rec, n)
			}
		})
	}
}

// liveAt counts subject's values at sample time at that are not
// withdrawn.
func liveAt(t *testing.T, eng *engine.Engine, subject string, at time.Time) int {
	t.Helper()
	recs, err := eng.Derivations(context.Background(), subject, time.Time{}, at.Add(24*time.Hour), "", 1000)
	if err != nil {
		t.Fatal(err)
	}
	n := 0
	for _, r := range recs {
		if r.Status != "entered-in-error" && r.EffectiveAt.Equal(at) {
			n++
		}
	}
	return n
}
