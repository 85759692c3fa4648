package encode_test

import (
	"testing"

	"github.com/deadspace-fhir/deadspace/fhir/encode"
)

// A write's keys are the identifiers Plan writes, series by series, and a
// write is current for a series only while the ledger records its key,
// withdrawn or not alike.
func TestWriteKeysAndCurrent(t *testing.T) {
	enc := newEncoder(t)
	d := fullDerivation()
	b, err := enc.Derivation("Patient/p1", d)
	if err != nil {
		t.Fatal(err)
	}
	var all []string
	for _, o := range b.Observations {
		all = append(all, series(o))
	}
	cfg := encode.TxConfig{DeviceRef: "Device/server-device", ProvenanceTagSystem: "https://example.org/tag"}
	w := encode.Write{Kind: encode.WriteCreate, Subject: "Patient/p1", Derivation: &d, Series: all}
	keys, err := w.Keys()
	if err != nil {
		t.Fatal(err)
	}
	p, err := enc.Plan(w, nil, cfg)
	if err != nil {
		t.Fatal(err)
	}
	if len(keys) != p.Len() {
		t.Fatalf("%d keys for %d values", len(keys), p.Len())
	}
	for i := range p.Len() {
		if keys[p.Series(i)] != p.Key(i) {
			t.Errorf("series %s: key %s, Plan writes %s", p.Series(i), keys[p.Series(i)], p.Key(i))
		}
	}
	s, k := all[0], keys[all[0]]
	revise := encode.Write{Kind: encode.WriteRevise, Subject: "Patient/p1", Derivation: &d, Series: all[:1]}
	withdraw := encode.Write{Kind: encode.WriteWithdraw, Subject: "Patient/p1", Derivation: &d, Series: all[:1]}
	for _, tc := range []struct {
		name        string
		w           encode.Write
		key, status string
		wantCurrent bool
	}{
		{"revision of the recorded value", revise, k, "amended", true},
		{"revision, the ledger moved on", revise, "sha256:later", "amended", false},
		{"revision, the value since withdrawn", revise, k, "entered-in-error", false},
		{"withdrawal of the recorded value", withdraw, k, "entered-in-error", true},
		{"withdrawal, the value since derived again", withdraw, k, "amended", false},
	} {
		t.Run(tc.name, func(t *testing.T) {
			if got := tc.w.Current(keys, s, tc.key, tc.status); got != tc.wantCurrent {
				t.Errorf("Current = %v, want %v", got, tc.wantCurrent)
			}
		})
	}
	if _, err := (encode.Write{Kind: encode.WriteRevise, Subject: "Patient/p1", Derivation: &d, Series: []string{"sha256:none"}}).Keys(); err == nil {
		t.Error("Keys of a series the write has no value of: no error")
	}
}
