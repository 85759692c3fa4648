package codes_test

import (
	"bytes"
	"os"
	"slices"
	"strings"
	"testing"

	"github.com/deadspace-fhir/deadspace/derive"
	"github.com/deadspace-fhir/deadspace/fhir/codes"
)

// The expected rows are codes seen in the Medizininformatik-Initiative ICU
// module profiles (github.com/medizininformatik-initiative/
// kerndatensatzmodul-intensivmedizin, input/fsh/profiles/Beatmungswerte/),
// the HL7 MCC and mHealth implementation guides, HL7 SANER, HL7 Denmark DK
// Core, the INDICATE data dictionary, an OMOP mapping and other secondary
// code lists. No LOINC code was checked on loinc.org; each case name says
// where its code was seen, and the rows' notes say the same.
func TestDefaultRows(t *testing.T) {
	cases := []struct {
		name, system, code string
		kind               derive.Kind
		action             codes.Action
		reason             derive.Reason
	}{
		{"PaCO2 (LOINC 2019-8, secondary sources; name in HL7 MCC IG)", codes.LOINC, "2019-8", derive.KindPaCO2, codes.ActionAccept, ""},
		{"PaCO2 temperature-adjusted (32771-8, secondary sources only)", codes.LOINC, "32771-8", derive.KindPaCO2Adjusted, codes.ActionAccept, ""},
		{"arterial blood gas panel (24336-0, HL7 MCC IG), PaCO2 from its components", codes.LOINC, "24336-0", derive.KindPaCO2, codes.ActionAccept, ""},
		{"body temperature (8310-5, FHIR R4 Body Temperature profile)", codes.LOINC, "8310-5", derive.KindBodyTemperature, codes.ActionAccept, ""},
		{"venous PCO2 rejected (2021-4, secondary sources only)", codes.LOINC, "2021-4", 0, codes.ActionReject, derive.ReasonNotArterial},
		{"capillary PCO2 rejected (2020-6, secondary sources only)", codes.LOINC, "2020-6", 0, codes.ActionReject, derive.ReasonNotArterial},
		{"unspecified blood PCO2 rejected (11557-6, unnamed published source)", codes.LOINC, "11557-6", 0, codes.ActionReject, derive.ReasonNotArterial},
		{"transcutaneous PCO2 rejected (33022-5, secondary sources only)", codes.LOINC, "33022-5", 0, codes.ActionReject, derive.ReasonNotArterial},
		{"cord PCO2 rejected (28644-3, secondary sources only)", codes.LOINC, "28644-3", 0, codes.ActionReject, derive.ReasonNotArterial},
		{"cord PCO2 rejected (28645-0, secondary sources only)", codes.LOINC, "28645-0", 0, codes.ActionReject, derive.ReasonNotArterial},
		{"PetCO2 pressure (19891-1, MII ICU module)", codes.LOINC, "19891-1", derive.KindEtCO2, codes.ActionAccept, ""},
		{"FetCO2 fraction (19889-5, OMOP mapping only)", codes.LOINC, "19889-5", derive.KindEtCO2, codes.ActionAccept, ""},
		{"MDC EtCO2 (151708, MII ICU module)", codes.MDC, "151708", derive.KindEtCO2, codes.ActionAccept, ""},
		{"VCO2 (60825-7, secondary sources only)", codes.LOINC, "60825-7", derive.KindVCO2, codes.ActionAccept, ""},
		{"VT setting (20112-9, MII ICU module)", codes.LOINC, "20112-9", derive.KindTidalVolume, codes.ActionAccept, ""},
		{"VT ventilator (76222-9, MII ICU module)", codes.LOINC, "76222-9", derive.KindTidalVolume, codes.ActionAccept, ""},
		{"VT expired (75958-9, secondary sources only)", codes.LOINC, "75958-9", derive.KindTidalVolume, codes.ActionAccept, ""},
		{"VT expired on ventilator (76007-4, secondary sources only)", codes.LOINC, "76007-4", derive.KindTidalVolume, codes.ActionAccept, ""},
		{"VT spont+mech (20118-6, MII ICU module)", codes.LOINC, "20118-6", derive.KindTidalVolume, codes.ActionAccept, ""},
		{"MDC VT (151868, secondary sources only)", codes.MDC, "151868", derive.KindTidalVolume, codes.ActionAccept, ""},
		{"MDC VT delivered (151980, MII ICU module)", codes.MDC, "151980", derive.KindTidalVolume, codes.ActionAccept, ""},
		{"MDC VT setting (16929196, MII ICU module)", codes.MDC, "16929196", derive.KindTidalVolume, codes.ActionAccept, ""},
		{"VE expired (76008-2, secondary sources only)", codes.LOINC, "76008-2", derive.KindMinuteVolume, codes.ActionAccept, ""},
		{"VE inspired (76009-0, MII ICU module)", codes.LOINC, "76009-0", derive.KindMinuteVolume, codes.ActionAccept, ""},
		{"MDC VE (151880, secondary sources only)", codes.MDC, "151880", derive.KindMinuteVolume, codes.ActionAccept, ""},
		{"MDC VE inspired (152004, MII ICU module)", codes.MDC, "152004", derive.KindMinuteVolume, codes.ActionAccept, ""},
		{"RR (9279-1, HL7 mHealth IG)", codes.LOINC, "9279-1", derive.KindRespRate, codes.ActionAccept, ""},
		{"RR mechanical (33438-3, MII ICU module)", codes.LOINC, "33438-3", derive.KindRespRate, codes.ActionAccept, ""},
		{"RR total (19840-8, MII ICU module)", codes.LOINC, "19840-8", derive.KindRespRate, codes.ActionAccept, ""},
		{"RR spontaneous (19839-0, MII ICU module)", codes.LOINC, "19839-0", derive.KindRespRate, codes.ActionAccept, ""},
		{"MDC RR (151562, HL7 DK Core)", codes.MDC, "151562", derive.KindRespRate, codes.ActionAccept, ""},
		{"MDC vent rate (151586, MII ICU module)", codes.MDC, "151586", derive.KindRespRate, codes.ActionAccept, ""},
		{"MDC total rate (152490, MII ICU module)", codes.MDC, "152490", derive.KindRespRate, codes.ActionAccept, ""},
		{"MDC spontaneous rate (152498, MII ICU module)", codes.MDC, "152498", derive.KindRespRate, codes.ActionAccept, ""},
		{"height (8302-2, MII ICU module)", codes.LOINC, "8302-2", derive.KindHeight, codes.ActionAccept, ""},
	}
	tab := codes.Default()
	for _, tc := range cases {
		t.Run(tc.name, func(t *testing.T) {
			r, ok := tab.Lookup(tc.system, tc.code)
			if !ok {
				t.Fatalf("no row for %s|%s", tc.system, tc.code)
			}
			if r.Kind != tc.kind || r.Action != tc.action || r.Reason != tc.reason {
				t.Errorf("row = kind %v action %v reason %q, want kind %v action %v reason %q",
					r.Kind, r.Action, r.Reason, tc.kind, tc.action, tc.reason)
			}
			if r.Note == "" || r.Display == "" {
				t.Errorf("row %s has no note or display", r.Token())
			}
		})
	}
	if got, want := len(tab.Rows()), len(cases); got != want {
		t.Errorf("default table has %d rows, the test lists %d", got, want)
	}
}

// No LOINC code for mixed-expired PCO2 was found in any of the sources above,
// so the default must not invent one.
func TestDefaultHasNoMixedExpiredRow(t *testing.T) {
	if got := codes.Default().SearchTokens(derive.KindMixedExpiredCO2); len(got) != 0 {
		t.Errorf("default rows for mixed-expired CO2: %v", got)
	}
}

// Measured values are preferred over settings and partial measurements
// (design choice; the set/measured distinction is in the LOINC and MDC code
// names themselves).
func TestPriorities(t *testing.T) {
	tab := codes.Default()
	prio := func(system, code string) int {
		r, ok := tab.Lookup(system, code)
		if !ok {
			t.Fatalf("no row %s|%s", system, code)
		}
		return r.Priority
	}
	cases := []struct {
		name          string
		better, worse [2]string
	}{
		{"measured expired VT over setting", [2]string{codes.LOINC, "76007-4"}, [2]string{codes.LOINC, "20112-9"}},
		{"ventilator VT over setting", [2]string{codes.LOINC, "76222-9"}, [2]string{codes.LOINC, "20112-9"}},
		{"MDC expiratory VT over MDC setting", [2]string{codes.MDC, "151868"}, [2]string{codes.MDC, "16929196"}},
		{"expired VE over inspired", [2]string{codes.LOINC, "76008-2"}, [2]string{codes.LOINC, "76009-0"}},
		{"total RR over spontaneous", [2]string{codes.LOINC, "19840-8"}, [2]string{codes.LOINC, "19839-0"}},
		{"general RR over spontaneous", [2]string{codes.LOINC, "9279-1"}, [2]string{codes.LOINC, "19839-0"}},
		{"PetCO2 pressure over fraction", [2]string{codes.LOINC, "19891-1"}, [2]string{codes.LOINC, "19889-5"}},
	}
	for _, tc := range cases {
		t.Run(tc.name, func(t *testing.T) {
			if b, w := prio(tc.better[0], tc.better[1]), prio(tc.worse[0], tc.worse[1]); b <= w {
				t.Errorf("priority %d (%s) not above %d (%s)", b, tc.better[1], w, tc.worse[1])
			}
		})
	}
}

func TestCodesAndSearchTokens(t *testing.T) {
	tab := codes.Default()
	all := tab.Codes()
	if !slices.IsSorted(all) {
		t.Errorf("Codes not sorted: %v", all)
	}
	for _, c := range []string{"2019-8", "2021-4", "151708", "8302-2"} {
		if !slices.Contains(all, c) {
			t.Errorf("Codes lacks %s", c)
		}
	}
	got := tab.SearchTokens(derive.KindPaCO2, derive.KindPaCO2Adjusted)
	// The panel's code is searched too: a server's search by code (and a
	// Subscription's criteria) matches Observation.code, not a component's.
	want := []string{"http://loinc.org|2019-8", "http://loinc.org|24336-0", "http://loinc.org|32771-8"}
	if !slices.Equal(got, want) {
		t.Errorf("SearchTokens(paco2) = %v, want %v", got, want)
	}
	for _, tok := range tab.SearchTokens() {
		if strings.HasSuffix(tok, "|2021-4") {
			t.Errorf("rejected code in search tokens: %s", tok)
		}
	}
}

func TestLoadMerge(t *testing.T) {
	site := `{"rows": [
  {"system": "http://loinc.org", "code": "9279-1", "action": "ignore"},
  {"system": "http://loinc.org", "code": "2019-8", "kind": "paco2", "priority": 5, "note": "site"},
  {"system": "urn:oid:1.2.3", "code": "PECO2", "kind": "mixed-expired-co2", "co2Basis": "wet"}
]}`
	tab, err := codes.Load(strings.NewReader(site))
	if err != nil {
		t.Fatal(err)
	}
	t.Run("site row overrides default", func(t *testing.T) {
		r, _ := tab.Lookup(codes.LOINC, "2019-8")
		if r.Priority != 5 || r.Note != "site" {
			t.Errorf("row = %+v", r)
		}
	})
	t.Run("ignore removes default", func(t *testing.T) {
		if _, ok := tab.Lookup(codes.LOINC, "9279-1"); ok {
			t.Error("ignored row still present")
		}
		if slices.Contains(tab.Codes(), "9279-1") {
			t.Error("ignored code still in Codes")
		}
	})
	t.Run("site adds mixed-expired row", func(t *testing.T) {
		r, ok := tab.Lookup("urn:oid:1.2.3", "PECO2")
		if !ok || r.Kind != derive.KindMixedExpiredCO2 || r.CO2Basis != "wet" {
			t.Errorf("row = %+v, %v", r, ok)
		}
	})
	t.Run("default untouched", func(t *testing.T) {
		if _, ok := codes.Default().Lookup(codes.LOINC, "9279-1"); !ok {
			t.Error("Load changed the default table")
		}
	})
}

func TestLoadErrors(t *testing.T) {
	cases := []struct {
		name  string
		in    string
		wants []string // substrings the error must contain, all of them
	}{
		{"unknown row member names its line", "{\"rows\": [\n{\"system\": \"s\", \"code\": \"c\", \"kind\": \"paco2\",\n \"kindd\": \"x\"}\n]}",
			[]string{`line 3: unknown member "kindd"`}},
		{"unknown top-level member", "{\"rows\": [],\n\"extra\": 1}", []string{`line 2: unknown member "extra"`}},
		{"every bad row reported", "{\"rows\": [\n{\"system\": \"s\", \"code\": \"a\", \"kind\": \"nope\"},\n{\"system\": \"s\", \"code\": \"b\", \"action\": \"reject\"},\n{\"code\": \"c\", \"kind\": \"paco2\"}\n]}",
			[]string{`row 1 (line 2, s|a): unknown "kind" "nope"`, `row 2 (line 3, s|b): a rejected row needs a "reason"`, `row 3 (line 4, |c): "system" is required`}},
		{"type error names member and line", "{\"rows\": [\n{\"system\": \"s\", \"code\": \"c\", \"kind\": \"paco2\",\n\"priority\": \"high\"}]}",
			[]string{`line 3: member "priority"`}},
		{"duplicate row", "{\"rows\": [\n{\"system\": \"s\", \"code\": \"c\", \"kind\": \"paco2\"},\n{\"system\": \"s\", \"code\": \"c\", \"kind\": \"etco2\"}]}",
			[]string{"duplicate of the row on line 2"}},
		{"accept without kind", `{"rows": [{"system": "s", "code": "c"}]}`, []string{`needs a "kind"`}},
		{"reason on accepted row", `{"rows": [{"system": "s", "code": "c", "kind": "paco2", "reason": "specimen-not-arterial"}]}`, []string{`"reason" is for rejected rows only`}},
		{"broader on accepted row", `{"rows": [{"system": "s", "code": "c", "kind": "paco2", "broader": true}]}`, []string{`"broader" is for rejected rows only`}},
		{"unknown reason", `{"rows": [{"system": "s", "code": "c", "action": "reject", "reason": "bad-vibes"}]}`, []string{`unknown "reason"`}},
		{"co2Basis on tidal volume", `{"rows": [{"system": "s", "code": "c", "kind": "tidal-volume", "co2Basis": "wet"}]}`, []string{`"co2Basis" applies only`}},
		{"a panel of tidal volumes", `{"rows": [{"system": "s", "code": "c", "kind": "tidal-volume", "panel": true}]}`, []string{`"panel" applies only`}},
		{"a rejected panel", `{"rows": [{"system": "s", "code": "c", "action": "reject", "reason": "specimen-not-arterial", "panel": true}]}`, []string{`"panel" applies only`}},
		{"bad co2Basis", `{"rows": [{"system": "s", "code": "c", "kind": "etco2", "co2Basis": "damp"}]}`, []string{`must be wet or dry`}},
		{"negative priority", `{"rows": [{"system": "s", "code": "c", "kind": "etco2", "priority": -1}]}`, []string{`must not be negative`}},
		{"bad action", `{"rows": [{"system": "s", "code": "c", "action": "maybe"}]}`, []string{`"action" must be`}},
		{"syntax error", "{\"rows\": [\n{\"system\": }]}", []string{"line 2"}},
		{"rows not an array", `{"rows": {}}`, []string{"must be an array"}},
		{"no rows", `{}`, []string{`no "rows"`}},
		{"trailing data", `{"rows": []} {}`, []string{"data after the table"}},
		{"row not an object", `{"rows": [1]}`, []string{"row 1"}},
	}
	for _, tc := range cases {
		t.Run(tc.name, func(t *testing.T) {
			_, err := codes.Load(strings.NewReader(tc.in))
			if err == nil {
				t.Fatal("no error")
			}
			for _, w := range tc.wants {
				if !strings.Contains(err.Error(), w) {
					t.Errorf("error %q lacks %q", err, w)
				}
			}
		})
	}
}

func FuzzLoad(f *testing.F) {
	def, err := os.ReadFile("default.json")
	if err != nil {
		f.Fatal(err)
	}
	f.Add(def)
	f.Add([]byte(`{"rows": [{"system": "s", "code": "c", "action": "ignore"}]}`))
	f.Add([]byte(`{"rows": [{"system": "s", "code": "c", "kind": "etco2", "co2Basis": "dry", "priority": 3}]}`))
	f.Add([]byte(`{"rows": [1, {"x": 2}]}`))
	f.Fuzz(func(t *testing.T, data []byte) {
		site, err := codes.Parse(bytes.NewReader(data))
		if err != nil {
			return
		}
		merged := codes.Default().Merge(site)
		for _, r := range site.Rows() {
			got, ok := merged.Lookup(r.System, r.Code)
			// A site row that names no source takes the default row's for
			// the same code and kind.
			if def, dok := codes.Default().Lookup(r.System, r.Code); dok && r.Source == derive.SourceUnspecified && def.Kind == r.Kind {
				r.Source = def.Source
			}
			switch {
			case r.Action == codes.ActionIgnore && ok:
				t.Fatalf("ignored row %s present after merge", r.Token())
			case r.Action != codes.ActionIgnore && (!ok || got != r):
				t.Fatalf("site row %s not in merged table: %+v", r.Token(), got)
			case r.Action == codes.ActionAccept && r.Kind == derive.KindUnknown:
				t.Fatalf("accepted row %s without kind", r.Token())
			case r.Action == codes.ActionReject && r.Reason == "":
				t.Fatalf("rejected row %s without reason", r.Token())
			}
		}
		for _, c := range merged.Codes() {
			if c == "" {
				t.Fatal("empty code listed")
			}
		}
	})
}
