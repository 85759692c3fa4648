package engine

import (
	"context"
	"encoding/json"
	"fmt"
	"reflect"
	"sync/atomic"
	"testing"
	"time"

	"github.com/deadspace-fhir/deadspace/api/engine/enginetest"
	"github.com/deadspace-fhir/deadspace/api/store"
	"github.com/deadspace-fhir/deadspace/api/store/boltstore"
	"github.com/deadspace-fhir/deadspace/derive"
	"github.com/deadspace-fhir/deadspace/fhir/decode"
)

// rowCounter is the embedded store counting the rows its in-place scans
// show.
type rowCounter struct {
	*boltstore.Store
	rows atomic.Int64
}

func (r *rowCounter) ScanInputsFrom(ctx context.Context, subject string, from time.Time, fn func(store.InputRow) error) error {
	return r.Store.ScanInputsFrom(ctx, subject, from, func(row store.InputRow) error {
		r.rows.Add(1)
		return fn(row)
	})
}

// TestKeptDetectorReadingsAreWhatTheStoreHolds: after each change in
// turn (new readings at the end, a reading charted late, a corrected one,
// a blood gas, a reading of another kind), the inputs an evaluation reads
// with the detector's readings the patient's last evaluation kept are
// those it reads from the store alone, in the same order; and after a new
// end-tidal reading at the end of the series it reads from the store only
// the rows of its own pairing window, not those back to the state the
// detector resumes from.
func TestKeptDetectorReadingsAreWhatTheStoreHolds(t *testing.T) {
	t.Parallel()
	st := &rowCounter{Store: enginetest.OpenStore(t, boltstore.Options{NoSync: true})}
	e, err := New(Config{Store: st, Decoder: decode.New(decode.Options{}), Encoder: enginetest.Encoder(t), Derive: derive.DefaultConfig()})
	if err != nil {
		t.Fatal(err)
	}
	ctx := context.Background()
	now := time.Now().UTC().Truncate(time.Minute)
	const subject = "Patient/kd-0"
	obs := func(id, version, code, unit string, v float64, at time.Time) json.RawMessage {
		return json.RawMessage(fmt.Sprintf(`{"resourceType":"Observation","id":"%s","meta":{"versionId":"%s","lastUpdated":"%s"},"status":"final",`+
			`"code":{"coding":[{"system":"http://loinc.org","code":"%s"}]},"subject":{"reference":"%s"},"effectiveDateTime":"%s",`+
			`"valueQuantity":{"value":%g,"unit":"%s","system":"http://unitsofmeasure.org","code":"%s"}}`,
			id, version, now.Add(time.Hour+time.Duration(len(version))*time.Minute).Format(time.RFC3339), code, subject,
			at.Format(time.RFC3339Nano), v, unit, unit))
	}
	etco2 := func(id, version string, v float64, at time.Time) json.RawMessage {
		return obs(id, version, "19891-1", "mm[Hg]", v, at)
	}
	history := []json.RawMessage{json.RawMessage(`{"resourceType":"Patient","id":"kd-0","meta":{"versionId":"1","lastUpdated":"2026-01-01T00:00:00Z"},"gender":"female","birthDate":"1970-01-01"}`)}
	for m := 90; m > 0; m-- {
		at := now.Add(-time.Duration(m) * time.Minute)
		history = append(history, etco2(fmt.Sprintf("et-%d", m), "1", 36-float64(m%3), at),
			obs(fmt.Sprintf("vt-%d", m), "1", "76222-9", "mL", 480, at))
	}
	history = append(history, obs("gas-old", "1", "2019-8", "mm[Hg]", 42, now.Add(-80*time.Minute)))

	// step ingests raws and compares the two reads of the evaluation the
	// mark calls for, then evaluates the patient; it returns the rows the
	// store showed each read.
	step := func(t *testing.T, raws ...json.RawMessage) (withKept, alone int64) {
		t.Helper()
		d := ingestOneMark(t, e, st, raws...)
		gases := e.gasRange(d)
		resume := e.fallState(d, gases.GasesFrom)
		kept := e.keptDetectorInputs(d)
		before := st.rows.Load()
		in, derives, from, err := e.loadEvaluationInputs(ctx, d.Subject, gases, resume, kept)
		if err != nil {
			t.Fatal(err)
		}
		withKept = st.rows.Load() - before
		before = st.rows.Load()
		want, wantDerives, wantFrom, err := e.loadEvaluationInputs(ctx, d.Subject, gases, resume, nil)
		if err != nil {
			t.Fatal(err)
		}
		alone = st.rows.Load() - before
		if !reflect.DeepEqual(in, want) || derives != wantDerives || !from.Equal(wantFrom) {
			t.Errorf("with the kept readings: %d inputs (%v), blood gas derived %v, from %v; from the store alone: %d (%v), %v, %v",
				len(in), countKinds(in), derives, from, len(want), countKinds(want), wantDerives, wantFrom)
		}
		if err := e.evaluatePatient(ctx, d); err != nil {
			t.Fatal(err)
		}
		return withKept, alone
	}
	step(t, history...)
	for _, c := range []struct {
		name string
		raws []json.RawMessage
		// atEnd: a new end-tidal reading at the end of the series, which
		// must read its own window's rows from the store only.
		atEnd bool
	}{
		{"a new reading at the end", []json.RawMessage{etco2("et-new-1", "1", 35, now)}, true},
		{"another, 30 s on", []json.RawMessage{etco2("et-new-2", "1", 34, now.Add(30*time.Second))}, true},
		{"two at once, a minute on", []json.RawMessage{etco2("et-new-3", "1", 30, now.Add(time.Minute)), etco2("et-new-4", "1", 22, now.Add(90*time.Second))}, true},
		{"a reading charted three minutes late", []json.RawMessage{etco2("et-late", "1", 33, now.Add(-2*time.Minute+500*time.Millisecond))}, false},
		{"a reading corrected 12 minutes back", []json.RawMessage{etco2("et-12", "2", 20, now.Add(-12*time.Minute))}, false},
		{"a reading 40 minutes back withdrawn", []json.RawMessage{json.RawMessage(fmt.Sprintf(`{"resourceType":"Observation","id":"et-40","meta":{"versionId":"2","lastUpdated":"%s"},"status":"entered-in-error",`+
			`"code":{"coding":[{"system":"http://loinc.org","code":"19891-1"}]},"subject":{"reference":"%s"},"effectiveDateTime":"%s"}`,
			now.Add(2*time.Hour).Format(time.RFC3339), subject, now.Add(-40*time.Minute).Format(time.RFC3339)))}, false},
		{"a new reading after those", []json.RawMessage{etco2("et-new-5", "1", 21, now.Add(2*time.Minute))}, true},
		{"a blood gas 20 minutes back", []json.RawMessage{obs("gas-new", "1", "2019-8", "mm[Hg]", 45, now.Add(-20*time.Minute))}, false},
		{"a tidal volume at the end", []json.RawMessage{obs("vt-new", "1", "76222-9", "mL", 500, now.Add(2*time.Minute))}, false},
		{"a new reading after the blood gas", []json.RawMessage{etco2("et-new-6", "1", 20, now.Add(3*time.Minute))}, true},
	} {
		t.Run(c.name, func(t *testing.T) {
			withKept, alone := step(t, c.raws...)
			t.Logf("rows: %d with the kept readings, %d without", withKept, alone)
			// Two kinds a minute over a pairing window (5 minutes) and
			// the new readings: at most 16 rows; the state the detector
			// resumes from is three windows back, so the store alone
			// shows 40 or more.
			if c.atEnd && (withKept > 16 || alone < 40) {
				t.Errorf("the store showed %d rows with the kept readings, %d without; want at most 16 and at least 40", withKept, alone)
			}
		})
	}
}

// ingestOneMark ingests raws and returns the one dirty mark they leave.
func ingestOneMark(t *testing.T, e *Engine, st store.Store, raws ...json.RawMessage) store.Dirty {
	t.Helper()
	if _, err := e.Ingest(t.Context(), "test", raws); err != nil {
		t.Fatal(err)
	}
	dirty, err := st.DirtyPatients(t.Context())
	if err != nil || len(dirty) != 1 {
		t.Fatalf("dirty patients %v, %v", dirty, err)
	}
	return dirty[0]
}
