package ui

import (
	"testing"
	"time"
)

// TestReportPlotsOneSampleReportedTwiceOnce: a laboratory that sends one
// arterial sample as a panel and as a separate PaCO2 gives one blood gas
// (rule 3): its values are derived once, from the preferred report, and the
// other report is left out with same-sample. An auditor expects the
// timeline to show one current blood gas for that sample, and the table's
// row to be the report the values were derived from (linked to their
// explanation). The report plots both reports as current blood gases: the
// same PaCO2 twice, one of them an input the replay left out, so the plot
// counts one more blood gas than the replay derived from (the demo test
// counts current points as blood gases derived).
func TestReportPlotsOneSampleReportedTwiceOnce(t *testing.T) {
	at := time.Date(2026, 3, 15, 6, 0, 0, 0, time.UTC)
	updated := at.Add(10 * time.Minute)
	lines := faultGasWindow("ss1", "gas-sep", 40, at, updated)
	lines = append(lines, `{"resourceType":"Observation","id":"gas-panel","meta":{"versionId":"1","lastUpdated":"2026-03-15T06:10:00Z"},"status":"final",`+
		`"code":{"coding":[{"system":"http://loinc.org","code":"24336-0"}]},"subject":{"reference":"Patient/ss1"},"effectiveDateTime":"2026-03-15T06:00:00Z",`+
		`"component":[{"code":{"coding":[{"system":"http://loinc.org","code":"2019-8"}]},"valueQuantity":{"value":40,"unit":"mm[Hg]","system":"http://unitsofmeasure.org","code":"mm[Hg]"}}]}`)
	r := faultReplay(t, lines)
	if len(r.Timelines) != 1 {
		t.Fatalf("%d timelines, want 1", len(r.Timelines))
	}
	tl := r.Timelines[0]
	var current []string
	for _, p := range tl.PaCO2 {
		if p.At.Equal(at) && p.Status == StatusFinal {
			current = append(current, p.Ref)
		}
	}
	if len(current) != 1 {
		t.Errorf("%d current blood gases plotted for one sample (%v), want 1", len(current), current)
	}
	if len(tl.Rows) != 1 || tl.Rows[0].PaCO2 == nil {
		t.Fatalf("rows = %+v, want one with its blood gas", tl.Rows)
	}
	if row := tl.Rows[0]; row.PaCO2.ExplainID == "" || len(row.Values) == 0 {
		t.Errorf("the row shows %s, which links to no explanation; want the report the values were derived from", row.PaCO2.Ref)
	}
}
