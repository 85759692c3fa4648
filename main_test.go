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

	"github.com/deadspace-fhir/deadspace/api/settings"
	"github.com/deadspace-fhir/deadspace/fhir/fhirtest"
	"github.com/deadspace-fhir/deadspace/fhir/fhirtest/bulkfake"
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
			if code != settings.ExitOK {
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
	if code != settings.ExitOK {
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
	if code != settings.ExitSkipped {
		t.Fatalf("exit %d, want %d (skipped); stderr:\n%s", code, settings.ExitSkipped, errOut)
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
			[]string{"--format", "--window must be between 1m0s and 6h0m0s, got -1m0s", `--co2-basis must be dry or wet, got "damp"`}},
		{"missing site table", []string{"replay", "--codes", "/nonexistent/codes.json", "x.ndjson"}, []string{"--codes"}},
		{"unknown command", []string{"frobnicate"}, []string{"unknown command"}},
	}
	for _, tc := range cases {
		t.Run(tc.name, func(t *testing.T) {
			_, errOut, code := runCmd(t, tc.args...)
			if code != settings.ExitUsage {
				t.Fatalf("exit %d, want %d; stderr:\n%s", code, settings.ExitUsage, errOut)
			}
			for _, w := range tc.want {
				if !strings.Contains(errOut, w) {
					t.Errorf("stderr lacks %q:\n%s", w, errOut)
				}
			}
		})
	}
}

// TestEveryCommandReadsTheDerivationVariables checks that replay and serve
// take a derivation setting from the same environment variable and refuse
// the same bad value with the same message.
func TestEveryCommandReadsTheDerivationVariables(t *testing.T) {
	t.Setenv("DEADSPACE_BAROMETRIC_PRESSURE", "0")
	t.Setenv("DEADSPACE_WEBHOOK_SECRET", "0123456789abcdef0123")
	want := "--barometric-pressure must be 250 to 2300 mm[Hg], got 0"
	for _, args := range [][]string{{"replay", "x.ndjson"}, {"serve", "--data-dir", t.TempDir()}} {
		_, errOut, code := runCmd(t, args...)
		if code != settings.ExitUsage || !strings.Contains(errOut, want) {
			t.Errorf("%s: exit %d, stderr %q; want %d and %q", args[0], code, errOut, settings.ExitUsage, want)
		}
	}
}

func TestReplayMissingFileFails(t *testing.T) {
	_, errOut, code := runCmd(t, "replay", filepath.Join(t.TempDir(), "absent.ndjson"))
	if code != settings.ExitFailed || !strings.Contains(errOut, "absent.ndjson") {
		t.Fatalf("exit %d, stderr %q: want a failure naming the file", code, errOut)
	}
}

// TestReplayDemoRecordsAreTrustworthy checks every Observation replay
// writes for the demo night against rules 8 and 10 of issue 8: an
// interpretation never disagrees with the reference range (FHIR R4
// Observation.referenceRange.low and .high are inclusive: "the value is
// within the range if it is ≥ low and ≤ high"), a negative value is never
// flagged Normal, and no method or note carries "from memory" or
// "believed" into a patient's record.
func TestReplayDemoRecordsAreTrustworthy(t *testing.T) {
	out, errOut, code := runCmd(t, append([]string{"replay", "--issued", demoIssued}, demoFiles(t)...)...)
	if code != settings.ExitOK {
		t.Fatalf("exit %d, stderr:\n%s", code, errOut)
	}
	type quantity struct {
		Value *float64 `json:"value"`
	}
	var checked, flagged int
	for i, line := range strings.Split(strings.TrimSpace(out), "\n") {
		var o struct {
			ResourceType   string `json:"resourceType"`
			Code           struct{ Coding []struct{ Code string } }
			ValueQuantity  quantity
			Method         struct{ Text string }
			Note           []struct{ Text string }
			Interpretation []struct {
				Coding []struct{ Code string }
			}
			ReferenceRange []struct {
				Low, High *quantity
				Text      string
			}
		}
		if err := json.Unmarshal([]byte(line), &o); err != nil {
			t.Fatal(err)
		}
		if o.ResourceType != "Observation" {
			continue
		}
		checked++
		code := o.Code.Coding[0].Code
		text := o.Method.Text
		for _, n := range o.Note {
			text += " " + n.Text
		}
		for _, rr := range o.ReferenceRange {
			text += " " + rr.Text
		}
		for _, banned := range []string{"memory", "believed"} {
			if strings.Contains(strings.ToLower(text), banned) {
				t.Errorf("line %d (%s) carries %q into the record", i+1, code, banned)
			}
		}
		if len(o.Interpretation) == 0 {
			continue
		}
		flagged++
		v := *o.ValueQuantity.Value
		flag := o.Interpretation[0].Coding[0].Code
		for _, rr := range o.ReferenceRange {
			lowOK := rr.Low == nil || v >= *rr.Low.Value
			highOK := rr.High == nil || v <= *rr.High.Value
			switch flag {
			case "N":
				if !lowOK || !highOK || v < 0 {
					t.Errorf("line %d: %s %v flagged N outside its range", i+1, code, v)
				}
			case "H":
				if rr.High == nil || highOK {
					t.Errorf("line %d: %s %v flagged H, range high %v", i+1, code, v, rr.High)
				}
			case "L":
				if rr.Low == nil || lowOK {
					t.Errorf("line %d: %s %v flagged L, range low %v", i+1, code, v, rr.Low)
				}
			}
		}
	}
	// demo.summary.golden: 111 Observations; the gradient and the flags
	// of bed2's VR are among the flagged ones.
	if checked != 111 || flagged == 0 {
		t.Errorf("checked %d Observations (%d flagged), want the 111 of demo.summary.golden", checked, flagged)
	}
}

// Rule 11: a resource without meta.versionId or meta.lastUpdated (both
// optional in FHIR R4) is still used, cited by its logical reference with a
// note, and one bad patient does not stop the others.
func TestReplayWithoutMeta(t *testing.T) {
	dir := t.TempDir()
	in := filepath.Join(dir, "in.ndjson")
	obs := func(id, patient, code, unit string, v float64, at string) string {
		return `{"resourceType":"Observation","id":"` + id + `","status":"final","code":{"coding":[{"system":"http://loinc.org","code":"` + code +
			`"}]},"subject":{"reference":"Patient/` + patient + `"},"effectiveDateTime":"` + at + `","valueQuantity":{"value":` +
			strconv.FormatFloat(v, 'f', -1, 64) + `,"unit":"` + unit + `","system":"http://unitsofmeasure.org","code":"` + unit + `"}}`
	}
	content := strings.Join([]string{
		`{"resourceType":"Patient","id":"p1","gender":"male","birthDate":"1970-01-01"}`,
		obs("abg1", "p1", "2019-8", "mm[Hg]", 40, "2026-03-15T02:00:00Z"),
		obs("et1", "p1", "19891-1", "mm[Hg]", 35, "2026-03-15T02:01:00Z"),
		obs("vt1", "p1", "76222-9", "mL", 500, "2026-03-15T02:01:00Z"),
		obs("rr1", "p1", "19840-8", "/min", 16, "2026-03-15T02:01:00Z"),
		// another patient with a blood gas whose id is fine but whose
		// encounter reference cannot be written: the run goes on
		`{"resourceType":"Patient","id":"p2","meta":{"versionId":"1"},"gender":"female","birthDate":"1980-01-01"}`,
		strings.Replace(obs("abg2", "p2", "2019-8", "mm[Hg]", 41, "2026-03-15T02:00:00Z"), `"status"`, `"encounter":{"reference":"icu bed 2"},"status"`, 1),
		strings.Replace(obs("et2", "p2", "19891-1", "mm[Hg]", 36, "2026-03-15T02:00:00Z"), `"status"`, `"encounter":{"reference":"icu bed 2"},"status"`, 1),
		`{"resourceType":"Patient","id":"p3","meta":{"versionId":"1"},"gender":"female","birthDate":"1980-01-01"}`,
		obs("abg3", "p3", "2019-8", "mm[Hg]", 41, "2026-03-15T02:00:00Z"),
		obs("et3", "p3", "19891-1", "mm[Hg]", 36, "2026-03-15T02:00:00Z"),
	}, "\n")
	if err := os.WriteFile(in, []byte(content), 0o644); err != nil {
		t.Fatal(err)
	}
	out, errOut, code := runCmd(t, "replay", "--issued", demoIssued, in)
	if code != settings.ExitOK {
		t.Fatalf("exit %d, stderr:\n%s", code, errOut)
	}
	if !strings.Contains(out, `"reference":"Observation/abg1"`) || !strings.Contains(out, "no version") {
		t.Errorf("unversioned inputs not cited with a note:\n%s", clip(out))
	}
	if !strings.Contains(out, `"reference":"Patient/p3"`) || strings.Contains(out, `"reference":"Patient/p2"`) {
		t.Errorf("want the third patient's values and none of the second's")
	}
	if !strings.Contains(errOut, "resource-malformed") {
		t.Errorf("the second patient's blood gas is not accounted for:\n%s", errOut)
	}
	for i, line := range strings.Split(strings.TrimSpace(out), "\n") {
		if err := fhirvalidate.Resource([]byte(line)); err != nil {
			t.Errorf("line %d does not validate: %v", i+1, err)
		}
	}
}

// Rule 12: every input left out and every value not emitted, one NDJSON
// line each, and the counts agree with the summary.
func TestReplayListsOmissions(t *testing.T) {
	path := filepath.Join(t.TempDir(), "omissions.ndjson")
	_, errOut, code := runCmd(t, append([]string{"replay", "--issued", demoIssued, "--omissions", path}, demoFiles(t)...)...)
	if code != settings.ExitOK {
		t.Fatalf("exit %d, stderr:\n%s", code, errOut)
	}
	counts := map[string]int{}
	for _, line := range lines(t, path) {
		var o struct{ Kind, Reference, Code, Reason, Detail string }
		if err := json.Unmarshal(line, &o); err != nil {
			t.Fatal(err)
		}
		if o.Reference == "" || o.Reason == "" || (o.Kind == "value") != (o.Code != "") {
			t.Errorf("incomplete line %s", line)
		}
		counts[o.Kind+" "+o.Reason]++
	}
	// demo.summary.golden: the counts by reason, code-not-recognised only
	// counted.
	for _, want := range []struct {
		key string
		n   int
	}{
		{"input etco2-artefact", 2}, {"input value-in-another-unit", 1}, {"input no-blood-gas-nearby", 11535},
		{"value patient-not-adult", 4}, {"value input-missing", 30},
	} {
		if counts[want.key] != want.n || !strings.Contains(errOut, strconv.Itoa(want.n)) {
			t.Errorf("%s: %d lines, want %d as in the summary", want.key, counts[want.key], want.n)
		}
	}
}

// Rule 14: replay writes the project's CodeSystem on request, valid FHIR R4.
func TestReplayWritesCodeSystem(t *testing.T) {
	path := filepath.Join(t.TempDir(), "codesystem.json")
	_, errOut, code := runCmd(t, append([]string{"replay", "--issued", demoIssued, "--codesystem", path}, demoFiles(t)...)...)
	if code != settings.ExitOK {
		t.Fatalf("exit %d, stderr:\n%s", code, errOut)
	}
	b, err := os.ReadFile(path)
	if err != nil {
		t.Fatal(err)
	}
	if err := fhirvalidate.Resource(bytes.TrimSpace(b)); err != nil {
		t.Errorf("CodeSystem does not validate: %v", err)
	}
	if !bytes.Contains(b, []byte(`"etco2-rise-above-baseline"`)) || !bytes.Contains(b, []byte(`"paco2-etco2-gradient"`)) {
		t.Errorf("CodeSystem lacks codes:\n%s", clip(string(b)))
	}
}

// Rule 13: readable by the people who read it.
func TestCommandsAnswerPeople(t *testing.T) {
	out, _, code := runCmd(t, "--help")
	if code != settings.ExitOK || !strings.Contains(out, "replay") || !strings.Contains(out, "serve") || !strings.Contains(out, "version") {
		t.Errorf("--help: exit %d\n%s", code, out)
	}
	out, _, code = runCmd(t, "--version")
	if code != settings.ExitOK || !strings.HasPrefix(out, "deadspace ") {
		t.Errorf("--version: exit %d %q", code, out)
	}
	// Errors name flags, never Go field names.
	_, errOut, code := runCmd(t, "replay", "--fall-drop", "0", "--fall-sustain", "0s", "x.ndjson")
	if code != settings.ExitUsage || !strings.Contains(errOut, "--fall-drop must") || !strings.Contains(errOut, "--fall-sustain must") || strings.Contains(errOut, "Fall.") {
		t.Errorf("stderr %q", errOut)
	}
	// An input with nothing usable says so.
	empty := filepath.Join(t.TempDir(), "vitals.ndjson")
	if err := os.WriteFile(empty, []byte(`{"resourceType":"Patient","id":"p1","meta":{"versionId":"1"}}`+"\n"), 0o644); err != nil {
		t.Fatal(err)
	}
	out, errOut, code = runCmd(t, "replay", "--format", "table", empty)
	if code != settings.ExitOK || !strings.Contains(out, "Nothing to derive") || !strings.Contains(errOut, "nothing to derive") {
		t.Errorf("exit %d, stdout %q, stderr %q", code, out, errOut)
	}
	// The table carries units and a legend.
	out, _, _ = runCmd(t, append([]string{"replay", "--format", "table", "--issued", demoIssued}, demoFiles(t)...)...)
	for _, want := range []string{"PaCO2 mmHg", "Flags:", "VD/VT H: 0.60 or more"} {
		if !strings.Contains(out, want) {
			t.Errorf("table lacks %q", want)
		}
	}
}

// TestReplayHTMLReport checks `replay --html`: the report of the demo is
// written beside the normal output, with every patient and the caution.
func TestReplayHTMLReport(t *testing.T) {
	path := filepath.Join(t.TempDir(), "report.html")
	args := append([]string{"replay", "--issued", demoIssued, "--format", "table", "--html", path}, demoFiles(t)...)
	stdout, stderr, code := runCmd(t, args...)
	if code != settings.ExitOK || !strings.Contains(stdout, "bed5-fall") {
		t.Fatalf("exit %d\n%s", code, stderr)
	}
	b, err := os.ReadFile(path)
	if err != nil {
		t.Fatal(err)
	}
	html := string(b)
	for _, want := range []string{"<!DOCTYPE html>", "Content-Security-Policy", `id="p-bed1-stable"`, `id="p-bed5-fall"`, "<svg class=\"plot\"", "calculated from other observations"} {
		if !strings.Contains(html, want) {
			t.Errorf("the report lacks %q", want)
		}
	}
}

func TestSubmitUsageErrors(t *testing.T) {
	for _, tc := range []struct {
		name string
		args []string
	}{
		{"no files", []string{"submit"}},
		{"unknown flag", []string{"submit", "--nope", "x.ndjson"}},
	} {
		t.Run(tc.name, func(t *testing.T) {
			if _, _, code := runCmd(t, tc.args...); code != settings.ExitUsage {
				t.Errorf("exit %d, want %d", code, settings.ExitUsage)
			}
		})
	}
}

func TestBackfillDryRunCommand(t *testing.T) {
	args := append([]string{"backfill", "--dry-run", "--state-dir", t.TempDir()}, demoFiles(t)...)
	_, errOut, code := runCmd(t, args...)
	if code != settings.ExitOK {
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
			if code != settings.ExitUsage {
				t.Fatalf("exit %d, want %d; stderr:\n%s", code, settings.ExitUsage, errOut)
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
	if code != settings.ExitOK {
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
	if code != settings.ExitOK || !strings.Contains(errOut, "written: 0 transactions acknowledged") {
		t.Errorf("second run: exit %d\n%s", code, errOut)
	}
}
