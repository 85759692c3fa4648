package main

import (
	"bufio"
	"bytes"
	"context"
	"encoding/json"
	"flag"
	"os"
	"path/filepath"
	"strconv"
	"strings"
	"testing"

	"github.com/deadspace-fhir/deadspace/fhir/fhirvalidate"
)

var update = flag.Bool("update", false, "rewrite the golden files in testdata/replay")

// demoIssued fixes issued and recorded so replay output is byte-stable.
const demoIssued = "2026-03-15T07:00:00Z"

func demoFiles(t *testing.T) []string {
	t.Helper()
	files, err := filepath.Glob(filepath.Join("testdata", "demo", "*.ndjson"))
	if err != nil || len(files) == 0 {
		t.Fatalf("demo files: %v (found %d)", err, len(files))
	}
	return files
}

func runCmd(t *testing.T, args ...string) (stdout, stderr string, code int) {
	t.Helper()
	var out, errOut bytes.Buffer
	code = run(context.Background(), args, &out, &errOut)
	return out.String(), errOut.String(), code
}

func golden(t *testing.T, name, got string) {
	t.Helper()
	path := filepath.Join("testdata", "replay", name)
	if *update {
		if err := os.MkdirAll(filepath.Dir(path), 0o755); err != nil {
			t.Fatal(err)
		}
		if err := os.WriteFile(path, []byte(got), 0o644); err != nil {
			t.Fatal(err)
		}
		return
	}
	want, err := os.ReadFile(path)
	if err != nil {
		t.Fatalf("%v (run go test -run %s -update to create it)", err, t.Name())
	}
	if got != string(want) {
		t.Errorf("%s differs from the golden file; run with -update after checking the change.\n%s", name, firstDiff(string(want), got))
	}
}

func firstDiff(want, got string) string {
	w, g := strings.Split(want, "\n"), strings.Split(got, "\n")
	for i := 0; i < len(w) || i < len(g); i++ {
		var wl, gl string
		if i < len(w) {
			wl = w[i]
		}
		if i < len(g) {
			gl = g[i]
		}
		if wl != gl {
			return "line " + strconv.Itoa(i+1) + ":\n want: " + clip(wl) + "\n  got: " + clip(gl)
		}
	}
	return ""
}

func clip(s string) string {
	if len(s) > 400 {
		return s[:400] + "…"
	}
	return s
}

func TestReplayDemoGolden(t *testing.T) {
	files := demoFiles(t)
	cases := []struct {
		name, format, golden string
	}{
		{"ndjson", "ndjson", "demo.ndjson.golden"},
		{"table", "table", "demo.table.golden"},
	}
	for _, tc := range cases {
		t.Run(tc.name, func(t *testing.T) {
			args := append([]string{"replay", "--format", tc.format, "--issued", demoIssued}, files...)
			out, errOut, code := runCmd(t, args...)
			if code != exitOK {
				t.Fatalf("exit %d, stderr:\n%s", code, errOut)
			}
			golden(t, tc.golden, out)
			golden(t, "demo.summary.golden", errOut)
		})
	}
}

// TestReplayOutputValidates checks every resource replay writes for the demo
// against the FHIR R4 specification, using the validating unmarshaller of
// github.com/google/fhir/go (an independent implementation), and checks that
// every reference inside the output resolves to a resource in the output or
// in the input.
func TestReplayOutputValidates(t *testing.T) {
	files := demoFiles(t)
	out, errOut, code := runCmd(t, append([]string{"replay", "--issued", demoIssued}, files...)...)
	if code != exitOK {
		t.Fatalf("exit %d, stderr:\n%s", code, errOut)
	}
	known := make(map[string]bool)
	for _, f := range files {
		for _, line := range lines(t, f) {
			var r struct {
				ResourceType, ID string
				Meta             struct{ VersionID string }
			}
			if err := json.Unmarshal(line, &r); err != nil {
				t.Fatal(err)
			}
			known[r.ResourceType+"/"+r.ID] = true
			known[r.ResourceType+"/"+r.ID+"/_history/"+r.Meta.VersionID] = true
		}
	}
	outLines := bytes.Split(bytes.TrimSpace([]byte(out)), []byte("\n"))
	counts := make(map[string]int)
	var refs []string
	for i, line := range outLines {
		if err := fhirvalidate.Resource(line); err != nil {
			t.Errorf("output line %d does not validate: %v\n%s", i+1, err, clip(string(line)))
		}
		var r map[string]any
		if err := json.Unmarshal(line, &r); err != nil {
			t.Fatal(err)
		}
		rt, _ := r["resourceType"].(string)
		id, _ := r["id"].(string)
		counts[rt]++
		known[rt+"/"+id] = true
		collectRefs(r, &refs)
	}
	for _, ref := range refs {
		if !known[ref] {
			t.Errorf("reference %q resolves to nothing in the input or the output", ref)
		}
	}
	if counts["Device"] != 1 || counts["Provenance"] == 0 || counts["Observation"] == 0 {
		t.Errorf("resource counts %v: want one Device and some Observations and Provenance", counts)
	}
}

func collectRefs(v any, refs *[]string) {
	switch x := v.(type) {
	case map[string]any:
		for k, e := range x {
			if s, ok := e.(string); ok && k == "reference" {
				*refs = append(*refs, s)
				continue
			}
			collectRefs(e, refs)
		}
	case []any:
		for _, e := range x {
			collectRefs(e, refs)
		}
	}
}

func lines(t *testing.T, path string) [][]byte {
	t.Helper()
	f, err := os.Open(path)
	if err != nil {
		t.Fatal(err)
	}
	defer f.Close()
	var out [][]byte
	s := bufio.NewScanner(f)
	s.Buffer(make([]byte, 1<<20), 1<<24)
	for s.Scan() {
		out = append(out, bytes.Clone(s.Bytes()))
	}
	if err := s.Err(); err != nil {
		t.Fatal(err)
	}
	return out
}

func TestReplaySkipsBadLines(t *testing.T) {
	dir := t.TempDir()
	bad := filepath.Join(dir, "bad.ndjson")
	content := strings.Join([]string{
		`{"resourceType":"Patient","id":"p1","gender":"male","birthDate":"1970-01-01"}`,
		`{"resourceType":"Observation","id":"o1"`, // truncated
		`not json at all`,
		``,
		`{"id":"no-type"}`,
		`[1,2,3]`,
	}, "\n")
	if err := os.WriteFile(bad, []byte(content), 0o644); err != nil {
		t.Fatal(err)
	}
	_, errOut, code := runCmd(t, "replay", "--format", "table", bad)
	if code != exitSkipped {
		t.Fatalf("exit %d, want %d (skipped); stderr:\n%s", code, exitSkipped, errOut)
	}
	for _, want := range []string{"bad.ndjson:2:", "bad.ndjson:3:", "bad.ndjson:5:", "bad.ndjson:6:", "skipped 4"} {
		if !strings.Contains(errOut, want) {
			t.Errorf("stderr lacks %q:\n%s", want, errOut)
		}
	}
}

func TestReplayUsageErrors(t *testing.T) {
	cases := []struct {
		name string
		args []string
		want []string
	}{
		{"no files", []string{"replay"}, []string{"no input files"}},
		{"every problem at once", []string{"replay", "--format", "xml", "--window", "-1m", "--co2-basis", "damp", "x.ndjson"},
			[]string{"--format", "Window", "--co2-basis"}},
		{"missing site table", []string{"replay", "--codes", "/nonexistent/codes.json", "x.ndjson"}, []string{"--codes"}},
		{"unknown command", []string{"frobnicate"}, []string{"unknown command"}},
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

func TestReplayMissingFileFails(t *testing.T) {
	_, errOut, code := runCmd(t, "replay", filepath.Join(t.TempDir(), "absent.ndjson"))
	if code != exitFailed || !strings.Contains(errOut, "absent.ndjson") {
		t.Fatalf("exit %d, stderr %q: want a failure naming the file", code, errOut)
	}
}
