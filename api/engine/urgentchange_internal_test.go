package engine

import (
	"encoding/json"
	"fmt"
	"strings"
	"testing"
	"time"
)

// The device pace holds back evaluations for new device readings only. A
// change that alters a blood gas's values directly (the blood gas deleted,
// withdrawn or corrected, the patient's facts or height changed) is
// evaluated at once, although the patient was evaluated a moment before:
// a deleted or withdrawn blood gas's values must be retracted as promptly
// as a new one's are written, whatever the pace (up to a minute). A
// correction of a device reading, like a new one, waits for the pace.
func TestDevicePaceDoesNotHoldChangesToBloodGasesOrFacts(t *testing.T) {
	t.Parallel()
	now := time.Now().UTC().Truncate(time.Minute)
	gasAt := now.Add(-20 * time.Minute)
	patient := func(subject, version, gender, birth string) json.RawMessage {
		id := strings.TrimPrefix(subject, "Patient/")
		return json.RawMessage(fmt.Sprintf(`{"resourceType":"Patient","id":"%s","meta":{"versionId":"%s","lastUpdated":"%s"},"gender":"%s","birthDate":"%s"}`,
			id, version, now.Add(-time.Minute).Format(time.RFC3339), gender, birth))
	}
	// version2 is a second version of a resource readingOf built, a
	// minute later, with the given status and value.
	version2 := func(r json.RawMessage, status string, v float64) json.RawMessage {
		var m map[string]any
		if err := json.Unmarshal(r, &m); err != nil {
			t.Fatal(err)
		}
		m["meta"] = map[string]any{"versionId": "2", "lastUpdated": now.Add(-time.Minute).Format(time.RFC3339)}
		m["status"] = status
		m["valueQuantity"].(map[string]any)["value"] = v
		out, err := json.Marshal(m)
		if err != nil {
			t.Fatal(err)
		}
		return out
	}
	type setup struct {
		eng     *Engine
		subject string
		gas     json.RawMessage
		etco2   json.RawMessage
		height  json.RawMessage
	}
	tests := []struct {
		name   string
		change func(t *testing.T, s setup)
		// held: the change waits for the pace (a device reading's).
		held bool
	}{
		{name: "blood gas deleted on the server", change: func(t *testing.T, s setup) {
			if _, err := s.eng.Deleted(t.Context(), []Deletion{{Ref: "Observation/gas", How: "test"}}); err != nil {
				t.Fatal(err)
			}
		}},
		{name: "blood gas entered in error", change: func(t *testing.T, s setup) {
			ingestOne(t, s.eng, version2(s.gas, "entered-in-error", 42))
		}},
		{name: "blood gas corrected", change: func(t *testing.T, s setup) {
			ingestOne(t, s.eng, version2(s.gas, "amended", 47))
		}},
		{name: "height corrected", change: func(t *testing.T, s setup) {
			ingestOne(t, s.eng, version2(s.height, "amended", 158))
		}},
		{name: "patient's sex and birth date changed", change: func(t *testing.T, s setup) {
			ingestOne(t, s.eng, patient(s.subject, "2", "female", "1948-05-01"))
		}},
		{name: "end-tidal reading corrected", held: true, change: func(t *testing.T, s setup) {
			ingestOne(t, s.eng, version2(s.etco2, "amended", 30))
		}},
	}
	for _, tc := range tests {
		t.Run(tc.name, func(t *testing.T) {
			t.Parallel()
			eng, g := pacedEngine(t, MaxDevicePace)
			run(t, eng)
			s := setup{eng: eng, subject: "Patient/p",
				gas:    readingOf("Patient/p", "gas", "2019-8", "mm[Hg]", 44, gasAt),
				etco2:  readingOf("Patient/p", "et", "19891-1", "mm[Hg]", 36, gasAt),
				height: readingOf("Patient/p", "ht", "8302-2", "cm", 178, gasAt.Add(-time.Hour)),
			}
			if _, err := eng.Ingest(t.Context(), "test", []json.RawMessage{
				patient(s.subject, "1", "male", "1960-01-01"), s.height, s.etco2, s.gas,
			}); err != nil {
				t.Fatal(err)
			}
			settled(t, eng)
			before := commitsOf(g, s.subject)
			if before == 0 {
				t.Fatal("the first data was never evaluated")
			}
			tc.change(t, s)
			// Half the pace is far more than an evaluation takes and far
			// less than the pace: held or not cannot be confused.
			deadline := time.Now().Add(MaxDevicePace / 2)
			for commitsOf(g, s.subject) == before && time.Now().Before(deadline) && !tc.held {
				time.Sleep(5 * time.Millisecond)
			}
			if tc.held {
				time.Sleep(300 * time.Millisecond)
			}
			evaluated := commitsOf(g, s.subject) > before
			if evaluated == tc.held {
				t.Errorf("evaluated at once: %v, want %v (the pace is %v)", evaluated, !tc.held, MaxDevicePace)
			}
		})
	}
}

func ingestOne(t *testing.T, eng *Engine, r json.RawMessage) {
	t.Helper()
	if _, err := eng.Ingest(t.Context(), "test", []json.RawMessage{r}); err != nil {
		t.Fatal(err)
	}
}
