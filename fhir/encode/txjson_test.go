package encode

import (
	"bytes"
	"encoding/json"
	"testing"
	"time"

	"github.com/deadspace-fhir/deadspace/derive"
)

// oldTransaction is the encoding/json construction appendTransaction
// replaces.
func oldTransaction(entries []txEntry) []byte {
	tx, err := json.Marshal(struct {
		ResourceType string    `json:"resourceType"`
		Type         string    `json:"type"`
		Entry        []txEntry `json:"entry"`
	}{"Bundle", "transaction", entries})
	if err != nil {
		panic(err)
	}
	return tx
}

// TestAppendStringAsJSONMarshal: strings are written as encoding/json
// writes them, HTML characters, control characters, invalid UTF-8 and
// U+2028 included.
func TestAppendStringAsJSONMarshal(t *testing.T) {
	for _, tc := range []struct{ name, s string }{
		{"empty", ""},
		{"plain", "Observation"},
		{"query", "identifier=https%3A%2F%2Fexample.org%7Cabc"},
		{"weak etag", `W/"3"`},
		{"html", "<a href='x'>&amp;</a>"},
		{"controls", "line\nbreak\ttab\x00nul\x7fdel"},
		{"backslash", `a\b`},
		{"unicode", "PĒCO2 × 0.863 / VE"},
		{"line separator", "a\u2028b\u2029c"},
		{"invalid utf-8", "a\xffb\xc3"},
	} {
		t.Run(tc.name, func(t *testing.T) {
			want, _ := json.Marshal(tc.s)
			if got := appendString([]byte("x"), tc.s); !bytes.Equal(got, append([]byte("x"), want...)) {
				t.Errorf("appendString(%q) = %s, want x%s", tc.s, got, want)
			}
		})
	}
}

// FuzzAppendStringAgainstJSON holds appendString to encoding/json.
func FuzzAppendStringAgainstJSON(f *testing.F) {
	for _, s := range []string{"", "Observation", `W/"1"`, "<&>", "\u2028", "\xff", "é"} {
		f.Add(s)
	}
	f.Fuzz(func(t *testing.T, s string) {
		want, _ := json.Marshal(s)
		if got := appendString(nil, s); !bytes.Equal(got, want) {
			t.Fatalf("appendString(%q) = %s, want %s", s, got, want)
		}
	})
}

// TestTransactionBytesAsJSONMarshal: the writes the writer sends (creates,
// revisions, withdrawals, of derivations and falls; whole and split into
// transactions; the Provenance on its own) are byte for byte what
// encoding/json made of them before, including text that encoding/json
// escapes (a note with HTML characters and a line separator).
func TestTransactionBytesAsJSONMarshal(t *testing.T) {
	o := DefaultOptions()
	o.SoftwareVersion = "1.0.0"
	o.Issued = time.Date(2025, 3, 1, 10, 15, 7, 0, time.UTC)
	enc, err := New(o)
	if err != nil {
		t.Fatal(err)
	}
	at := time.Date(2025, 3, 1, 10, 15, 0, 0, time.UTC)
	rd := func(ref string, v float64, k derive.Kind) derive.Reading {
		return derive.Reading{Ref: ref, Encounter: "Encounter/icu-1", AtMillis: at.UnixMilli(), Value: v, Kind: k}
	}
	d := derive.Derivation{
		Gas:     rd("Observation/abg-1/_history/2", 40, derive.KindPaCO2),
		Patient: derive.Patient{Ref: "Patient/p1/_history/3", Sex: derive.SexMale, BirthDate: time.Date(1965, 1, 1, 0, 0, 0, 0, time.UTC)},
		Used: []derive.Summary{
			{Kind: derive.KindEtCO2, Median: 30, Rule: "median <of> readings & more", Readings: []derive.Reading{rd("Observation/et-1/_history/1", 30, derive.KindEtCO2)}},
		},
		Values: []derive.Value{
			{Code: derive.CodeGradient, Value: 10, Unit: "mm[Hg]", Inputs: []derive.Kind{derive.KindPaCO2, derive.KindEtCO2},
				Equation: "PaCO2 - PetCO2 <&>", Notes: []string{"a note with <html> & a\u2028line separator"}},
			{Code: derive.CodeAlveolarFraction, Value: 0.25, Unit: "1", Inputs: []derive.Kind{derive.KindPaCO2, derive.KindEtCO2},
				Equation: "(PaCO2 - PetCO2) / PaCO2"},
		},
	}
	onset := at.Add(time.Hour)
	var base, ep []derive.Reading
	for i := range 3 {
		base = append(base, derive.Reading{Ref: "Observation/b" + string(rune('1'+i)) + "/_history/1", AtMillis: onset.Add(time.Duration(i-10) * time.Minute).UnixMilli(), Value: 38, Kind: derive.KindEtCO2})
		ep = append(ep, derive.Reading{Ref: "Observation/e" + string(rune('1'+i)) + "/_history/1", AtMillis: onset.Add(time.Duration(i) * time.Minute).UnixMilli(), Value: 24, Kind: derive.KindEtCO2})
	}
	fall := derive.Fall{Onset: onset, Confirmed: onset.Add(2 * time.Minute), Baseline: 38, Level: 24, Change: -14,
		BaselineReadings: base, EpisodeReadings: ep, Notes: []string{"rule out a disconnection"}}

	cfg := TxConfig{DeviceRef: "Device/server-device", ProvenanceTagSystem: "https://example.org/tag?a=1&b=<2>"}
	for _, src := range []struct {
		name string
		w    Write
	}{
		{"derivation", Write{Subject: "Patient/p1", Derivation: &d}},
		{"fall", Write{Subject: "Patient/p1", Fall: &fall}},
	} {
		b, err := enc.resultBundle(src.w)
		if err != nil {
			t.Fatal(err)
		}
		var all []string
		server := map[string]ServerRef{}
		for i, ob := range b.Observations {
			s := enc.identifier(ob, enc.o.SeriesSystem)
			all = append(all, s)
			server[s] = ServerRef{ID: "srv" + string(rune('0'+i)), Version: "7"}
		}
		for _, kind := range []string{WriteCreate, WriteRevise, WriteWithdraw} {
			t.Run(src.name+"/"+kind, func(t *testing.T) {
				w := src.w
				w.Kind, w.Series, w.Why = kind, all, "an input was <withdrawn> & replaced"
				if kind == WriteWithdraw {
					w.Series = all[:1]
				}
				p, err := enc.Plan(w, server, cfg)
				if err != nil {
					t.Fatal(err)
				}
				// The resources are what json.Marshal made of the
				// samply values before.
				// (json.Marshal compacted and escaped MarshalJSON's output;
				// doing so again must change nothing.)
				for i, en := range p.entries {
					if want := mustMarshal(t, en.Resource); !bytes.Equal(en.Resource, want) {
						t.Errorf("entry %d: resource is not compact, escaped JSON:\n%s\n%s", i, en.Resource, want)
					}
				}
				got, err := p.Transaction(0, p.Len(), true)
				if err != nil {
					t.Fatal(err)
				}
				entries := append([]txEntry(nil), p.entries...)
				targets := map[string]string{}
				for i, en := range p.entries {
					if en.FullURL != "" {
						targets[p.series[i]] = en.FullURL
					} else {
						targets[p.series[i]] = en.Request.URL
					}
				}
				prov, err := p.provenance(targets)
				if err != nil {
					t.Fatal(err)
				}
				if want := mustMarshal(t, prov); !bytes.Equal(prov, want) {
					t.Errorf("the Provenance is not compact, escaped JSON:\n%s\n%s", prov, want)
				}
				entries = append(entries, txEntry{FullURL: urn("Provenance/" + p.tag), Resource: prov,
					Request: txRequest{Method: "POST", URL: "Provenance", IfNoneExist: p.provenanceQuery().Encode()}})
				if want := oldTransaction(entries); !bytes.Equal(got, want) {
					t.Errorf("transaction differs from encoding/json's:\ngot  %s\nwant %s", got, want)
				}
				for from := 0; from < p.Len(); from += 2 {
					to := min(from+2, p.Len())
					got, err := p.Transaction(from, to, false)
					if err != nil {
						t.Fatal(err)
					}
					if want := oldTransaction(p.entries[from:to]); !bytes.Equal(got, want) {
						t.Errorf("transaction [%d, %d) differs from encoding/json's:\ngot  %s\nwant %s", from, to, got, want)
					}
				}
			})
		}
	}
}

// mustMarshal is json.Marshal of raw JSON: compacted and HTML-escaped.
func mustMarshal(t *testing.T, raw json.RawMessage) []byte {
	t.Helper()
	b, err := json.Marshal(raw)
	if err != nil {
		t.Fatal(err)
	}
	return b
}

// SetViaEncodingJSON switches the writer's encoding to encoding/json's
// construction, for the baseline of BenchmarkWriteEncode; it returns a
// function that switches back.
func SetViaEncodingJSON(on bool) (restore func()) {
	viaEncodingJSON = on
	return func() { viaEncodingJSON = false }
}
