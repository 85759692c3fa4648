package pipeline_test

import (
	"slices"
	"strings"
	"testing"

	"github.com/deadspace-fhir/deadspace/derive"
	"github.com/deadspace-fhir/deadspace/fhir/codes"
	"github.com/deadspace-fhir/deadspace/fhir/decode"
)

const siteSystem = "http://hospital.example/fhir/CodeSystem/icu-devices"

// siteTable is the default code table with a site's rows over it, as
// --codes FILE gives.
func siteTable(t *testing.T, rows string) *codes.Table {
	t.Helper()
	tb, err := codes.Load(strings.NewReader(`{"rows": [` + rows + `]}`))
	if err != nil {
		t.Fatal(err)
	}
	return tb
}

// A site's code table (--codes) may rank its sources on the documented
// scale (below 20 a substitute) with priorities other than the default
// table's. The note on a value computed from a substitute must name the
// source for what it is: a setting is a setting, a delivered (inspired)
// volume is delivered, a pressure measured in mm[Hg] is no converted
// percentage. Today the name is chosen from the priority number alone (15
// or more is "delivered", anything else "set"; every end-tidal substitute a
// "CO2 percentage"), so a site's set tidal volume at 15 is written into the
// record as a delivered volume, MDC 151980 ranked 12 as a set one (and the
// leak note compares the expired volume with "the set one"), and a
// transport monitor's end-tidal pressure ranked 15 as a percentage
// converted with an assumed barometric pressure. Substitutes overstate the
// expired volume when there is a leak (from memory), which is why the
// record must say which one was used.
func TestSubstituteNamesFollowTheSiteCodeTable(t *testing.T) {
	t.Parallel()
	gas := shapeObs("abg-1", loinc, "2019-8", "2025-03-01T10:15:00Z", qty(40, "mm[Hg]"))
	volumes := slices.Concat(
		minuteSeries("ve", loinc, "76008-2", qty(7, "L/min")),
		minuteSeries("vco2", loinc, "60825-7", qty(200, "mL/min")),
	)
	et := minuteSeries("et", loinc, "19891-1", qty(35, "mm[Hg]"))
	cases := []struct {
		name      string
		rows      string
		resources []map[string]any
		code      derive.Code
		want      string   // the note must say this
		never     []string // and none of these
	}{
		{
			"the site's set tidal volume ranked 15",
			`{"system": "` + siteSystem + `", "code": "vt-set", "display": "Set tidal volume", "kind": "tidal-volume", "priority": 15, "note": "ventilator setting"}`,
			slices.Concat(et, volumes, minuteSeries("vts", siteSystem, "vt-set", qty(500, "mL"))),
			derive.CodeDeadSpaceVolume, "set", []string{"delivered"},
		},
		{
			"delivered tidal volume (MDC 151980) ranked 12 by the site",
			`{"system": "` + mdc + `", "code": "151980", "display": "Tidal volume delivered", "kind": "tidal-volume", "priority": 12, "note": "delivered volume"}`,
			slices.Concat(et, volumes, minuteSeries("vtd", mdc, "151980", qty(500, "mL"))),
			derive.CodeDeadSpaceVolume, "delivered", []string{"a set tidal volume"},
		},
		{
			"delivered 600 ranked 12 against expired 450 mL: the leak note",
			`{"system": "` + mdc + `", "code": "151980", "display": "Tidal volume delivered", "kind": "tidal-volume", "priority": 12, "note": "delivered volume"}`,
			slices.Concat(et, volumes, minuteSeries("vtd", mdc, "151980", qty(600, "mL")), minuteSeries("vte", loinc, "76007-4", qty(450, "mL"))),
			derive.CodeDeadSpaceVolume, "delivered", []string{"set one"},
		},
		{
			"a transport monitor's end-tidal pressure ranked 15",
			`{"system": "` + siteSystem + `", "code": "etco2-transport", "display": "End-tidal CO2, transport monitor", "kind": "etco2", "priority": 15, "note": "transport monitor"}`,
			slices.Concat(volumes, minuteSeries("vt", loinc, "76007-4", qty(500, "mL")), minuteSeries("ett", siteSystem, "etco2-transport", qty(35, "mm[Hg]"))),
			derive.CodeGradient, "lower-priority", []string{"percentage", "barometric"},
		},
	}
	for _, tc := range cases {
		t.Run(tc.name, func(t *testing.T) {
			t.Parallel()
			rep := replayShapesWith(t, decode.Options{Table: siteTable(t, tc.rows)}, slices.Concat([]map[string]any{gas}, tc.resources))
			d := onlyDerivation(t, rep)
			v, ok := derivedValue(d, tc.code)
			if !ok {
				t.Fatalf("no %s: %+v", tc.code, d.Omitted)
			}
			if !noteWith(v, tc.want) {
				t.Errorf("%s notes do not say %q: %q", tc.code, tc.want, v.Notes)
			}
			for _, w := range tc.never {
				if noteWith(v, w) {
					t.Errorf("%s notes misname the source (%q): %q", tc.code, w, v.Notes)
				}
			}
		})
	}
}
