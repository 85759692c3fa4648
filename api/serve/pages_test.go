package serve_test

// The auditor's pages end to end: a real service over TLS, the demo night
// loaded with `deadspace submit`'s code, sign-in through a local OpenID
// Connect provider (mockoidc, started here), and a real headless Chromium
// driven over the DevTools protocol.

import (
	"bufio"
	"context"
	"crypto/tls"
	"crypto/x509"
	"encoding/json"
	"flag"
	"fmt"
	"io"
	"net"
	"net/http"
	"os"
	"path/filepath"
	"slices"
	"strconv"
	"strings"
	"testing"
	"time"

	"github.com/chromedp/chromedp"
	"github.com/oauth2-proxy/mockoidc"

	"github.com/deadspace-fhir/deadspace/api/replay"
	"github.com/deadspace-fhir/deadspace/api/serve"
	"github.com/deadspace-fhir/deadspace/api/submit"
	"github.com/deadspace-fhir/deadspace/api/tlsconf"
	"github.com/deadspace-fhir/deadspace/api/tlsconf/tlstest"
	"github.com/deadspace-fhir/deadspace/api/ui"
	"github.com/deadspace-fhir/deadspace/api/ui/browsertest"
	"github.com/deadspace-fhir/deadspace/derive"
)

var updateScreens = flag.Bool("update-screenshots", false, "rewrite testdata/screenshots from the browser test")

const allowedGroup = "icu-audit"

// freePort returns a loopback address nothing listens on, for a listener
// whose URL must be known before it starts (the OpenID redirect URL).
func freePort(t *testing.T) string {
	t.Helper()
	ln, err := net.Listen("tcp", "127.0.0.1:0")
	if err != nil {
		t.Fatal(err)
	}
	addr := ln.Addr().String()
	ln.Close()
	return addr
}

type pagesEnv struct {
	svc     *service
	base    string
	oidc    *mockoidc.MockOIDC
	access  string
	client  *http.Client
	caFile  string
	dataDir string
}

// startPages runs a standalone service with the pages signed in through a
// local OpenID provider, and loads the demo night into it with submit.
func startPages(t *testing.T) *pagesEnv {
	t.Helper()
	m, err := mockoidc.Run()
	if err != nil {
		t.Fatal(err)
	}
	t.Cleanup(func() { _ = m.Shutdown() })
	ca := tlstest.NewCA(t)
	kp := ca.Server(t, "127.0.0.1", "localhost")
	dir := t.TempDir()
	uiAddr := freePort(t)
	cfg := testConfig("", dir)
	cfg.Retention = 87600 * time.Hour // the demo night is from March 2026
	cfg.TLSCert, cfg.TLSKey = kp.CertFile, kp.KeyFile
	cfg.UI = serve.UIConfig{
		Listen: uiAddr, OIDCIssuer: m.Issuer(), OIDCClientID: m.ClientID, OIDCClientSecret: m.ClientSecret,
		OIDCRedirectURL: "https://" + uiAddr + "/signin/callback", OIDCScopes: "openid profile groups",
		OIDCClaim: "groups", OIDCAllowed: allowedGroup + ",icu-consultants", OIDCUserClaim: "preferred_username",
		SessionTTL: time.Hour, AccessLog: filepath.Join(dir, "access.log"),
	}
	if err := cfg.Validate(); err != nil {
		t.Fatal(err)
	}
	s := start(t, cfg)
	// Patients first, so every value is derived knowing the patient's
	// facts, as the README's submit command orders them.
	files := []string{"../../testdata/demo/Patient.ndjson", "../../testdata/demo/Encounter.ndjson",
		"../../testdata/demo/Observation.bloodgas.ndjson", "../../testdata/demo/Observation.devices.ndjson"}
	creds, err := tlsconf.GRPCClient(tlsconf.ClientFlags{CA: "--ca", Cert: "--cert", Key: "--key"}, ca.CertFile, "", "")
	if err != nil {
		t.Fatal(err)
	}
	sum, err := submit.Run(context.Background(), submit.Options{Addr: s.svc.GRPCAddr(), Credentials: creds, ChunkBytes: 512 << 10}, files)
	// The demo holds a venous, a preliminary and a mislabelled-unit blood
	// gas, which the service must refuse, each with its reason and line.
	refused := map[string]bool{"specimen-not-arterial": true, "status-not-usable": true, "value-in-another-unit": true}
	if err == nil || len(sum.Problems) != len(refused) || sum.Accepted < 12000 {
		t.Fatalf("submit: %v, summary %+v", err, sum)
	}
	for _, p := range sum.Problems {
		if !refused[p.Reason] || !strings.HasSuffix(p.File, "Observation.bloodgas.ndjson") || p.Line == 0 {
			t.Errorf("submit refused %s", p)
		}
	}
	if err := s.svc.Engine().EvaluateNow(context.Background()); err != nil {
		t.Fatal(err)
	}
	pool := x509.NewCertPool()
	pool.AddCert(ca.Cert)
	client := &http.Client{
		Transport:     &http.Transport{TLSClientConfig: &tls.Config{RootCAs: pool, MinVersion: tls.VersionTLS12}},
		CheckRedirect: func(*http.Request, []*http.Request) error { return http.ErrUseLastResponse },
	}
	return &pagesEnv{svc: s, base: "https://" + uiAddr, oidc: m, access: cfg.UI.AccessLog, client: client, caFile: ca.CertFile, dataDir: dir}
}

func (e *pagesEnv) queueUser(groups ...string) {
	e.oidc.QueueUser(&mockoidc.MockUser{
		Subject: "u-1", Email: "auditor@hospital.example", PreferredUsername: "a.auditor", Groups: groups, EmailVerified: true,
	})
}

func saveScreenshot(t *testing.T, name string, png []byte) {
	t.Helper()
	dir := t.TempDir()
	if *updateScreens {
		dir = "../../testdata/screenshots"
	}
	browsertest.Save(t, dir, name, png)
}

func TestPagesInBrowser(t *testing.T) {
	env := startPages(t)
	ctx := browsertest.New(t, true)

	// Sign in: the overview sends the browser to the provider and back.
	env.queueUser(allowedGroup)
	if err := chromedp.Do(ctx, chromedp.Navigate(env.base+"/")); err != nil {
		t.Fatal(err)
	}
	// The redirects through the provider end on the overview; load it
	// afresh there, as a query that spans the redirects can miss it.
	for deadline := time.Now().Add(30 * time.Second); time.Now().Before(deadline); time.Sleep(100 * time.Millisecond) {
		if loc, _ := chromedp.Run(ctx, chromedp.Location()); loc == env.base+"/" {
			break
		}
	}
	if err := chromedp.Do(ctx, chromedp.Navigate(env.base+"/")); err != nil {
		t.Fatal(err)
	}
	if err := waitVisible(ctx, `main table`); err != nil {
		loc, _ := chromedp.Run(ctx, chromedp.Location())
		body, _ := chromedp.Run(ctx, chromedp.Evaluate[string](`document.body ? document.body.innerText : ""`))
		t.Fatalf("sign-in did not reach the overview: %v; the browser is at %s showing %q", err, loc, body)
	}
	loc, _ := chromedp.Run(ctx, chromedp.Location())
	if loc != env.base+"/" {
		t.Fatalf("after sign-in the browser is at %s, want the overview", loc)
	}
	overview, err := chromedp.Run(ctx, chromedp.Text(chromedp.CSS(`main`)))
	if err != nil {
		t.Fatal(err)
	}
	for _, want := range []string{"bed1-stable", "bed5-fall", "no-blood-gas-nearby", "-14.0 mm[Hg] from 03:10", "signed in as a.auditor"} {
		if !strings.Contains(overview+mustText(t, ctx, "header"), want) {
			t.Errorf("overview lacks %q", want)
		}
	}

	// The overview's inputs left out, patient by patient, are what replay
	// counts for the same patient (the service's counts come from the
	// metrics' latest complete evaluation of each patient).
	shownLeftOut, err := chromedp.Run(ctx, chromedp.Evaluate[map[string]string](`Object.fromEntries([...document.querySelectorAll("main table tbody tr")].filter(tr => tr.querySelector("th")).map(tr => [tr.querySelector("th").textContent.trim(), tr.querySelector("td:nth-of-type(4)").innerText.trim()]))`))
	if err != nil {
		t.Fatal(err)
	}
	for _, row := range replayDemo(t).Overview.Patients {
		if !slices.Contains(evaluationOnly, row.ID) {
			continue
		}
		var want []string
		for _, c := range row.LeftOut {
			want = append(want, fmt.Sprintf("%s: %d", c.Reason, c.N))
		}
		if len(want) == 0 {
			want = []string{"none"}
		}
		if got := strings.Fields(shownLeftOut[row.ID]); strings.Join(got, " ") != strings.Join(strings.Fields(strings.Join(want, "\n")), " ") {
			t.Errorf("overview: %s's inputs left out are %q, replay counts %q", row.ID, shownLeftOut[row.ID], want)
		}
	}

	// The timeline of the patient with the fall.
	if err := chromedp.Do(ctx, chromedp.Click(chromedp.CSS(`a[href="/patient/bed5-fall"]`)), chromedp.WaitReady(chromedp.CSS(`svg.plot`))); err != nil {
		t.Fatal(err)
	}
	shot, err := chromedp.Run(ctx, chromedp.Screenshot(chromedp.CSS(`main`)))
	if err != nil {
		t.Fatal(err)
	}
	saveScreenshot(t, "timeline.png", shot)
	n, err := chromedp.Run(ctx, chromedp.Evaluate[int](`document.querySelectorAll("svg.plot rect.fall").length`))
	if err != nil || n != 1 {
		t.Errorf("fall bands on the plot: %d (%v), want 1", n, err)
	}
	// The band covers the whole episode, to the first end-tidal reading
	// back within the recovery band (the demo's 04:40, 36 mm[Hg] against a
	// baseline of 36), not just onset to confirmation (03:13).
	band, err := chromedp.Run(ctx, chromedp.Evaluate[string](`document.querySelector("svg.plot rect.fall title").textContent`))
	if err != nil || !strings.HasSuffix(band, "from 03:10 to 04:40") {
		t.Errorf("the fall band says %q (%v), want it to span 03:10 to 04:40", band, err)
	}

	// Follow the 03:30 gradient to its explanation.
	if err := chromedp.Do(ctx, chromedp.Click(chromedp.CSS(`table tbody tr:last-child td:nth-of-type(3) a`)), chromedp.WaitVisible(chromedp.CSS(`table.inputs`))); err != nil {
		t.Fatal(err)
	}
	loc, _ = chromedp.Run(ctx, chromedp.Location())
	id, ok := strings.CutPrefix(loc, env.base+"/explain/")
	if !ok {
		t.Fatalf("the value led to %s, not an explanation", loc)
	}
	shownRefs, err := chromedp.Run(ctx, chromedp.Evaluate[[]string](`[...document.querySelectorAll("table.inputs tbody tr td:nth-of-type(3)")].map(td => td.textContent.trim())`))
	if err != nil {
		t.Fatal(err)
	}
	shownValues, err := chromedp.Run(ctx, chromedp.Evaluate[[]string](`[...document.querySelectorAll("table.inputs tbody tr td:nth-of-type(5)")].map(td => td.textContent.trim())`))
	if err != nil {
		t.Fatal(err)
	}
	shot, err = chromedp.Run(ctx, chromedp.Screenshot(chromedp.CSS(`main`)))
	if err != nil {
		t.Fatal(err)
	}
	saveScreenshot(t, "explanation.png", shot)

	// The inputs shown are exactly those the stored derivation cites for
	// this value, with the values it used.
	rec, err := env.svc.svc.Engine().Derivation(context.Background(), id)
	if err != nil {
		t.Fatal(err)
	}
	d := rec.Payload.Derivation
	if d == nil || rec.Code != derive.CodeGradient || d.Gas.At().Format("15:04") != "03:30" {
		t.Fatalf("the explanation is of %s %+v, want the 03:30 gradient", rec.Code, d)
	}
	want := map[string]float64{d.Gas.Ref: d.Gas.Value}
	i := slices.IndexFunc(d.Values, func(v derive.Value) bool { return v.Code == rec.Code })
	for _, s := range d.Used {
		if slices.Contains(d.Values[i].Inputs, s.Kind) {
			for _, r := range s.Readings {
				want[r.Ref] = r.Value
			}
		}
	}
	if len(shownRefs) != len(want) {
		t.Errorf("the page shows %d inputs, the stored derivation cites %d", len(shownRefs), len(want))
	}
	for k, ref := range shownRefs {
		v, ok := want[ref]
		if !ok {
			t.Errorf("the page shows %s, which the derivation does not cite", ref)
			continue
		}
		if got := strings.Fields(shownValues[k]); len(got) == 0 || got[0] != strconv.FormatFloat(v, 'g', 4, 64) {
			t.Errorf("%s: the page shows %q, the derivation used %v", ref, shownValues[k], v)
		}
	}

	// Every view that showed a patient is in the access log, by user.
	entries := readAccessLog(t, env.access)
	var sawTimeline, sawExplain bool
	for _, e := range entries {
		if e.User != "a.auditor" {
			t.Errorf("access log entry by %q", e.User)
		}
		sawTimeline = sawTimeline || (e.Page == "timeline" && slices.Equal(e.Patients, []string{"bed5-fall"}))
		sawExplain = sawExplain || (e.Page == "explain" && slices.Equal(e.Patients, []string{"bed5-fall"}))
	}
	if !sawTimeline || !sawExplain {
		t.Errorf("access log %+v lacks the timeline or the explanation of bed5-fall", entries)
	}
	// The operational log names no patient.
	// The patients' whole ids: "bed5" alone is four hexadecimal digits,
	// which a random request id contains now and then.
	if logs := env.svc.logs.String(); strings.Contains(logs, "bed5-fall") || strings.Contains(logs, "bed1-stable") || strings.Contains(logs, "Patient/") {
		t.Errorf("the operational log names a patient:\n%s", logs)
	}
}

// waitVisible waits a bounded time for a selector, so a page that never
// comes is reported with where the browser is.
func waitVisible(ctx context.Context, sel string) error {
	wctx, cancel := context.WithTimeout(ctx, 30*time.Second)
	defer cancel()
	return chromedp.Do(wctx, chromedp.WaitVisible(chromedp.CSS(sel)))
}

func mustText(t *testing.T, ctx context.Context, sel string) string {
	t.Helper()
	s, err := chromedp.Run(ctx, chromedp.Text(chromedp.CSS(sel)))
	if err != nil {
		t.Fatal(err)
	}
	return s
}

func readAccessLog(t *testing.T, path string) []ui.AccessEntry {
	t.Helper()
	f, err := os.Open(path)
	if err != nil {
		t.Fatal(err)
	}
	defer f.Close()
	var out []ui.AccessEntry
	sc := bufio.NewScanner(f)
	for sc.Scan() {
		var e ui.AccessEntry
		if err := json.Unmarshal(sc.Bytes(), &e); err != nil {
			t.Fatalf("access log line %q: %v", sc.Text(), err)
		}
		out = append(out, e)
	}
	return out
}

// TestPagesRefuseTheUnauthenticated checks the refusals: no session, a
// user outside the allowed groups, and a forged proxy header.
func TestPagesRefuseTheUnauthenticated(t *testing.T) {
	env := startPages(t)
	for _, tc := range []struct {
		name, path, accept string
		want               int
		location           string
	}{
		{"a browser is sent to sign in", "/patient/bed5-fall", "text/html", http.StatusSeeOther, "/signin?next=%2Fpatient%2Fbed5-fall"},
		{"a program is refused", "/explain/sha256:" + strings.Repeat("a", 64), "application/json", http.StatusUnauthorized, ""},
		{"the operations page too", "/operations", "", http.StatusUnauthorized, ""},
		{"a proxy header is not trusted here", "/", "application/json", http.StatusUnauthorized, ""},
	} {
		t.Run(tc.name, func(t *testing.T) {
			req, _ := http.NewRequest(http.MethodGet, env.base+tc.path, nil)
			req.Header.Set("Accept", tc.accept)
			req.Header.Set("X-Forwarded-User", "mallory")
			resp, err := env.client.Do(req)
			if err != nil {
				t.Fatal(err)
			}
			resp.Body.Close()
			if resp.StatusCode != tc.want || resp.Header.Get("Location") != tc.location {
				t.Errorf("status %d location %q, want %d %q", resp.StatusCode, resp.Header.Get("Location"), tc.want, tc.location)
			}
			if csp := resp.Header.Get("Content-Security-Policy"); !strings.Contains(csp, "default-src 'none'") {
				t.Errorf("no strict Content-Security-Policy on a refusal: %q", csp)
			}
		})
	}

	// In a real browser, a user the provider signs in but who is in no
	// allowed group sees no patient.
	ctx := browsertest.New(t, true)
	env.queueUser("visitors")
	if err := chromedp.Do(ctx, chromedp.Navigate(env.base+"/patient/bed5-fall"), chromedp.WaitReady(chromedp.CSS(`body`))); err != nil {
		t.Fatal(err)
	}
	body := mustText(t, ctx, "body")
	if !strings.Contains(body, "not in a group allowed") || strings.Contains(body, "bed5-fall") {
		t.Errorf("a user outside the allowed groups got: %q", body)
	}
	if entries := readAccessLog(t, env.access); len(entries) != 0 {
		t.Errorf("refused requests were logged as page views: %+v", entries)
	}
}

// TestPagesBehindAProxy checks the trusted user header: honoured from the
// configured proxy address, refused from anywhere else.
func TestPagesBehindAProxy(t *testing.T) {
	dir := t.TempDir()
	cfg := testConfig("", dir)
	cfg.Retention = 87600 * time.Hour
	for _, tc := range []struct {
		name    string
		trusted string
		want    int
	}{
		{"from the proxy", "127.0.0.1/32", http.StatusOK},
		{"from elsewhere", "10.0.0.0/8", http.StatusUnauthorized},
	} {
		t.Run(tc.name, func(t *testing.T) {
			c := cfg
			c.DataDir = t.TempDir()
			c.UI = serve.UIConfig{Listen: "127.0.0.1:0", UserHeader: "X-Remote-User", TrustedProxies: tc.trusted, SessionTTL: time.Hour}
			if err := c.Validate(); err != nil {
				t.Fatal(err)
			}
			s := start(t, c)
			req, _ := http.NewRequest(http.MethodGet, "http://"+s.svc.UIAddr()+"/", nil)
			req.Header.Set("X-Remote-User", "b.clinician")
			resp, err := http.DefaultClient.Do(req)
			if err != nil {
				t.Fatal(err)
			}
			resp.Body.Close()
			if resp.StatusCode != tc.want {
				t.Errorf("status %d, want %d", resp.StatusCode, tc.want)
			}
		})
	}
}

func TestUIConfigValidate(t *testing.T) {
	dir := t.TempDir()
	secretFile := filepath.Join(dir, "secret")
	if err := os.WriteFile(secretFile, []byte("s3cret\n"), 0o600); err != nil {
		t.Fatal(err)
	}
	keyFile := filepath.Join(dir, "session-key")
	if err := os.WriteFile(keyFile, []byte("Xq0bQ1r5mVwq3hJ0h7c2m9yP4kT8sW6zA1dF3gH5jK0=\n"), 0o600); err != nil {
		t.Fatal(err)
	}
	oidc := serve.UIConfig{
		Listen: "127.0.0.1:8443", OIDCIssuer: "https://idp.example/realms/h", OIDCClientID: "deadspace",
		OIDCRedirectURL: "https://deadspace.example:8443/signin/callback", OIDCClaim: "groups", OIDCAllowed: "icu-audit",
		SessionTTL: time.Hour,
	}
	for _, tc := range []struct {
		name   string
		edit   func(c *serve.Config)
		errHas string // "" means valid
	}{
		{"off by default", func(c *serve.Config) { c.UI = serve.UIConfig{} }, ""},
		{"OpenID Connect", func(c *serve.Config) { c.UI = oidc }, ""},
		{"client secret from a file", func(c *serve.Config) { c.UI = oidc; c.UI.OIDCSecretFile = secretFile }, ""},
		{"a proxy header", func(c *serve.Config) {
			c.UI = serve.UIConfig{Listen: "127.0.0.1:8443", UserHeader: "X-Remote-User", TrustedProxies: "127.0.0.1", SessionTTL: time.Hour}
		}, ""},
		{"no way to sign in", func(c *serve.Config) { c.UI = serve.UIConfig{Listen: "127.0.0.1:8443", SessionTTL: time.Hour} }, "needs a way to sign in"},
		{"both ways", func(c *serve.Config) { c.UI = oidc; c.UI.UserHeader = "X-User"; c.UI.TrustedProxies = "10.0.0.1" }, "not both"},
		{"no allowed groups", func(c *serve.Config) { c.UI = oidc; c.UI.OIDCAllowed = " , " }, "--ui-oidc-allowed"},
		{"a redirect elsewhere", func(c *serve.Config) { c.UI = oidc; c.UI.OIDCRedirectURL = "https://deadspace.example/" }, "/signin/callback"},
		{"a header without its proxies", func(c *serve.Config) {
			c.UI = serve.UIConfig{Listen: "127.0.0.1:8443", UserHeader: "X-Remote-User", SessionTTL: time.Hour}
		}, "--ui-trusted-proxies"},
		{"a bad proxy address", func(c *serve.Config) {
			c.UI = serve.UIConfig{Listen: "127.0.0.1:8443", UserHeader: "X-Remote-User", TrustedProxies: "proxy.local", SessionTTL: time.Hour}
		}, "not an address"},
		{"plain HTTP beyond loopback", func(c *serve.Config) { c.UI = oidc; c.UI.Listen = "0.0.0.0:8443" }, "needs --tls-cert"},
		{"an endless session", func(c *serve.Config) { c.UI = oidc; c.UI.SessionTTL = 30 * 24 * time.Hour }, "--ui-session-ttl"},
		{"a missing secret file", func(c *serve.Config) { c.UI = oidc; c.UI.OIDCSecretFile = filepath.Join(dir, "none") }, "--ui-oidc-client-secret-file"},
		{"a session key from a file", func(c *serve.Config) { c.UI = oidc; c.UI.SessionKeyFile = keyFile }, ""},
		{"a short session key", func(c *serve.Config) { c.UI = oidc; c.UI.SessionKeyFile = secretFile }, "fewer than 32"},
		{"a missing session key file", func(c *serve.Config) { c.UI = oidc; c.UI.SessionKeyFile = filepath.Join(dir, "none") }, "--ui-session-key-file"},
	} {
		t.Run(tc.name, func(t *testing.T) {
			c := testConfig("", dir)
			tc.edit(&c)
			err := c.Validate()
			switch {
			case tc.errHas == "" && err != nil:
				t.Errorf("unexpected error: %v", err)
			case tc.errHas != "" && (err == nil || !strings.Contains(err.Error(), tc.errHas)):
				t.Errorf("error %v, want one mentioning %q", err, tc.errHas)
			}
			if tc.name == "client secret from a file" && c.UI.OIDCClientSecret != "s3cret" {
				t.Errorf("client secret = %q", c.UI.OIDCClientSecret)
			}
		})
	}
}

// TestPagesExplainASupersededValue corrects a blood gas after its values
// were derived, and checks that the earlier value's key still opens its own
// explanation, marked superseded, with a link to the value that replaced
// it, and that the timeline shows it struck through.
func TestPagesExplainASupersededValue(t *testing.T) {
	c := testConfig("", t.TempDir())
	c.Retention = 87600 * time.Hour
	c.UI = serve.UIConfig{Listen: "127.0.0.1:0", UserHeader: "X-Remote-User", TrustedProxies: "127.0.0.1", SessionTTL: time.Hour}
	if err := c.Validate(); err != nil {
		t.Fatal(err)
	}
	s := start(t, c)
	ctx := context.Background()
	demo := "../../testdata/demo/"
	if _, err := submit.Run(ctx, submit.Options{Addr: s.svc.GRPCAddr()}, []string{demo + "Patient.ndjson", demo + "Observation.devices.ndjson"}); err != nil {
		t.Fatal(err)
	}
	gas, err := os.ReadFile(demo + "Observation.bloodgas.ndjson")
	if err != nil {
		t.Fatal(err)
	}
	var original string
	for _, line := range strings.Split(string(gas), "\n") {
		if strings.Contains(line, `"id":"bed5-fall-abg-2"`) {
			original = line
		}
	}
	if original == "" {
		t.Fatal("the demo has no bed5-fall-abg-2")
	}
	send := func(line string) {
		t.Helper()
		p := filepath.Join(t.TempDir(), "gas.ndjson")
		if err := os.WriteFile(p, []byte(line+"\n"), 0o644); err != nil {
			t.Fatal(err)
		}
		if _, err := submit.Run(ctx, submit.Options{Addr: s.svc.GRPCAddr()}, []string{p}); err != nil {
			t.Fatal(err)
		}
		if err := s.svc.Engine().EvaluateNow(ctx); err != nil {
			t.Fatal(err)
		}
	}
	var series string
	gradientKey := func() string {
		t.Helper()
		recs, err := s.svc.Engine().Derivations(ctx, "Patient/bed5-fall", time.Time{}, time.Unix(1<<40, 0), "", 1000)
		if err != nil {
			t.Fatal(err)
		}
		for _, r := range recs {
			if r.Code == derive.CodeGradient && r.EffectiveAt.Format("15:04") == "03:30" {
				series = r.Series
				return r.Key
			}
		}
		t.Fatal("no 03:30 gradient")
		return ""
	}
	send(original)
	before := gradientKey()
	// The laboratory corrects the PaCO2 from 38 to 41 mm[Hg].
	corrected := strings.Replace(original, `"value":38,`, `"value":41,`, 1)
	corrected = strings.Replace(corrected, `"versionId":"1","lastUpdated":"2026-03-15T03:32:00Z"`, `"versionId":"2","lastUpdated":"2026-03-15T04:10:00Z"`, 1)
	corrected = strings.Replace(corrected, `"status":"final"`, `"status":"corrected"`, 1)
	if corrected == original || !strings.Contains(corrected, `"value":41,`) {
		t.Fatal("the correction did not apply to the demo line")
	}
	send(corrected)
	after := gradientKey()
	if after == before {
		t.Fatal("the correction did not change the gradient's key")
	}

	get := func(path string) (int, string) {
		t.Helper()
		req, _ := http.NewRequest(http.MethodGet, "http://"+s.svc.UIAddr()+path, nil)
		req.Header.Set("X-Remote-User", "b.clinician")
		resp, err := http.DefaultClient.Do(req)
		if err != nil {
			t.Fatal(err)
		}
		defer resp.Body.Close()
		var b strings.Builder
		if _, err := io.Copy(&b, resp.Body); err != nil {
			t.Fatal(err)
		}
		return resp.StatusCode, b.String()
	}
	page := func(path string) string {
		t.Helper()
		code, body := get(path)
		if code != http.StatusOK {
			t.Fatalf("%s: status %d", path, code)
		}
		return body
	}
	// The earlier value, by its key and by its series and revision 1.
	for _, path := range []string{"/explain/" + before, "/explain/" + series + "?revision=1"} {
		old := page(path)
		for _, want := range []string{
			`<span class="status">superseded</span>`,
			`href="/explain/` + after + `"`, // the value that replaced it
			">16.0 mm[Hg]<",                 // the value as it was: 38 − 22
			"Observation/bed5-fall-abg-2/_history/1",
		} {
			if !strings.Contains(old, want) {
				t.Errorf("%s: the superseded explanation lacks %q", path, want)
			}
		}
	}
	// The current value, by its key and by its series and revision 2.
	for _, path := range []string{"/explain/" + after, "/explain/" + series + "?revision=2"} {
		if cur := page(path); !strings.Contains(cur, ">19.0 mm[Hg]<") || !strings.Contains(cur, "_history/2") || strings.Contains(cur, `<span class="status">superseded</span>`) {
			t.Errorf("%s: the current explanation does not show the corrected value 41 − 22 from version 2, unmarked", path)
		}
	}
	// Versions the series never had (standalone, nothing was written to a
	// server, so no server version names one).
	for _, q := range []string{"?revision=3", "?revision=0", "?revision=x", "?server-version=1"} {
		if code, _ := get("/explain/" + series + q); code != http.StatusNotFound {
			t.Errorf("/explain/{series}%s: status %d, want 404", q, code)
		}
	}
	if tl := page("/patient/bed5-fall"); !strings.Contains(tl, "Superseded and withdrawn values") || !strings.Contains(tl, `href="/explain/`+before+`"`) {
		t.Error("the timeline does not list the superseded value")
	}
}

// evaluationOnly are the demo's patients all of whose left-out inputs are
// left out by an evaluation (none refused or replaced on arrival, which the
// engine cannot attribute to a patient), so the live overview's counts must
// equal replay's.
var evaluationOnly = []string{"bed1-stable", "bed5-fall", "bed6-cooled", "bed7-child"}

// replayDemo replays the demo night with the service's settings, as
// `replay --html` does.
func replayDemo(t *testing.T) ui.Report {
	t.Helper()
	files, err := filepath.Glob(filepath.Join("..", "..", "testdata", "demo", "*.ndjson"))
	if err != nil || len(files) == 0 {
		t.Fatalf("the demo files: %v", err)
	}
	opts, err := testConfig("", t.TempDir()).Derivation.Resolve("test")
	if err != nil {
		t.Fatal(err)
	}
	rec := ui.NewRecorder()
	out, err := replay.Run(context.Background(), replay.Options{Derive: opts.Derive, Decode: opts.Decode, Encode: opts.Encode, Observe: rec.Add}, files)
	if err != nil {
		t.Fatal(err)
	}
	return ui.FromReplay(out, rec, opts.Derive, opts.Encode.Issued, "replay of the demo")
}
