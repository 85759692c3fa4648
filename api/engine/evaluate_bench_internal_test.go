package engine

import (
	"context"
	"encoding/json"
	"fmt"
	"testing"
	"time"

	"github.com/deadspace-fhir/deadspace/api/engine/enginetest"
	"github.com/deadspace-fhir/deadspace/api/store/boltstore"
	"github.com/deadspace-fhir/deadspace/derive"
	"github.com/deadspace-fhir/deadspace/fhir/decode"
)

// BenchmarkEvaluateAfterReading measures one evaluation of a patient with
// an hour (history=1h) or twelve hours (history=12h) of minute readings of
// five kinds and a blood gas every half hour (and a Patient and a height)
// after one new notification, the way the webhook benchmark's load
// evaluates (api/serve BenchmarkWebhookToOutbox): the ratio of the two
// histories is the growth of the work with retained history, blood gases'
// derived values included. reading=etco2 is a new
// end-tidal reading at the end of the series, with no blood gas within
// its reach (the usual notification); reading=gas is a new blood gas 20
// or 40 minutes back. Each patient takes at most 20 notifications, as in
// the webhook benchmark, before a fresh set of patients is loaded (not
// timed). Only the evaluation is timed: reading the inputs, deriving,
// diffing against the ledger, the commit (without fsync).
func BenchmarkEvaluateAfterReading(b *testing.B) {
	for _, kind := range []string{"etco2", "gas"} {
		for _, hours := range []int{1, 12} {
			b.Run(fmt.Sprintf("reading=%s/history=%dh", kind, hours), func(b *testing.B) {
				const patients, perPatient = 20, 20
				ctx := context.Background()
				now := time.Now().UTC().Truncate(time.Minute)
				var e *Engine
				var closeStore func()
				defer func() {
					if closeStore != nil {
						closeStore()
					}
				}()
				round := 0
				b.ResetTimer()
				for i := 0; i < b.N; i++ {
					if i%(patients*perPatient) == 0 {
						b.StopTimer()
						if closeStore != nil {
							closeStore()
						}
						e, closeStore = evaluationBenchEngine(b, now, patients, hours)
						round = i
						b.StartTimer()
					}
					b.StopTimer()
					k := i - round
					p := k % patients
					subject := fmt.Sprintf("Patient/eb-%d", p)
					var note json.RawMessage
					if kind == "gas" {
						at := now.Add(-time.Duration(20+20*((k/patients)%2)) * time.Minute)
						note = benchReadingOf(subject, fmt.Sprintf("g-%d", k), "2019-8", "mm[Hg]", 42, at)
					} else {
						note = benchReadingOf(subject, fmt.Sprintf("n-%d", k), "19891-1", "mm[Hg]", 36, now.Add(time.Duration(k)*time.Millisecond))
					}
					if _, err := e.Ingest(ctx, "bench", []json.RawMessage{note}); err != nil {
						b.Fatal(err)
					}
					dirty, err := e.cfg.Store.DirtyPatients(ctx)
					if err != nil || len(dirty) != 1 {
						b.Fatalf("dirty patients: %v, %v", dirty, err)
					}
					b.StartTimer()
					if err := e.evaluatePatient(ctx, dirty[0]); err != nil {
						b.Fatal(err)
					}
				}
			})
		}
	}
}

// evaluationBenchEngine returns a standalone engine over a fresh store
// holding hours of minute readings of five kinds and a blood gas every half
// hour for each patient, every patient evaluated once.
func evaluationBenchEngine(b *testing.B, now time.Time, patients, hours int) (*Engine, func()) {
	b.Helper()
	st := enginetest.OpenStore(b, boltstore.Options{NoSync: true})
	enc := enginetest.Encoder(b)
	e, err := New(Config{Store: st, Decoder: decode.New(decode.Options{}), Encoder: enc, Derive: derive.DefaultConfig()})
	if err != nil {
		b.Fatal(err)
	}
	ctx := context.Background()
	for p := range patients {
		subject := fmt.Sprintf("Patient/eb-%d", p)
		batch := []json.RawMessage{
			json.RawMessage(fmt.Sprintf(`{"resourceType":"Patient","id":"eb-%d","meta":{"versionId":"1","lastUpdated":"2026-01-01T00:00:00Z"},"gender":"male","birthDate":"1960-01-01"}`, p)),
			benchReadingOf(subject, fmt.Sprintf("h-%d", p), "8302-2", "cm", 175, now.Add(-7*time.Hour)),
		}
		for m := 60 * hours; m > 0; m-- {
			at := now.Add(-time.Duration(m) * time.Minute)
			if m%30 == 15 {
				batch = append(batch, benchReadingOf(subject, fmt.Sprintf("hg-%d-%d", p, m), "2019-8", "mm[Hg]", 41, at))
			}
			for k, c := range []struct {
				code, unit string
				v          float64
			}{{"19891-1", "mm[Hg]", 36}, {"76222-9", "mL", 480}, {"19840-8", "/min", 16}, {"76008-2", "L/min", 7.7}, {"60825-7", "mL/min", 210}} {
				batch = append(batch, benchReadingOf(subject, fmt.Sprintf("r-%d-%d-%d", p, m, k), c.code, c.unit, c.v, at))
			}
		}
		if _, err := e.Ingest(ctx, "bench", batch); err != nil {
			b.Fatal(err)
		}
	}
	dirty, err := st.DirtyPatients(ctx)
	if err != nil {
		b.Fatal(err)
	}
	for _, d := range dirty {
		if err := e.evaluatePatient(ctx, d); err != nil {
			b.Fatal(err)
		}
	}
	return e, func() { st.Close() }
}

// benchReadingOf is a reading as the webhook benchmark sends them.
func benchReadingOf(subject, id, code, unit string, v float64, at time.Time) json.RawMessage {
	return json.RawMessage(fmt.Sprintf(`{"resourceType":"Observation","id":"%s","meta":{"versionId":"1","lastUpdated":"%s"},"status":"final",`+
		`"code":{"coding":[{"system":"http://loinc.org","code":"%s"}]},"subject":{"reference":"%s"},"effectiveDateTime":"%s",`+
		`"valueQuantity":{"value":%g,"unit":"%s","system":"http://unitsofmeasure.org","code":"%s"}}`,
		id, at.Add(30*time.Second).UTC().Format(time.RFC3339), code, subject, at.UTC().Format(time.RFC3339), v, unit, unit))
}
