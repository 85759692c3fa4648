package engine

import (
	"context"
	"encoding/json"
	"fmt"
	"sync/atomic"
	"testing"
	"time"

	"github.com/deadspace-fhir/deadspace/api/engine/enginetest"
	"github.com/deadspace-fhir/deadspace/api/pipeline"
	"github.com/deadspace-fhir/deadspace/api/store"
	"github.com/deadspace-fhir/deadspace/api/store/boltstore"
	"github.com/deadspace-fhir/deadspace/api/store/pgstore"
	"github.com/deadspace-fhir/deadspace/api/store/pgstore/pgtest"
	"github.com/deadspace-fhir/deadspace/derive"
	"github.com/deadspace-fhir/deadspace/fhir/decode"
)

// TestEvaluationWithNoBloodGasInReachReadsEndTidalOnly: after a new
// end-tidal reading far from any blood gas, the evaluation resumes the
// detector and reads the end-tidal readings of its span only (the other
// kinds cannot change what it finds, pipeline.DetectorKind), and not the
// patient's facts; after a new blood gas it reads every kind from the
// start of the gas's dependency span, facts included. The same holds over
// a store that copies the inputs out (store.InputScanner is optional),
// and over PostgreSQL, which replicas share (the detector's state is kept
// there too while no other replica evaluates the patient).
func TestEvaluationWithNoBloodGasInReachReadsEndTidalOnly(t *testing.T) {
	t.Parallel()
	embedded := func(inPlace bool) func(t *testing.T) factCounter {
		return func(t *testing.T) factCounter {
			st := enginetest.OpenStore(t, boltstore.Options{NoSync: true})
			counting := &patientReads{Store: st}
			if inPlace {
				return scanningPatientReads{counting, st}
			}
			return counting
		}
	}
	for _, c := range []struct {
		name    string
		open    func(t *testing.T) factCounter
		inPlace bool
	}{
		{"embedded, in place", embedded(true), true},
		{"embedded, copied", embedded(false), false},
		{"PostgreSQL", func(t *testing.T) factCounter {
			st, err := pgstore.Open(t.Context(), pgtest.NewSchema(t), pgstore.Options{Holder: "replica"})
			if err != nil {
				t.Fatal(err)
			}
			t.Cleanup(func() { _ = st.Close() })
			return &sharedPatientReads{Store: st}
		}, false},
	} {
		t.Run(c.name, func(t *testing.T) {
			t.Parallel()
			over := c.open(t)
			if _, ok := over.(store.InputScanner); ok != c.inPlace {
				t.Fatalf("the store shows its inputs in place: %v, want %v", ok, c.inPlace)
			}
			evaluationWithNoBloodGasInReach(t, over)
		})
	}
}

// factCounter is a store that counts the reads of patient facts.
type factCounter interface {
	store.Store
	factReads() int64
}

func evaluationWithNoBloodGasInReach(t *testing.T, over factCounter) {
	enc := enginetest.Encoder(t)
	e, err := New(Config{Store: over, Decoder: decode.New(decode.Options{}), Encoder: enc, Derive: derive.DefaultConfig()})
	if err != nil {
		t.Fatal(err)
	}
	ctx := context.Background()
	now := time.Now().UTC().Truncate(time.Minute)
	const subject = "Patient/eb-0"
	history := []json.RawMessage{json.RawMessage(`{"resourceType":"Patient","id":"eb-0","meta":{"versionId":"1","lastUpdated":"2026-01-01T00:00:00Z"},"gender":"male","birthDate":"1960-01-01"}`)}
	for m := 60; m > 0; m-- {
		at := now.Add(-time.Duration(m) * time.Minute)
		history = append(history, benchReadingOf(subject, fmt.Sprintf("et-%d", m), "19891-1", "mm[Hg]", 36, at),
			benchReadingOf(subject, fmt.Sprintf("vt-%d", m), "76222-9", "mL", 480, at))
	}
	history = append(history, benchReadingOf(subject, "gas-old", "2019-8", "mm[Hg]", 42, now.Add(-50*time.Minute)))
	// evaluate ingests raws, then evaluates the patient as the loop does,
	// and returns what its input read gave.
	evaluate := func(raws ...json.RawMessage) (inputs []kindCount, derivesGas bool, factsRead int64) {
		t.Helper()
		d := ingestOneMark(t, e, over, raws...)
		gases := e.gasRange(d)
		in, derives, _, err := e.loadEvaluationInputs(ctx, d.Subject, gases, e.fallState(d, gases.GasesFrom), nil)
		if err != nil {
			t.Fatal(err)
		}
		before := over.factReads()
		if err := e.evaluatePatient(ctx, d); err != nil {
			t.Fatal(err)
		}
		return countKinds(in), derives, over.factReads() - before
	}
	if kinds, derives, facts := evaluate(history...); !derives || len(kinds) != 3 || facts != 1 {
		t.Fatalf("first evaluation read %v (a blood gas derived: %v) and the facts %d times, want every kind, the blood gas and the facts", kinds, derives, facts)
	}
	kinds, derives, facts := evaluate(benchReadingOf(subject, "et-new", "19891-1", "mm[Hg]", 37, now))
	if derives || len(kinds) != 1 || kinds[0].kind != derive.KindEtCO2 || kinds[0].n < 10 || kinds[0].n > 30 || facts != 0 {
		t.Errorf("after a new end-tidal reading the evaluation read %v (a blood gas derived: %v) and the facts %d times, want the end-tidal readings of minutes only", kinds, derives, facts)
	}
	kinds, derives, facts = evaluate(benchReadingOf(subject, "gas-new", "2019-8", "mm[Hg]", 44, now.Add(-10*time.Minute)))
	if !derives || len(kinds) != 3 || kinds[1].n < 60 || facts != 1 {
		t.Errorf("after a new blood gas the evaluation read %v (a blood gas derived: %v) and the facts %d times, want every kind of its hour's span and the facts", kinds, derives, facts)
	}
}

// patientReads counts reads of patient facts, over a store that one
// process holds (the embedded store under it), which it copies inputs out
// of: it hides the embedded store's in-place scan.
type patientReads struct {
	store.Store
	n atomic.Int64
}

func (p *patientReads) Exclusive() bool { return true }

// scanningPatientReads is patientReads showing inputs in place as the
// embedded store does.
type scanningPatientReads struct {
	*patientReads
	scanner store.InputScanner
}

func (s scanningPatientReads) ScanInputsFrom(ctx context.Context, subject string, from time.Time, fn func(store.InputRow) error) error {
	return s.scanner.ScanInputsFrom(ctx, subject, from, fn)
}

func (p *patientReads) Patient(ctx context.Context, subject string) (store.Patient, error) {
	p.n.Add(1)
	return p.Store.Patient(ctx, subject)
}

func (p *patientReads) factReads() int64 { return p.n.Load() }

// sharedPatientReads counts reads of patient facts over PostgreSQL, which
// replicas share (store.Replicated).
type sharedPatientReads struct {
	*pgstore.Store
	n atomic.Int64
}

func (p *sharedPatientReads) Patient(ctx context.Context, subject string) (store.Patient, error) {
	p.n.Add(1)
	return p.Store.Patient(ctx, subject)
}

func (p *sharedPatientReads) factReads() int64 { return p.n.Load() }

type kindCount struct {
	kind derive.Kind
	n    int
}

// countKinds counts inputs by kind, in order of kind.
func countKinds(in []pipeline.Input) []kindCount {
	var out []kindCount
	for k := range derive.Kind(255) {
		n := 0
		for _, i := range in {
			if i.Reading.Kind == k {
				n++
			}
		}
		if n > 0 {
			out = append(out, kindCount{k, n})
		}
	}
	return out
}
