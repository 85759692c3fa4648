package main

import (
	"bufio"
	"encoding/json"
	"os"
	"path/filepath"
	"strings"
	"testing"

	"github.com/deadspace-fhir/deadspace/fhir/fhirtest"
	"github.com/deadspace-fhir/deadspace/fhir/fhirtest/bulkfake"
)

func TestBackfillDryRunCommand(t *testing.T) {
	args := append([]string{"backfill", "--dry-run", "--state-dir", t.TempDir()}, demoFiles(t)...)
	_, errOut, code := runCmd(t, args...)
	if code != exitOK {
		t.Fatalf("exit %d; stderr:\n%s", code, errOut)
	}
	// The demo night as replay derives it: 111 Observations from 7 patients
	// (demo.summary.golden).
	for _, want := range []string{"derived: 7 patients evaluated; 111 new values", "dry run: nothing was written", `"msg":"backfill progress"`} {
		if !strings.Contains(errOut, want) {
			t.Errorf("stderr lacks %q:\n%s", want, errOut)
		}
	}
}

func TestBackfillUsageErrors(t *testing.T) {
	cases := []struct {
		name string
		args []string
		want []string
	}{
		{"nowhere to write", []string{"backfill", "x.ndjson"}, []string{"--fhir-base is required"}},
		{"no files and no server", []string{"backfill", "--dry-run"}, []string{"give NDJSON files"}},
		{"every problem at once", []string{"backfill", "--fhir-base", "ftp://x", "--since", "yesterday", "--window", "-1m"},
			[]string{"--fhir-base must be", "yesterday", "--window must be between 1m0s and 6h0m0s, got -1m0s"}},
		{"bad export level", []string{"backfill", "--dry-run", "--export-base", "https://fhir.example/r4", "--export", "ward"}, []string{"export level must be system, patient or group"}},
		{"export flags with files", []string{"backfill", "--dry-run", "--group", "icu-4", "x.ndjson"}, []string{"--group applies to an export"}},
		{"token file missing", []string{"backfill", "--fhir-base", "https://fhir.example/r4", "--fhir-token-file", "/nonexistent/token"},
			[]string{"--fhir-token-file"}},
	}
	for _, tc := range cases {
		t.Run(tc.name, func(t *testing.T) {
			_, errOut, code := runCmd(t, tc.args...)
			if code != exitUsage {
				t.Fatalf("exit %d, want %d; stderr:\n%s", code, exitUsage, errOut)
			}
			for _, w := range tc.want {
				if !strings.Contains(errOut, w) {
					t.Errorf("stderr lacks %q:\n%s", w, errOut)
				}
			}
		})
	}
}

// The command end to end: a Bulk Data export from the Go endpoint, written
// to the Medplum peer with a bearer token on the export.
func TestBackfillCommandFromExport(t *testing.T) {
	peer := fhirtest.Start(t)
	var resources []json.RawMessage
	for _, name := range demoFiles(t) {
		f, err := os.Open(name)
		if err != nil {
			t.Fatal(err)
		}
		sc := bufio.NewScanner(f)
		sc.Buffer(make([]byte, 1<<20), 1<<20)
		for sc.Scan() {
			resources = append(resources, append(json.RawMessage(nil), sc.Bytes()...))
		}
		f.Close()
	}
	exp := bulkfake.Start(t, bulkfake.Options{Resources: resources, Polls: 1})
	dir := t.TempDir()
	args := []string{"backfill", "--fhir-base", peer.BaseURL, "--export-base", exp.URL, "--export", "patient", "--state-dir", filepath.Join(dir, "state")}
	_, errOut, code := runCmd(t, args...)
	if code != exitOK {
		t.Fatalf("exit %d; stderr:\n%s", code, errOut)
	}
	// One transaction per result: 17 blood gases and 3 end-tidal findings,
	// 20 Provenance in demo.summary.golden.
	for _, want := range []string{"derived: 7 patients evaluated; 111 new values", "written: 20 transactions acknowledged, 0 refused", "use it as --since"} {
		if !strings.Contains(errOut, want) {
			t.Errorf("stderr lacks %q:\n%s", want, errOut)
		}
	}
	if p := exp.Requests()[0].Path; p != "/fhir/Patient/$export" {
		t.Errorf("kick-off at %s", p)
	}
	_, errOut, code = runCmd(t, args...)
	if code != exitOK || !strings.Contains(errOut, "written: 0 transactions acknowledged") {
		t.Errorf("second run: exit %d\n%s", code, errOut)
	}
}
