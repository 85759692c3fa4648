package encode_test

import (
	"bytes"
	"encoding/json"
	"flag"
	"os"
	"path/filepath"
	"testing"

	"github.com/samply/golang-fhir-models/fhir-models/fhir"

	"github.com/deadspace-fhir/deadspace/fhir/encode"
)

var update = flag.Bool("update", false, "rewrite testdata/*.golden from the current output")

// goldenCases builds every kind of output the encoder writes, from the same
// fixtures, so golden, validation and peer tests all look at one set.
func goldenCases(t *testing.T) map[string][]any {
	t.Helper()
	e := newEncoder(t)
	d, err := e.Derivation(subject, fullDerivation())
	if err != nil {
		t.Fatalf("Derivation: %v", err)
	}
	f, err := e.Fall(subject, fall())
	if err != nil {
		t.Fatalf("Fall: %v", err)
	}
	rev, err := e.Revision(d, []string{"Observation/" + *d.Observations[0].Id + "/_history/1"})
	if err != nil {
		t.Fatalf("Revision: %v", err)
	}
	stored := d.Observations[3]
	stored.Meta = &fhir.Meta{VersionId: ptr("2")}
	w, err := e.Withdrawal(stored, "the blood gas it was derived from was entered in error")
	if err != nil {
		t.Fatalf("Withdrawal: %v", err)
	}
	return map[string][]any{
		"derivation": d.Resources(),
		"fall":       f.Resources(),
		"device":     {e.Device()},
		"revision":   rev.Resources(),
		"withdrawal": w.Resources(),
	}
}

// TestGolden pins the exact bytes. The golden files are NDJSON pretty
// printed one resource after another, so a reviewer can read them; the
// NDJSON itself is json.Compact of the same bytes.
func TestGolden(t *testing.T) {
	for name, res := range goldenCases(t) {
		t.Run(name, func(t *testing.T) {
			var nd bytes.Buffer
			if err := encode.MarshalNDJSON(&nd, res...); err != nil {
				t.Fatal(err)
			}
			var got bytes.Buffer
			for _, line := range bytes.Split(bytes.TrimSuffix(nd.Bytes(), []byte("\n")), []byte("\n")) {
				if err := json.Indent(&got, line, "", "  "); err != nil {
					t.Fatal(err)
				}
				got.WriteByte('\n')
			}
			path := filepath.Join("testdata", name+".golden")
			if *update {
				if err := os.WriteFile(path, got.Bytes(), 0o644); err != nil {
					t.Fatal(err)
				}
			}
			want, err := os.ReadFile(path)
			if err != nil {
				t.Fatalf("%v (run go test -update to create it)", err)
			}
			if !bytes.Equal(got.Bytes(), want) {
				t.Errorf("output differs from %s; run go test -update and review the diff\n got:\n%s", path, got.Bytes())
			}
		})
	}
}
