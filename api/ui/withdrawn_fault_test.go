package ui

import (
	"context"
	"fmt"
	"os"
	"path/filepath"
	"strings"
	"testing"
	"time"

	"github.com/deadspace-fhir/deadspace/api/replay"
	"github.com/deadspace-fhir/deadspace/derive"
	"github.com/deadspace-fhir/deadspace/fhir/encode"
)

// faultObs is an invented Observation of patient subj.
func faultObs(subj, id, version, status, code, unit string, v float64, at, updated time.Time) string {
	return fmt.Sprintf(`{"resourceType":"Observation","id":"%s","meta":{"versionId":"%s","lastUpdated":"%s"},"status":"%s",`+
		`"code":{"coding":[{"system":"http://loinc.org","code":"%s"}]},"subject":{"reference":"Patient/%s"},"effectiveDateTime":"%s",`+
		`"valueQuantity":{"value":%g,"unit":"%s","system":"http://unitsofmeasure.org","code":"%s"}}`,
		id, version, updated.UTC().Format(time.RFC3339), status, code, subj, at.UTC().Format(time.RFC3339), v, unit, unit)
}

// faultReplay replays lines as `replay --html` does and returns the report.
func faultReplay(t *testing.T, lines []string) Report {
	t.Helper()
	f := filepath.Join(t.TempDir(), "in.ndjson")
	if err := os.WriteFile(f, []byte(strings.Join(lines, "\n")+"\n"), 0o644); err != nil {
		t.Fatal(err)
	}
	enc := encode.DefaultOptions()
	enc.Issued = time.Date(2026, 3, 16, 0, 0, 0, 0, time.UTC)
	rec := NewRecorder()
	cfg := derive.DefaultConfig()
	out, err := replay.Run(context.Background(), replay.Options{Derive: cfg, Encode: enc, Observe: rec.Add}, []string{f})
	if err != nil {
		t.Fatal(err)
	}
	return FromReplay(out, rec, cfg, enc.Issued, "replay of invented data")
}

// faultGasWindow is a blood gas of subj at at with five end-tidal readings
// around it, all invented.
func faultGasWindow(subj, gas string, paco2 float64, at, updated time.Time) []string {
	var lines []string
	for m := -2; m <= 2; m++ {
		lines = append(lines, faultObs(subj, fmt.Sprintf("%s-et%d", gas, m+2), "1", "final", "19891-1", "mm[Hg]", 36, at.Add(time.Duration(m)*time.Minute), updated))
	}
	return append(lines, faultObs(subj, gas, "1", "final", "2019-8", "mm[Hg]", paco2, at, updated))
}

// TestReportShowsWithdrawnBloodGasAsWithdrawn: an auditor reading the
// replay report must tell a blood gas that was withdrawn at its source
// (a last version entered-in-error, or the resource deleted on the server)
// from one that was corrected. The README says the timeline crosses
// withdrawn values and strikes superseded ones, and the live pages plot a
// withdrawn blood gas as withdrawn. The report plots both as "superseded"
// (a correction), with "superseded by version 2" or "superseded by version "
// as the reason, and says nothing of the withdrawal on the plot: the
// entered-in-error version is dropped with a note that it has no usable
// time, and the deletion is not mentioned at all.
func TestReportShowsWithdrawnBloodGasAsWithdrawn(t *testing.T) {
	at := time.Date(2026, 3, 15, 2, 0, 0, 0, time.UTC)
	updated := at.Add(10 * time.Minute)
	var lines []string
	lines = append(lines, faultGasWindow("wd1", "gas-eie", 42, at, updated)...)
	lines = append(lines, faultObs("wd1", "gas-eie", "2", "entered-in-error", "2019-8", "mm[Hg]", 42, at, updated.Add(time.Hour)))
	later := at.Add(2 * time.Hour)
	lines = append(lines, faultGasWindow("wd1", "gas-del", 44, later, later.Add(10*time.Minute))...)
	lines = append(lines, `{"resourceType":"Bundle","type":"transaction","entry":[{"request":{"method":"DELETE","url":"Observation/gas-del"},"response":{"status":"204","lastModified":"2026-03-15T05:00:00Z"}}]}`)
	r := faultReplay(t, lines)
	if len(r.Timelines) != 1 {
		t.Fatalf("%d timelines, want 1", len(r.Timelines))
	}
	tl := r.Timelines[0]
	for _, gas := range []string{"Observation/gas-eie", "Observation/gas-del"} {
		var shown []string
		for _, p := range tl.PaCO2 {
			if strings.HasPrefix(p.Ref, gas+"/") || p.Ref == gas {
				shown = append(shown, p.Status+" ("+p.Why+")")
				if p.Status == StatusFinal {
					t.Errorf("%s: plotted as current: a blood gas withdrawn at its source is not", p.Ref)
				}
			}
		}
		if !strings.Contains(strings.Join(shown, " "), StatusWithdrawn) {
			t.Errorf("%s: plotted as %v, want it marked withdrawn (an earlier version may also show as superseded)", gas, shown)
		}
	}
}
