// Package fhirtest runs the Node FHIR test peer (testdata/node/server.mjs, a wrapper around
// @medplum/fhir-router 5.2.13 and its in-memory repository) for Go tests. It is for tests only:
// nothing shipped may import it.
//
// [Start] gives a test its own server; [StartShared] gives every test in a binary the same one,
// because indexing the FHIR definitions costs about 1.5 s per process. Both skip the test when
// node or testdata/node/node_modules is missing, or under -short; with CI=true in the
// environment a missing prerequisite fails the test instead, since CI must have them
// (`npm ci` in testdata/node).
//
// The server speaks FHIR at BaseURL (…/fhir) and takes test controls (fault injection, down/up,
// counters) at ControlURL (…/__control); see the comment at the top of server.mjs.
//
// Behaviour of the peer that tests must allow for (measured with 5.2.13):
//   - ids and versionIds are UUIDs; decimals lose their formatting (40.0 is stored as 40);
//   - writes are not validated (an Observation without status is stored);
//   - an If-Match without quotes is ignored, so the write goes through;
//   - an If-None-Exist with an unknown parameter, or with a "Type?" prefix, matches nothing and
//     creates; a PUT to a new id creates with 200, not 201;
//   - transactions are not atomic; transaction-response entries carry status "201"/"200" and a
//     location without _history, and no etag; a replayed transaction whose Observation is
//     guarded by ifNoneExist still stores its Provenance again;
//   - Observation?value-quantity=... matches nothing; there is no type-level _history;
//   - instance _history reverses its stored list in place, so successive calls alternate
//     between newest-first and oldest-first.
//
// The wrapper adds ETag/Location/Last-Modified headers and searchset self/next links (with
// _offset), which the router alone does not produce.
package fhirtest

import (
	"bufio"
	"bytes"
	"encoding/json"
	"errors"
	"fmt"
	"io"
	"net/http"
	"net/url"
	"os"
	"os/exec"
	"path/filepath"
	"runtime"
	"strconv"
	"strings"
	"sync"
	"testing"
	"time"
)

// ReadyTimeout bounds the wait for the peer's ready line.
const ReadyTimeout = 30 * time.Second

// Server is a handle on a running peer, bound to one test for error reporting.
type Server struct {
	// BaseURL is the FHIR base, http://127.0.0.1:PORT/fhir, without a trailing slash.
	BaseURL string
	// ControlURL is the test-control base, http://127.0.0.1:PORT/__control.
	ControlURL string

	tb testing.TB
	p  *process
}

// errMissing marks a missing prerequisite (skip outside CI) as opposed to a peer that was
// found but failed (always a test failure).
var errMissing = errors.New("prerequisite missing")

// Start launches a dedicated peer for tb and stops it in tb.Cleanup.
func Start(tb testing.TB) *Server {
	tb.Helper()
	if testing.Short() {
		tb.Skip("fhirtest: FHIR test peer skipped under -short")
	}
	p, err := launch()
	if err != nil {
		skipOrFail(tb, err)
	}
	tb.Cleanup(func() {
		if tb.Failed() {
			tb.Logf("fhirtest: peer stderr (tail):\n%s", p.stderr.String())
		}
		p.stop()
	})
	return &Server{BaseURL: p.baseURL, ControlURL: p.controlURL, tb: tb, p: p}
}

var shared struct {
	mu  sync.Mutex
	p   *process
	err error
}

// StartShared returns a handle on the one peer of this test binary, starting it on first use.
// tb.Cleanup resets counters, faults and down on the shared peer (not its data), so tests that
// inject faults must not run in parallel with tests that use the same peer, and tests should
// use identifiers of their own. Stop it from TestMain:
//
//	func TestMain(m *testing.M) {
//		code := m.Run()
//		fhirtest.StopShared()
//		os.Exit(code)
//	}
//
// Without that the peer still exits when the test binary does, because it watches its stdin.
func StartShared(tb testing.TB) *Server {
	tb.Helper()
	if testing.Short() {
		tb.Skip("fhirtest: FHIR test peer skipped under -short")
	}
	shared.mu.Lock()
	if shared.p == nil && shared.err == nil {
		shared.p, shared.err = launch()
	} else if shared.p != nil && shared.p.exited() {
		shared.err = fmt.Errorf("shared peer exited; stderr tail:\n%s", shared.p.stderr.String())
		shared.p = nil
	}
	p, err := shared.p, shared.err
	shared.mu.Unlock()
	if err != nil {
		skipOrFail(tb, err)
	}
	s := &Server{BaseURL: p.baseURL, ControlURL: p.controlURL, tb: tb, p: p}
	tb.Cleanup(func() {
		if tb.Failed() {
			tb.Logf("fhirtest: shared peer stderr (tail):\n%s", p.stderr.String())
		}
		if !p.exited() {
			s.Reset()
		}
	})
	return s
}

// StopShared stops the shared peer if one was started. It is safe to call more than once.
func StopShared() {
	shared.mu.Lock()
	defer shared.mu.Unlock()
	if shared.p != nil {
		shared.p.stop()
		shared.p = nil
	}
}

func skipOrFail(tb testing.TB, err error) {
	tb.Helper()
	if errors.Is(err, errMissing) {
		Missing(tb, "fhirtest: %v", err)
	}
	tb.Fatalf("fhirtest: %v", err)
}

// InCI reports whether the tests run in CI (CI=true), where every peer and
// tool a test needs must be present.
func InCI() bool { return os.Getenv("CI") == "true" }

// Missing ends a test whose peer or tool is missing: it skips on a
// developer's machine and fails under CI=true, so CI can never pass a
// check it did not run. Every test that needs something outside Go calls
// it (or [Start]/[StartShared], which do).
func Missing(tb testing.TB, format string, args ...any) {
	tb.Helper()
	if InCI() {
		tb.Fatalf("missing under CI=true (.ci/test must install it): "+format, args...)
	}
	tb.Skipf(format, args...)
}

type process struct {
	cmd        *exec.Cmd
	stdin      io.WriteCloser
	stderr     *tailBuffer
	done       chan struct{}
	baseURL    string
	controlURL string
	stopOnce   sync.Once
}

func (p *process) exited() bool {
	select {
	case <-p.done:
		return true
	default:
		return false
	}
}

func (p *process) stop() {
	p.stopOnce.Do(func() {
		// Closing stdin lets the peer close its listener; the kill covers a peer that hangs.
		p.stdin.Close()
		select {
		case <-p.done:
		case <-time.After(2 * time.Second):
			_ = p.cmd.Process.Kill()
			<-p.done
		}
	})
}

// repoRoot walks up from the working directory (the test's package directory) to go.mod, and
// falls back to this source file's location for binaries run from elsewhere.
func repoRoot() (string, error) {
	var starts []string
	if wd, err := os.Getwd(); err == nil {
		starts = append(starts, wd)
	}
	if _, file, _, ok := runtime.Caller(0); ok && filepath.IsAbs(file) {
		starts = append(starts, filepath.Dir(file))
	}
	for _, dir := range starts {
		for d := dir; ; {
			if _, err := os.Stat(filepath.Join(d, "go.mod")); err == nil {
				if _, err := os.Stat(filepath.Join(d, "testdata", "node", "server.mjs")); err == nil {
					return d, nil
				}
			}
			parent := filepath.Dir(d)
			if parent == d {
				break
			}
			d = parent
		}
	}
	return "", fmt.Errorf("no go.mod with testdata/node/server.mjs above %v", starts)
}

func launch() (*process, error) {
	root, err := repoRoot()
	if err != nil {
		return nil, err
	}
	nodeDir := filepath.Join(root, "testdata", "node")
	if _, err := os.Stat(filepath.Join(nodeDir, "node_modules", "@medplum", "fhir-router", "package.json")); err != nil {
		return nil, fmt.Errorf("%w: %s has no node_modules/@medplum/fhir-router (run `npm ci` there)", errMissing, nodeDir)
	}
	node := os.Getenv("FHIRTEST_NODE")
	if node == "" {
		if node, err = exec.LookPath("node"); err != nil {
			return nil, fmt.Errorf("%w: node is not on PATH (or set FHIRTEST_NODE)", errMissing)
		}
	}

	// --experimental-websocket: @medplum/core needs a global WebSocket, which Node 20 only has
	// behind this flag; later Node versions accept the flag too.
	cmd := exec.Command(node, "--experimental-websocket", "server.mjs", "--port", "0", "--exit-with-stdin")
	cmd.Dir = nodeDir
	cmd.Env = append(os.Environ(), "NODE_NO_WARNINGS=1")
	stdin, err := cmd.StdinPipe()
	if err != nil {
		return nil, fmt.Errorf("stdin pipe: %w", err)
	}
	stdout, err := cmd.StdoutPipe()
	if err != nil {
		return nil, fmt.Errorf("stdout pipe: %w", err)
	}
	p := &process{cmd: cmd, stdin: stdin, stderr: &tailBuffer{max: 16 << 10}, done: make(chan struct{})}
	cmd.Stderr = p.stderr
	if err := cmd.Start(); err != nil {
		return nil, fmt.Errorf("starting %s: %w", node, err)
	}
	go func() {
		_ = cmd.Wait()
		close(p.done)
	}()

	type ready struct {
		Listening string `json:"listening"`
		Control   string `json:"control"`
	}
	readyc := make(chan ready, 1)
	go func() {
		br := bufio.NewReader(stdout)
		line, err := br.ReadBytes('\n')
		if err == nil {
			var r ready
			if json.Unmarshal(line, &r) == nil && r.Listening != "" {
				readyc <- r
			}
		}
		// Keep draining so a chatty peer never blocks on a full pipe.
		_, _ = io.Copy(io.Discard, br)
	}()

	timer := time.NewTimer(ReadyTimeout)
	defer timer.Stop()
	select {
	case r := <-readyc:
		p.baseURL = strings.TrimRight(r.Listening, "/")
		p.controlURL = strings.TrimRight(r.Control, "/")
		return p, nil
	case <-p.done:
		return nil, fmt.Errorf("peer exited before it was ready (%v); stderr tail:\n%s", cmd.ProcessState, p.stderr.String())
	case <-timer.C:
		p.stop()
		return nil, fmt.Errorf("peer not ready after %v; stderr tail:\n%s", ReadyTimeout, p.stderr.String())
	}
}

// tailBuffer keeps the last max bytes written to it.
type tailBuffer struct {
	mu  sync.Mutex
	max int
	b   []byte
}

func (t *tailBuffer) Write(p []byte) (int, error) {
	t.mu.Lock()
	defer t.mu.Unlock()
	t.b = append(t.b, p...)
	if len(t.b) > t.max {
		t.b = append([]byte(nil), t.b[len(t.b)-t.max:]...)
	}
	return len(p), nil
}

func (t *tailBuffer) String() string {
	t.mu.Lock()
	defer t.mu.Unlock()
	return string(t.b)
}

var httpClient = &http.Client{Timeout: 30 * time.Second}

func (s *Server) control(method, name string, q url.Values, out any) {
	s.tb.Helper()
	u := s.ControlURL + "/" + name
	if len(q) > 0 {
		u += "?" + q.Encode()
	}
	req, err := http.NewRequest(method, u, nil)
	if err != nil {
		s.tb.Fatalf("fhirtest: control %s: %v", name, err)
	}
	resp, err := httpClient.Do(req)
	if err != nil {
		s.tb.Fatalf("fhirtest: control %s: %v", name, err)
	}
	defer resp.Body.Close()
	body, err := io.ReadAll(resp.Body)
	if err != nil {
		s.tb.Fatalf("fhirtest: control %s: reading: %v", name, err)
	}
	if resp.StatusCode != http.StatusOK {
		s.tb.Fatalf("fhirtest: control %s: HTTP %d: %s", name, resp.StatusCode, body)
	}
	if out != nil {
		if err := json.Unmarshal(body, out); err != nil {
			s.tb.Fatalf("fhirtest: control %s: %v", name, err)
		}
	}
}

// Fault describes injected failures for [Server.Inject].
type Fault struct {
	// Status is the HTTP status to answer, 4xx or 5xx; 0 means 503.
	Status int
	// Count is how many FHIR requests get the fault; 0 means no count limit (then For must
	// be set).
	Count int
	// For limits the fault to a time window from now, rounded up to whole seconds; 0 means no
	// time limit. With both set, the fault ends at whichever limit comes first.
	For time.Duration
	// RetryAfter, when 0 or more, is sent as Retry-After; negative sends none.
	RetryAfter int
	// HTTPDate sends Retry-After as an HTTP-date RetryAfter seconds from now.
	HTTPDate bool
}

// Inject makes the peer answer FHIR requests with f.
func (s *Server) Inject(f Fault) {
	s.tb.Helper()
	q := url.Values{}
	status := f.Status
	if status == 0 {
		status = http.StatusServiceUnavailable
	}
	q.Set("status", strconv.Itoa(status))
	if f.Count > 0 {
		q.Set("count", strconv.Itoa(f.Count))
	}
	if f.For > 0 {
		q.Set("seconds", strconv.Itoa(int((f.For+time.Second-1)/time.Second)))
	}
	if f.RetryAfter >= 0 {
		q.Set("retryAfter", strconv.Itoa(f.RetryAfter))
	}
	if f.HTTPDate {
		q.Set("format", "date")
	}
	s.control(http.MethodPost, "fail", q, nil)
}

// Fail makes the next n FHIR requests answer status with Retry-After: retryAfter seconds; a
// negative retryAfter sends no Retry-After.
func (s *Server) Fail(n, status, retryAfter int) {
	s.tb.Helper()
	if n <= 0 {
		s.tb.Fatalf("fhirtest: Fail needs n > 0, got %d", n)
	}
	s.Inject(Fault{Status: status, Count: n, RetryAfter: retryAfter})
}

// Down makes the peer close the connection of every FHIR request without answering, which a
// client sees as a transport error. Control requests still work.
func (s *Server) Down() {
	s.tb.Helper()
	s.control(http.MethodPost, "down", url.Values{"mode": {"close"}}, nil)
}

// Unavailable makes the peer answer every FHIR request 503 without Retry-After until [Up].
func (s *Server) Unavailable() {
	s.tb.Helper()
	s.control(http.MethodPost, "down", url.Values{"mode": {"503"}}, nil)
}

// Up undoes [Server.Down] and [Server.Unavailable].
func (s *Server) Up() {
	s.tb.Helper()
	s.control(http.MethodPost, "up", nil, nil)
}

// Counts is what the peer received since the last reset.
type Counts struct {
	// Requests is keyed "METHOD kind", e.g. "GET read", "GET search", "POST create",
	// "POST transaction", "PUT update"; faulted and dropped requests are included.
	Requests map[string]int `json:"requests"`
	// Injected counts requests answered by an injected fault; Dropped those refused while down.
	Injected int `json:"injected"`
	Dropped  int `json:"dropped"`
}

// Total is the number of FHIR requests received.
func (c Counts) Total() int {
	n := 0
	for _, v := range c.Requests {
		n += v
	}
	return n
}

// Counts fetches the peer's counters.
func (s *Server) Counts() Counts {
	s.tb.Helper()
	var c Counts
	s.control(http.MethodGet, "counts", nil, &c)
	if c.Requests == nil {
		c.Requests = map[string]int{}
	}
	return c
}

// Reset clears counters, faults and down, keeping the stored resources.
func (s *Server) Reset() {
	s.tb.Helper()
	s.control(http.MethodPost, "reset", nil, nil)
}

// ResetData does what Reset does and also empties the repository. Do not use it on a shared
// peer while other tests may be running.
func (s *Server) ResetData() {
	s.tb.Helper()
	s.control(http.MethodPost, "reset", url.Values{"data": {"true"}}, nil)
}

// Do sends one FHIR request to BaseURL + "/" + path (path may carry a query) and returns the
// status, headers and body. body, when not nil, is sent as application/fhir+json.
func (s *Server) Do(tb testing.TB, method, path string, body []byte, header http.Header) (int, http.Header, []byte) {
	tb.Helper()
	var rd io.Reader
	if body != nil {
		rd = bytes.NewReader(body)
	}
	u := s.BaseURL + "/" + strings.TrimLeft(path, "/")
	if strings.HasPrefix(path, "http://") {
		u = path
	}
	req, err := http.NewRequest(method, u, rd)
	if err != nil {
		tb.Fatalf("fhirtest: %s %s: %v", method, path, err)
	}
	for k, vs := range header {
		req.Header[k] = vs
	}
	req.Header.Set("Accept", "application/fhir+json")
	if body != nil {
		req.Header.Set("Content-Type", "application/fhir+json")
	}
	resp, err := httpClient.Do(req)
	if err != nil {
		tb.Fatalf("fhirtest: %s %s: %v", method, path, err)
	}
	defer resp.Body.Close()
	b, err := io.ReadAll(resp.Body)
	if err != nil {
		tb.Fatalf("fhirtest: %s %s: reading: %v", method, path, err)
	}
	return resp.StatusCode, resp.Header, b
}

// Search runs query ("Observation?code=...") against the peer, follows next links, and
// returns every entry's resource. It uses plain net/http, not package client, so it can check
// that package independently.
func (s *Server) Search(tb testing.TB, query string) []json.RawMessage {
	tb.Helper()
	var out []json.RawMessage
	next := query
	for pages := 0; next != ""; pages++ {
		if pages > 1000 {
			tb.Fatalf("fhirtest: search %q: more than 1000 pages", query)
		}
		status, _, body := s.Do(tb, http.MethodGet, next, nil, nil)
		if status != http.StatusOK {
			tb.Fatalf("fhirtest: search %q: HTTP %d: %s", query, status, body)
		}
		var b struct {
			ResourceType string `json:"resourceType"`
			Link         []struct {
				Relation string `json:"relation"`
				URL      string `json:"url"`
			} `json:"link"`
			Entry []struct {
				Resource json.RawMessage `json:"resource"`
			} `json:"entry"`
		}
		if err := json.Unmarshal(body, &b); err != nil || b.ResourceType != "Bundle" {
			tb.Fatalf("fhirtest: search %q: not a Bundle (%v): %.200s", query, err, body)
		}
		for _, e := range b.Entry {
			out = append(out, e.Resource)
		}
		next = ""
		for _, l := range b.Link {
			if l.Relation == "next" {
				next = l.URL
			}
		}
	}
	return out
}

// Create POSTs resource (its resourceType picks the endpoint), requires 201, and returns the
// assigned id and versionId.
func (s *Server) Create(tb testing.TB, resource []byte) (id, version string) {
	tb.Helper()
	var r struct {
		ResourceType string `json:"resourceType"`
	}
	if err := json.Unmarshal(resource, &r); err != nil || r.ResourceType == "" {
		tb.Fatalf("fhirtest: Create: resource has no resourceType (%v)", err)
	}
	status, _, body := s.Do(tb, http.MethodPost, r.ResourceType, resource, nil)
	if status != http.StatusCreated {
		tb.Fatalf("fhirtest: Create %s: HTTP %d: %s", r.ResourceType, status, body)
	}
	var got struct {
		ID   string `json:"id"`
		Meta struct {
			VersionID string `json:"versionId"`
		} `json:"meta"`
	}
	if err := json.Unmarshal(body, &got); err != nil || got.ID == "" {
		tb.Fatalf("fhirtest: Create %s: no id in response (%v): %.200s", r.ResourceType, err, body)
	}
	return got.ID, got.Meta.VersionID
}
