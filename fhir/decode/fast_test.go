package decode

import (
	"encoding/json"
	"reflect"
	"testing"
)

// Lines the fast fill must leave to encoding/json, each for a reason
// fast.go names, with a PaCO2 around them so the full decode reads them.
var fallbackLines = []struct{ name, line string }{
	{"name differing only in case", `{"resourceType":"Observation","ID":"a","status":"final"}`},
	{"nested name differing only in case", `{"resourceType":"Observation","id":"a","valueQuantity":{"Value":40}}`},
	{"name outside ASCII that folds to a field (Kelvin sign)", `{"resourceType":"Observation","id":"a","code":{"coding":[{"system":"http://loinc.org","code":"2019-8"}]},"valueQuantity":{"value":40,"unit":"mm[Hg]"},"meta":{"versionId":"1","lastUpdated":"x"},"subject":{"reference":"Patient/p"},"status":"final","effectiveDateTime":"2025-03-01T10:15:00Z","\u212aind":1,"ſtatus":"preliminary"}`},
	{"duplicate member", `{"resourceType":"Observation","id":"a","status":"final","status":"amended"}`},
	{"duplicate nested object merged by encoding/json", `{"resourceType":"Observation","id":"a","meta":{"versionId":"1"},"meta":{"lastUpdated":"2025-03-01T10:15:00Z"}}`},
	{"null string", `{"resourceType":"Observation","id":null}`},
	{"null object", `{"resourceType":"Observation","id":"a","subject":null}`},
	{"null raw value", `{"resourceType":"Observation","id":"a","valueString":null}`},
	{"number for a string", `{"resourceType":"Observation","id":5}`},
	{"object for an array", `{"resourceType":"Observation","id":"a","code":{"coding":{"system":"http://loinc.org","code":"2019-8"}}}`},
	{"string for an object", `{"resourceType":"Observation","id":"a","valueQuantity":"40 mm[Hg]"}`},
	{"null coding", `{"resourceType":"Observation","id":"a","code":{"coding":[null]}}`},
	{"not JSON", `{"resourceType":"Observation","id":"a"`},
	{"data after the object", `{"resourceType":"Observation"} {}`},
}

func TestFastFillFallsBack(t *testing.T) {
	for _, tc := range fallbackLines {
		t.Run(tc.name, func(t *testing.T) {
			var o observationJSON
			if fillObservation([]byte(tc.line), &o) {
				t.Errorf("fast fill accepted %s", tc.line)
			}
		})
	}
}

// The fast fill must handle the lines the service mostly sees, or it saves
// nothing: every benchmark line and the usable fixtures.
func TestFastFillTakesPlainLines(t *testing.T) {
	lines := benchLines(100, false)
	for _, fx := range fixtures(t) {
		if fx.typ == ItemReading {
			lines = append(lines, fx.line)
		}
	}
	for _, l := range lines {
		var fast, slow observationJSON
		if !fillObservation(l, &fast) {
			t.Errorf("fast fill fell back on %s", l)
			continue
		}
		if err := json.Unmarshal(l, &slow); err != nil || !reflect.DeepEqual(fast, slow) {
			t.Errorf("fast fill %+v\nencoding/json %+v, %v\nfor %s", fast, slow, err, l)
		}
	}
}

// FuzzObservationFastAgainstJSON checks that whenever the fast fill takes a
// line it fills exactly what encoding/json fills, without an error, and
// that the decoder's Item is the same with the fast fill and without it.
func FuzzObservationFastAgainstJSON(f *testing.F) {
	for _, fx := range fixtures(f) {
		f.Add(fx.line)
	}
	for _, l := range benchLines(12, false) {
		f.Add(l)
	}
	for _, tc := range fallbackLines {
		f.Add([]byte(tc.line))
	}
	for _, s := range []string{`{"component":[]}`, `{"code":{"coding":[]}}`, `{"valueRange" : { "low" : {} } , "effectiveTiming":[ 1 ]}`,
		`{"id":"\u0061\ud800"}`, "{\"status\":\"fin\xffal\"}", `{"valueQuantity":{"value":"40"}}`} {
		f.Add([]byte(s))
	}
	f.Fuzz(func(t *testing.T, line []byte) {
		var fast, slow observationJSON
		ok := fillObservation(line, &fast)
		err := json.Unmarshal(line, &slow)
		if ok && (err != nil || !reflect.DeepEqual(fast, slow)) {
			t.Fatalf("fast fill took the line but differs:\nfast %+v\njson %+v, %v", fast, slow, err)
		}
		d := New(Options{})
		d.noPrefilter = true
		withFast, fastErr := d.Decode(line)
		d.noFastFill = true
		withJSON, jsonErr := d.Decode(line)
		if (fastErr == nil) != (jsonErr == nil) || !sameItem(withFast, withJSON) {
			t.Fatalf("decode with the fast fill and without it differ:\n%+v, %v\n%+v, %v", withFast, fastErr, withJSON, jsonErr)
		}
	})
}
