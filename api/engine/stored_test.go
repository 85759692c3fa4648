package engine

import (
	"bytes"
	"reflect"
	"testing"

	"github.com/deadspace-fhir/deadspace/derive"
	"github.com/deadspace-fhir/deadspace/fhir/decode"
	"github.com/deadspace-fhir/deadspace/fhir/units"
)

func TestStoredRoundTrip(t *testing.T) {
	for _, tc := range []struct {
		name string
		it   decode.Item
	}{
		{"converted reading", decode.Item{
			Type: decode.ItemReading, Ref: "Observation/a/_history/1", Status: "final", Priority: -3,
			Reading:    derive.Reading{Ref: "Observation/a/_history/1", Encounter: "Encounter/e", AtMillis: 1773527400000, Value: 39.75, Kind: derive.KindEtCO2},
			Original:   decode.Original{Value: "5.30", Unit: "kPa", System: "http://unitsofmeasure.org", Code: "kPa"},
			Conversion: units.Conversion{FromValue: 5.3, FromUnit: "kPa", ToValue: 39.75, ToUnit: "mm[Hg]", Factor: 7.5, Source: "code", Text: "5.3 kPa × 7.50064 = 39.7534 mm[Hg]"},
		}},
		{"reading whose reference the store holds", decode.Item{
			Type: decode.ItemReading, ResourceType: "Observation", ID: "c", VersionID: "7", Ref: "Observation/c/_history/7", Status: "amended",
			Reading: derive.Reading{Ref: "Observation/c/_history/7", AtMillis: 1, Value: 40, Kind: derive.KindPaCO2},
		}},
		{"blood gas carrying the patient's temperature", decode.Item{
			Type: decode.ItemReading, ResourceType: "Observation", ID: "g", VersionID: "2", Ref: "Observation/g/_history/2", Status: "final", Priority: 20,
			Reading: derive.Reading{Ref: "Observation/g/_history/2", Encounter: "Encounter/e", AtMillis: 5, Value: 40, Kind: derive.KindPaCO2},
			Also:    []derive.Reading{{Ref: "Observation/g/_history/2", Encounter: "Encounter/e", AtMillis: 5, Value: 33, Kind: derive.KindBodyTemperature, Priority: 20}},
		}},
		{"set tidal volume whose row names its source", decode.Item{
			Type: decode.ItemReading, ResourceType: "Observation", ID: "s", VersionID: "1", Ref: "Observation/s/_history/1", Status: "final", Priority: 15,
			Reading: derive.Reading{Ref: "Observation/s/_history/1", AtMillis: 9, Value: 500, Kind: derive.KindTidalVolume, Source: derive.SourceSet},
		}},
		{"withdrawal", decode.Item{
			Type: decode.ItemOmitted, Ref: "Observation/b/_history/2",
			Reading:  derive.Reading{Ref: "Observation/b/_history/2"},
			Omission: derive.Omission{Ref: "Observation/b/_history/2", Reason: derive.ReasonEnteredInError, Detail: "status entered-in-error"},
		}},
	} {
		t.Run(tc.name, func(t *testing.T) {
			p, err := encodeStored(tc.it)
			if err != nil {
				t.Fatal(err)
			}
			got, err := decodeStored(p, "Observation/"+tc.it.ID, tc.it.VersionID)
			if err != nil {
				t.Fatal(err)
			}
			want := tc.it
			// What the store keeps beside the payload is not restored.
			want.ResourceType, want.ID, want.VersionID = "", "", ""
			if !reflect.DeepEqual(got.Item, want) {
				t.Fatalf("round trip:\n got %+v\nwant %+v", got.Item, tc.it)
			}
		})
	}
}

func FuzzDecodeStored(f *testing.F) {
	p, _ := encodeStored(decode.Item{Type: decode.ItemReading, Ref: "Observation/a/_history/1", Status: "final",
		Reading: derive.Reading{Ref: "Observation/a/_history/1", Value: 1, Kind: derive.KindPaCO2}})
	f.Add(p)
	f.Add([]byte{1, 1, 1})
	old, err := encodeStored(decode.Item{Type: decode.ItemReading, Ref: "Observation/a/_history/1", Status: "final", Priority: 10,
		Original: decode.Original{Value: "5", Unit: "%"},
		Reading:  derive.Reading{Ref: "Observation/a/_history/1", Value: 38, Kind: derive.KindEtCO2, Source: derive.SourceConvertedPercent},
		Also:     []derive.Reading{{Kind: derive.KindBodyTemperature, Priority: 20, Value: 36.5}}})
	if err != nil {
		f.Fatal(err)
	}
	f.Add(version3(f, old))
	f.Fuzz(func(t *testing.T, p []byte) {
		si, err := decodeStored(p, "Observation/a", "1")
		if err != nil {
			return
		}
		if p[0] != storedVersion {
			// An older payload is read as this build stores it: stored
			// again, it reads back with the same readings and sources.
			again, err := encodeStored(si.Item)
			if err != nil {
				return
			}
			back, err := decodeStored(again, "Observation/a", "1")
			if err != nil {
				t.Fatalf("an older payload stored again does not decode: %v", err)
			}
			if back.Item.Reading != si.Item.Reading || len(back.Item.Also) != len(si.Item.Also) {
				t.Fatalf("an older payload stored again reads otherwise: %+v then %+v", si.Item.Reading, back.Item.Reading)
			}
			return
		}
		again, err := encodeStored(si.Item)
		if err != nil {
			t.Fatal(err)
		}
		// Bytes, not values, are compared: a NaN is never equal to itself.
		if !bytes.Equal(again, p[:len(again)]) && len(again) == len(p) {
			t.Fatalf("re-encoding changed the payload: %x to %x", p, again)
		}
		back, err := decodeStored(again, "Observation/a", "1")
		if err != nil {
			t.Fatalf("a re-encoded payload does not decode: %v", err)
		}
		if twice, _ := encodeStored(back.Item); !bytes.Equal(twice, again) {
			t.Fatalf("encoding is not stable: %x then %x", again, twice)
		}
	})
}

// A payload stored before version 4 has no source kind: it is read with
// the source the decoder gives such a reading now, so it agrees with a
// copy stored after the upgrade and with replay: a CO2 value whose
// original unit is a percentage is a converted percentage, anything else
// takes the default for its kind and priority (derive.DefaultSource: a
// tidal volume below 20 set, a minute volume below 20 inspired, an
// end-tidal CO2 in mm[Hg] measured).
func TestStoredBeforeSourcesKeepsTheOldNames(t *testing.T) {
	for _, tc := range []struct {
		name     string
		kind     derive.Kind
		priority int
		unit     string
		want     derive.Source
		wantAlso derive.Source
	}{
		{"tidal volume ranked 15", derive.KindTidalVolume, 15, "mL", derive.SourceSet, derive.SourceSet},
		{"set tidal volume", derive.KindTidalVolume, 10, "mL", derive.SourceSet, derive.SourceSet},
		{"inspired minute volume", derive.KindMinuteVolume, 10, "L/min", derive.SourceInspired, derive.SourceInspired},
		{"end-tidal percentage", derive.KindEtCO2, 10, "%", derive.SourceConvertedPercent, derive.SourceMeasured},
		{"end-tidal pressure ranked 10", derive.KindEtCO2, 10, "mm[Hg]", derive.SourceMeasured, derive.SourceMeasured},
		{"expired tidal volume", derive.KindTidalVolume, 30, "mL", derive.SourceMeasured, derive.SourceMeasured},
	} {
		t.Run(tc.name, func(t *testing.T) {
			it := decode.Item{Type: decode.ItemReading, ResourceType: "Observation", ID: "v", VersionID: "1", Ref: "Observation/v/_history/1", Status: "final",
				Priority: tc.priority, Reading: derive.Reading{Ref: "Observation/v/_history/1", AtMillis: 3, Value: 30, Kind: tc.kind, Source: derive.SourceMeasured},
				Original: decode.Original{Value: "30", Unit: tc.unit},
				Also:     []derive.Reading{{Ref: "Observation/v/_history/1", AtMillis: 3, Value: 20, Kind: tc.kind, Priority: int16(tc.priority)}}}
			p, err := encodeStored(it)
			if err != nil {
				t.Fatal(err)
			}
			got, err := decodeStored(version3(t, p), "Observation/v", "1")
			if err != nil {
				t.Fatal(err)
			}
			if got.Item.Reading.Source != tc.want || len(got.Item.Also) != 1 || got.Item.Also[0].Source != tc.wantAlso {
				t.Errorf("sources %v and %+v, want %v and %v", got.Item.Reading.Source, got.Item.Also, tc.want, tc.wantAlso)
			}
			if got.Item.Status != "final" || got.Item.Reading.Value != 30 || got.Item.Also[0].Value != 20 {
				t.Errorf("the rest of the version 3 payload was misread: %+v", got.Item)
			}
		})
	}
}

// version3 rewrites a current payload with at most one other reading into
// the version 3 layout: no source byte after the encounter, 11 bytes an
// other reading.
func version3(tb testing.TB, p []byte) []byte {
	tb.Helper()
	l, err := parseHead(p)
	if err != nil {
		tb.Fatal(err)
	}
	old := append([]byte{3}, p[1:l.source]...)
	old = append(old, p[l.source+1:l.also]...)
	if l.nAlso > 0 {
		old = append(old, p[l.also:l.also+11]...)
	}
	return append(old, p[l.end:]...)
}
