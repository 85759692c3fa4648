package ui

import (
	"bytes"
	"context"
	"encoding/json"
	"flag"
	"net/http"
	"net/http/httptest"
	"os"
	"path/filepath"
	"regexp"
	"strings"
	"sync"
	"testing"
	"time"

	"github.com/deadspace-fhir/deadspace/api/engine"
	"github.com/deadspace-fhir/deadspace/api/engine/enginetest"
	"github.com/deadspace-fhir/deadspace/api/replay"
	"github.com/deadspace-fhir/deadspace/api/store"
	"github.com/deadspace-fhir/deadspace/api/store/boltstore"
	"github.com/deadspace-fhir/deadspace/derive"
	"github.com/deadspace-fhir/deadspace/fhir/decode"
	"github.com/deadspace-fhir/deadspace/fhir/encode"
)

var update = flag.Bool("update", false, "rewrite the golden files")

var (
	demoOnce   sync.Once
	demoReport Report
	demoErr    error
)

// demo replays the embedded demo night, as `replay --html` does.
func demo(t *testing.T) Report {
	t.Helper()
	demoOnce.Do(func() {
		files, err := filepath.Glob("../../testdata/demo/*.ndjson")
		if err != nil || len(files) == 0 {
			demoErr = err
			return
		}
		enc := encode.DefaultOptions()
		enc.Issued = time.Date(2026, 3, 16, 0, 0, 0, 0, time.UTC)
		rec := NewRecorder()
		cfg := derive.DefaultConfig()
		out, err := replay.Run(context.Background(), replay.Options{Derive: cfg, Decode: decode.Options{}, Encode: enc, Observe: rec.Add}, files)
		if err != nil {
			demoErr = err
			return
		}
		demoReport = FromReplay(out, rec, cfg, enc.Issued, "replay of the demo")
	})
	if demoErr != nil || len(demoReport.Timelines) == 0 {
		t.Fatalf("demo replay: %v", demoErr)
	}
	return demoReport
}

type fixedUser string

func (u fixedUser) User(*http.Request) (string, bool) { return string(u), u != "" }
func (u fixedUser) Challenge(w http.ResponseWriter, _ *http.Request) {
	http.Error(w, "no", http.StatusUnauthorized)
}
func (u fixedUser) Routes() map[string]http.Handler { return nil }

func testHandler(t *testing.T, src Source, auth Authenticator, access *bytes.Buffer) *Handler {
	t.Helper()
	h, err := NewHandler(HandlerConfig{Source: src, Auth: auth, Access: NewAccessLog(access, nil)})
	if err != nil {
		t.Fatal(err)
	}
	h.nonce = func() string { return "test-nonce" }
	return h
}

func get(t *testing.T, h http.Handler, path string) *httptest.ResponseRecorder {
	t.Helper()
	req := httptest.NewRequest(http.MethodGet, path, nil)
	req.Header.Set("Accept", "text/html")
	w := httptest.NewRecorder()
	h.ServeHTTP(w, req)
	return w
}

func golden(t *testing.T, name string, got []byte) {
	t.Helper()
	path := filepath.Join("testdata", name)
	if *update {
		if err := os.MkdirAll("testdata", 0o755); err != nil {
			t.Fatal(err)
		}
		if err := os.WriteFile(path, got, 0o644); err != nil {
			t.Fatal(err)
		}
		return
	}
	want, err := os.ReadFile(path)
	if err != nil {
		t.Fatalf("%v (run go test ./api/ui -run %s -update)", err, t.Name())
	}
	if !bytes.Equal(got, want) {
		t.Errorf("%s differs from the golden file; run go test ./api/ui -update and read the diff", path)
	}
}

// findExplanation returns the demo's explanation of a value of a patient
// at a time.
func findExplanation(t *testing.T, r Report, patient string, code derive.Code, at string) Explanation {
	t.Helper()
	for _, ex := range r.Explanations {
		if ex.PatientID == patient && ex.Value != nil && ex.Value.Code == code && ex.At.Format("15:04") == at {
			return ex
		}
	}
	t.Fatalf("no explanation of %s of %s at %s", code, patient, at)
	return Explanation{}
}

func TestPagesGolden(t *testing.T) {
	r := demo(t)
	grad := findExplanation(t, r, "bed5-fall", derive.CodeGradient, "03:30")
	var fall, rise string
	for _, ex := range r.Explanations {
		switch {
		case ex.Fall != nil && ex.PatientID == "bed5-fall":
			fall = ex.ID
		case ex.Fall != nil && ex.Fall.Rise:
			rise = ex.ID
		}
	}
	var access bytes.Buffer
	h := testHandler(t, ReportSource{r}, fixedUser("auditor1"), &access)
	for _, tc := range []struct {
		name, path, golden string
	}{
		{"overview", "/", "overview.html"},
		{"timeline", "/patient/bed5-fall", "timeline-bed5-fall.html"},
		{"timeline with a superseded blood gas", "/patient/bed2-ards", "timeline-bed2-ards.html"},
		{"explain a gradient", "/explain/" + grad.ID, "explain-gradient.html"},
		{"explain a fall", "/explain/" + fall, "explain-fall.html"},
		{"timeline with a rise and a temperature-adjusted PaCO2", "/patient/bed6-cooled", "timeline-bed6-cooled.html"},
		{"explain a rise", "/explain/" + rise, "explain-rise.html"},
	} {
		t.Run(tc.name, func(t *testing.T) {
			w := get(t, h, tc.path)
			if w.Code != http.StatusOK {
				t.Fatalf("status %d: %s", w.Code, w.Body)
			}
			csp := w.Header().Get("Content-Security-Policy")
			if !strings.Contains(csp, "default-src 'none'") || !strings.Contains(csp, "style-src 'nonce-test-nonce'") || strings.Contains(csp, "unsafe") {
				t.Errorf("Content-Security-Policy = %q", csp)
			}
			body := w.Body.Bytes()
			if bytes.Contains(body, []byte("<script")) || bytes.Contains(body, []byte(" style=\"")) {
				t.Error("a page carries a script or an inline style attribute, which the policy blocks")
			}
			golden(t, tc.golden, body)
		})
	}
}

// TestExplanationCitesTheDerivation checks an explanation against the
// derivation it explains: every reading the pairing took is listed with
// the value it contributed, and the blood gas comes first.
func TestExplanationCitesTheDerivation(t *testing.T) {
	r := demo(t)
	ex := findExplanation(t, r, "bed1-stable", derive.CodePhysiologic, "22:30")
	if len(ex.Inputs) == 0 || ex.Inputs[0].Role != RoleBloodGas || ex.Inputs[0].Value != 41 {
		t.Fatalf("first input = %+v, want the blood gas of 41 mm[Hg]", ex.Inputs[0])
	}
	listed := make(map[string]Input)
	for _, in := range ex.Inputs {
		listed[in.Ref] = in
		if !in.Available || in.OriginalValue == "" || in.OriginalUnit == "" {
			t.Errorf("%s: the original value and unit are missing: %+v", in.Ref, in)
		}
	}
	if len(ex.Pairings) == 0 {
		t.Fatal("no pairings listed")
	}
	for _, p := range ex.Pairings {
		for _, ref := range p.Refs {
			if _, ok := listed[ref]; !ok {
				t.Errorf("pairing of %s took %s, which the inputs do not list", p.Kind, ref)
			}
		}
	}
	if ex.Equation == "" || len(ex.Terms) == 0 || ex.AlgorithmVersion != derive.AlgorithmVersion {
		t.Errorf("equation %q, %d terms, algorithm %q", ex.Equation, len(ex.Terms), ex.AlgorithmVersion)
	}
}

// TestReportIsSelfContained checks the replay report: one file, a policy
// that loads nothing, every internal link resolving to a section of it.
func TestReportIsSelfContained(t *testing.T) {
	r := demo(t)
	var buf bytes.Buffer
	if err := WriteReport(&buf, r); err != nil {
		t.Fatal(err)
	}
	html := buf.String()
	if !strings.Contains(html, `<meta http-equiv="Content-Security-Policy" content="default-src &#39;none&#39;; style-src &#39;sha256-`) {
		t.Error("the report has no Content-Security-Policy that pins its stylesheet")
	}
	for _, bad := range []string{"<script", "src=\"http", "href=\"http", "@import", "url("} {
		if strings.Contains(html, bad) {
			t.Errorf("the report contains %q: it must load nothing", bad)
		}
	}
	ids := make(map[string]bool)
	for _, m := range regexp.MustCompile(`\sid="([^"]+)"`).FindAllStringSubmatch(html, -1) {
		ids[m[1]] = true
	}
	links := regexp.MustCompile(`href="#([^"]+)"`).FindAllStringSubmatch(html, -1)
	if len(links) < len(r.Explanations) {
		t.Fatalf("%d internal links for %d explanations", len(links), len(r.Explanations))
	}
	for _, m := range links {
		if !ids[m[1]] {
			t.Errorf("link #%s goes nowhere", m[1])
		}
	}
	for _, tl := range r.Timelines {
		if !ids["p-"+tl.ID] {
			t.Errorf("no section for patient %s", tl.ID)
		}
	}
	for _, ex := range r.Explanations {
		if !ids[Links{}.ExplainAnchor(ex.ID)] {
			t.Errorf("no section for explanation %s", ex.ID)
		}
	}
}

// TestDemoShowsSupersededAndWithdrawnInputs checks that the demo's
// corrected blood gas is plotted as superseded and the unusable one is
// accounted for.
func TestDemoShowsSupersededAndWithdrawnInputs(t *testing.T) {
	r := demo(t)
	counts := map[string]int{}
	for _, tl := range r.Timelines {
		for _, p := range tl.PaCO2 {
			counts[p.Status]++
		}
	}
	if counts[StatusSuperseded] == 0 {
		t.Errorf("no superseded blood gas on any timeline: %v", counts)
	}
	// 17 is what `replay --format table` reports for the demo ("derived: 17
	// blood gases"); every one is plotted as current.
	if counts[StatusFinal] != 17 {
		t.Errorf("%d current blood gases plotted, want the 17 the replay derived from", counts[StatusFinal])
	}
}

func TestAccessLogNamesWhoSawWhichPatient(t *testing.T) {
	r := demo(t)
	var access bytes.Buffer
	h := testHandler(t, ReportSource{r}, fixedUser("auditor1"), &access)
	get(t, h, "/patient/bed1-stable")
	ex := findExplanation(t, r, "bed3-kpa", derive.CodeGradient, "00:00")
	get(t, h, "/explain/"+ex.ID)
	var got []AccessEntry
	for _, line := range strings.Split(strings.TrimSpace(access.String()), "\n") {
		var e AccessEntry
		if err := json.Unmarshal([]byte(line), &e); err != nil {
			t.Fatalf("access log line %q: %v", line, err)
		}
		got = append(got, e)
	}
	if len(got) != 2 || got[0].User != "auditor1" || got[0].Patients[0] != "bed1-stable" || got[1].Patients[0] != "bed3-kpa" || got[1].Time.IsZero() {
		t.Errorf("access log = %+v", got)
	}
}

type failingWriter struct{}

func (failingWriter) Write([]byte) (int, error) { return 0, os.ErrClosed }

func TestPageRefusedWhenAccessCannotBeLogged(t *testing.T) {
	r := demo(t)
	h, err := NewHandler(HandlerConfig{Source: ReportSource{r}, Auth: fixedUser("a"), Access: NewAccessLog(failingWriter{}, nil)})
	if err != nil {
		t.Fatal(err)
	}
	w := get(t, h, "/patient/bed1-stable")
	if w.Code != http.StatusInternalServerError || strings.Contains(w.Body.String(), "<svg") {
		t.Errorf("status %d; the page must not be shown when its view cannot be logged", w.Code)
	}
}

func TestUnknownAndMalformedAreNotFound(t *testing.T) {
	r := demo(t)
	h := testHandler(t, ReportSource{r}, fixedUser("a"), &bytes.Buffer{})
	for _, path := range []string{"/patient/nobody", "/patient/a%2Fb", "/explain/sha256:00", "/explain/" + "sha256:" + strings.Repeat("0", 64), "/operations"} {
		if w := get(t, h, path); w.Code != http.StatusNotFound {
			t.Errorf("%s: status %d, want 404", path, w.Code)
		}
	}
}

// The operations page shows a dead letter's answers as the logs and
// `deadspace deadletters show` do: through the one redaction.
func TestOperationsPageRedactsDeadLetters(t *testing.T) {
	st := enginetest.OpenStore(t, boltstore.Options{NoSync: true})
	eng, err := engine.New(engine.Config{Store: st, Decoder: decode.New(decode.Options{}), Encoder: enginetest.Encoder(t), Derive: derive.DefaultConfig()})
	if err != nil {
		t.Fatal(err)
	}
	ctx := context.Background()
	now := time.Now()
	const subject = "Patient/bed7-quiet"
	series := "sha256:" + strings.Repeat("c", 64)
	if err := st.Commit(ctx, store.Change{Subject: subject,
		Entries: []store.Entry{{Series: series, Subject: subject, Key: "k", Status: "final", EffectiveAt: now, UpdatedAt: now}},
		Writes:  []store.Write{{Series: []string{series}, Body: []byte("{}")}}}, now); err != nil {
		t.Fatal(err)
	}
	ws, err := st.DueWrites(ctx, now, 10)
	if err != nil || len(ws) != 1 {
		t.Fatalf("due writes %v %v", ws, err)
	}
	secrets := []string{"bed7-quiet", "obs-3344", "0f0e0d0c-1234-4abc-8def-000000000042", "MRN998877", "48213"}
	if err := st.Reschedule(ctx, ws[0].ID, now, `fhir transaction: HTTP 503 Service Unavailable: {"id":"obs-3344","subject":{"reference":"Patient/bed7-quiet"}}`); err != nil {
		t.Fatal(err)
	}
	if err := st.Bury(ctx, ws[0].ID, "fhir transaction: HTTP 422 Unprocessable Entity: urn:uuid:0f0e0d0c-1234-4abc-8def-000000000042 rejected; identifier=MRN998877; resource 48213", now); err != nil {
		t.Fatal(err)
	}
	op, err := NewLive(LiveConfig{Engine: eng, Outbox: st}).Operations(ctx)
	if err != nil {
		t.Fatal(err)
	}
	if len(op.DeadLetters) != 1 {
		t.Fatalf("%d dead letters on the page, want 1", len(op.DeadLetters))
	}
	dl := op.DeadLetters[0]
	if !strings.Contains(dl.Reason, "HTTP 422 Unprocessable Entity") || !strings.Contains(dl.Answer, "HTTP 503") {
		t.Errorf("the answers lost their wording: %q, %q", dl.Reason, dl.Answer)
	}
	for _, id := range secrets {
		if strings.Contains(dl.Reason+dl.Answer, id) {
			t.Errorf("the page shows %q: %q / %q", id, dl.Reason, dl.Answer)
		}
	}
}
