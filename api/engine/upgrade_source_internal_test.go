package engine

import (
	"fmt"
	"strings"
	"testing"
	"time"

	"github.com/deadspace-fhir/deadspace/derive"
	"github.com/deadspace-fhir/deadspace/fhir/decode"
)

// asVersion3 rewrites a version 4 payload into the layout the previous
// build stored: no source byte after the encounter, 11 bytes an other
// reading.
func asVersion3(t *testing.T, p []byte) []byte {
	t.Helper()
	l, err := parseHead(p)
	if err != nil {
		t.Fatal(err)
	}
	old := append([]byte{3}, p[1:l.source]...)
	old = append(old, p[l.source+1:l.also]...)
	for i := range l.nAlso {
		off := l.also + 12*i
		old = append(old, p[off:off+11]...)
	}
	return append(old, p[l.end:]...)
}

// endTidalInMMHg is an end-tidal CO2 charted under LOINC 19889-5 (a row of
// the default table at priority 10 that accepts a pressure as well as a
// percentage) in mm[Hg]: nothing was converted. Invented values.
func endTidalInMMHg(id string, at time.Time, v float64) []byte {
	return fmt.Appendf(nil, `{"resourceType":"Observation","id":%q,"meta":{"versionId":"1","lastUpdated":"2026-03-14T22:00:00Z"},"status":"final",`+
		`"code":{"coding":[{"system":"http://loinc.org","code":"19889-5"}]},"subject":{"reference":"Patient/p"},`+
		`"effectiveDateTime":%q,"valueQuantity":{"value":%v,"unit":"mmHg","system":"http://unitsofmeasure.org","code":"mm[Hg]"}}`,
		id, at.Format(time.RFC3339), v)
}

// An input the previous build stored (payload version 3) and the same kind
// of input this build stores (version 4) are one rule's input: the source a
// reading is named by must not depend on which build stored it. Here both
// are end-tidal CO2 in mm[Hg] under the default table's 19889-5 row: the
// decoder leaves the source unspecified (derive.DefaultSource: measured),
// while legacySource names the version 3 one a converted percentage from its
// priority alone, although its stored unit says nothing was converted. A
// window holding one of each (a patient whose readings straddle the upgrade)
// then discloses "sources of this priority that differ in kind", and the
// live service's note differs from replay's over the same export.
// Expected: the version 3 and version 4 payloads of one input decode to one
// source, and the substitute note of a mixed window is replay's.
func TestStoredBeforeAndAfterUpgradeNameOneSource(t *testing.T) {
	dec := decode.New(decode.Options{})
	at := time.Date(2026, 3, 14, 21, 0, 0, 0, time.UTC)
	stored := func(id string, at time.Time, v float64, version3 bool) derive.Reading {
		t.Helper()
		it, err := dec.Decode(endTidalInMMHg(id, at, v))
		if err != nil || it.Type != decode.ItemReading {
			t.Fatalf("decode %s: %v %+v", id, err, it)
		}
		p, err := encodeStored(it)
		if err != nil {
			t.Fatal(err)
		}
		if version3 {
			p = asVersion3(t, p)
		}
		si, err := decodeStored(p, "Observation/"+id, "1")
		if err != nil {
			t.Fatal(err)
		}
		r := si.Item.Reading
		r.Priority = int16(si.Item.Priority)
		return r
	}
	before := stored("et-before", at.Add(-2*time.Minute), 36, true)
	after := stored("et-after", at.Add(time.Minute), 37, false)
	if before.SourceKind() != after.SourceKind() {
		t.Errorf("one input's source depends on the build that stored it: version 3 %q, version 4 %q", before.SourceKind(), after.SourceKind())
	}

	gas := derive.Reading{Ref: "Observation/gas/_history/1", AtMillis: at.UnixMilli(), Value: 42, Kind: derive.KindPaCO2}
	substitute := func(readings ...derive.Reading) string {
		d := derive.Derive(derive.DefaultConfig(), gas, derive.Patient{}, readings)
		for _, s := range d.Used {
			if s.Kind == derive.KindEtCO2 {
				return s.Substitute
			}
		}
		t.Fatalf("no end-tidal summary: %+v", d)
		return ""
	}
	live := substitute(before, after)
	replayed := substitute(stored("et-before", at.Add(-2*time.Minute), 36, false), after)
	if strings.Contains(live, "differ in kind") || live != replayed {
		t.Errorf("a window straddling the upgrade:\n live   %q\n replay %q", live, replayed)
	}
}
