// Package bulkfake is a FHIR Bulk Data export endpoint for tests, written
// to the Bulk Data Access IG 2.0.0 (https://hl7.org/fhir/uv/bulkdata/
// export.html): a kick-off answers 202 with Content-Location; the status URL
// answers 202 with Retry-After and X-Progress while the job runs, then 200
// with the manifest; DELETE cancels (and later polls answer 404 with an
// OperationOutcome). Options add the failures a client must survive or
// report: a 429 on kick-off or on a poll, an expired file URL, a job that
// fails with an OperationOutcome, a refused _typeFilter. It serves the
// resources it is given, filtered by _type, _since and (unless refused) a
// _typeFilter of Observation?code=... queries, and with _since a deleted
// file naming the resources it was told were deleted since.
//
// It is for tests only: nothing shipped may import it.
package bulkfake

import (
	"encoding/json"
	"fmt"
	"net/http"
	"net/http/httptest"
	"net/url"
	"sort"
	"strconv"
	"strings"
	"sync"
	"testing"
	"time"
)

// Options shape the endpoint's behaviour.
type Options struct {
	// Resources are served, one NDJSON file per type (or several, see
	// PerFile). Each must carry resourceType and may carry meta.lastUpdated
	// (for _since).
	Resources []json.RawMessage
	// PerFile splits a type's resources into files of at most this many
	// lines (0: one file per type).
	PerFile int
	// Token, when set, is the bearer token every kick-off, status, cancel
	// and (with RequiresAccessToken) file request must carry.
	Token string
	// RequiresAccessToken is the manifest's flag; files demand the token
	// only when it is true.
	RequiresAccessToken bool
	// Polls is how many 202 answers a job gives before it completes.
	Polls int
	// RetryAfter is the Retry-After of in-progress and 429 answers, in
	// seconds (default 1).
	RetryAfter int
	// KickOffBusy answers the first n kick-offs 429 (another export runs).
	KickOffBusy int
	// StatusThrottle answers the first n polls 429 (polling too often).
	StatusThrottle int
	// Fail makes the job fail after its polls: the status answers 500 with
	// an OperationOutcome carrying this text.
	Fail string
	// Expired makes every file URL answer 404 with an OperationOutcome.
	Expired bool
	// RefuseTypeFilter answers a kick-off with _typeFilter 400.
	RefuseTypeFilter bool
	// ErrorFile adds an error file with one OperationOutcome of this text.
	ErrorFile string
	// Deleted are resources deleted on the server. An export with _since
	// lists, in one deleted file, those of the exported types deleted after
	// it (or at an unknown time), each as a Bundle of type transaction
	// with one DELETE entry, as the IG shows it; without _since there is no
	// deleted file.
	Deleted []Deletion
	// DeletedLines are written to the deleted file as they are, after the
	// Deleted ones (an export with _since only): lines a server may get
	// wrong.
	DeletedLines []string
	// TransactionTime is the manifest's instant (default: now).
	TransactionTime time.Time
	// Hold, when set, keeps every job in progress until it is closed.
	Hold chan struct{}
}

// Deletion is a resource deleted on the server.
type Deletion struct {
	// Ref is "Type/id".
	Ref string
	// At is when it was deleted: zero for an unknown time (listed by
	// every export with _since).
	At time.Time
	// Stamp puts At in the entry as response.lastModified; the IG's
	// example entry carries only the request.
	Stamp bool
}

// Request is one request the endpoint received.
type Request struct {
	Method string
	Path   string
	Query  url.Values
	Header http.Header
}

// Server is a running endpoint.
type Server struct {
	// URL is the FHIR base: kick-off at URL+"/$export" and so on.
	URL  string
	opts Options
	srv  *httptest.Server

	mu       sync.Mutex
	requests []Request
	jobs     map[string]*job
	next     int
	kickoffs int
	polls    int
}

type job struct {
	polls     int
	deleted   bool
	files     map[string][]byte // name → NDJSON
	manifest  []byte
	request   string
	completed bool
}

// Start runs an endpoint for tb and closes it in tb.Cleanup.
func Start(tb testing.TB, opts Options) *Server {
	tb.Helper()
	if opts.RetryAfter == 0 {
		opts.RetryAfter = 1
	}
	s := &Server{opts: opts, jobs: make(map[string]*job)}
	mux := http.NewServeMux()
	mux.HandleFunc("GET /fhir/{$}", s.notFound)
	mux.HandleFunc("GET /fhir/$export", s.kickOff)
	mux.HandleFunc("GET /fhir/Patient/$export", s.kickOff)
	mux.HandleFunc("GET /fhir/Group/{id}/$export", s.kickOff)
	mux.HandleFunc("GET /jobs/{id}", s.status)
	mux.HandleFunc("DELETE /jobs/{id}", s.cancel)
	mux.HandleFunc("GET /files/{id}/{name}", s.file)
	s.srv = httptest.NewServer(s.record(mux))
	s.URL = s.srv.URL + "/fhir"
	tb.Cleanup(s.srv.Close)
	return s
}

// Requests returns what the endpoint received, in order.
func (s *Server) Requests() []Request {
	s.mu.Lock()
	defer s.mu.Unlock()
	return append([]Request(nil), s.requests...)
}

// Cancelled reports how many jobs were deleted by the client.
func (s *Server) Cancelled() int {
	s.mu.Lock()
	defer s.mu.Unlock()
	n := 0
	for _, j := range s.jobs {
		if j.deleted {
			n++
		}
	}
	return n
}

// Jobs reports how many exports were started.
func (s *Server) Jobs() int {
	s.mu.Lock()
	defer s.mu.Unlock()
	return len(s.jobs)
}

func (s *Server) record(h http.Handler) http.Handler {
	return http.HandlerFunc(func(w http.ResponseWriter, r *http.Request) {
		s.mu.Lock()
		s.requests = append(s.requests, Request{Method: r.Method, Path: r.URL.Path, Query: r.URL.Query(), Header: r.Header.Clone()})
		s.mu.Unlock()
		h.ServeHTTP(w, r)
	})
}

func outcome(w http.ResponseWriter, status int, code, text string) {
	w.Header().Set("Content-Type", "application/fhir+json")
	w.WriteHeader(status)
	b, _ := json.Marshal(map[string]any{
		"resourceType": "OperationOutcome",
		"issue":        []any{map[string]any{"severity": "error", "code": code, "details": map[string]any{"text": text}}},
	})
	_, _ = w.Write(b)
}

func (s *Server) notFound(w http.ResponseWriter, r *http.Request) {
	outcome(w, http.StatusNotFound, "not-found", "no such endpoint")
}

func (s *Server) authorized(w http.ResponseWriter, r *http.Request) bool {
	if s.opts.Token == "" || r.Header.Get("Authorization") == "Bearer "+s.opts.Token {
		return true
	}
	outcome(w, http.StatusUnauthorized, "login", "a valid access token is required")
	return false
}

// kickOff is the Bulk Data Kick-off Request.
func (s *Server) kickOff(w http.ResponseWriter, r *http.Request) {
	if !s.authorized(w, r) {
		return
	}
	if r.Header.Get("Prefer") != "respond-async" {
		outcome(w, http.StatusBadRequest, "invalid", "Prefer: respond-async is required")
		return
	}
	if a := r.Header.Get("Accept"); a != "" && a != "application/fhir+json" {
		outcome(w, http.StatusBadRequest, "invalid", "only application/fhir+json is supported for Accept")
		return
	}
	q := r.URL.Query()
	// _typeFilter is split on its literal commas before decoding: each
	// query is URL-encoded on its own, so commas inside one are %2C.
	var filters []string
	for _, kv := range strings.Split(r.URL.RawQuery, "&") {
		if v, ok := strings.CutPrefix(kv, "_typeFilter="); ok {
			filters = append(filters, v)
		}
	}
	if len(filters) > 0 && s.opts.RefuseTypeFilter {
		outcome(w, http.StatusBadRequest, "not-supported", "_typeFilter is not supported")
		return
	}
	s.mu.Lock()
	s.kickoffs++
	busy := s.kickoffs <= s.opts.KickOffBusy
	s.mu.Unlock()
	if busy {
		w.Header().Set("Retry-After", strconv.Itoa(s.opts.RetryAfter))
		outcome(w, http.StatusTooManyRequests, "throttled", "an export is already running")
		return
	}
	var since time.Time
	if v := q.Get("_since"); v != "" {
		t, err := time.Parse(time.RFC3339Nano, v)
		if err != nil {
			outcome(w, http.StatusBadRequest, "invalid", "_since is not an instant")
			return
		}
		since = t
	}
	types := map[string]bool{}
	for _, v := range q["_type"] {
		for _, t := range strings.Split(v, ",") {
			types[t] = true
		}
	}
	codes, err := codeFilters(filters)
	if err != nil {
		outcome(w, http.StatusBadRequest, "invalid", err.Error())
		return
	}
	byType := map[string][][]byte{}
	for _, raw := range s.opts.Resources {
		var head struct {
			ResourceType string `json:"resourceType"`
			Meta         struct {
				LastUpdated string `json:"lastUpdated"`
			} `json:"meta"`
			Code struct {
				Coding []struct{ System, Code string } `json:"coding"`
			} `json:"code"`
		}
		if err := json.Unmarshal(raw, &head); err != nil {
			continue
		}
		if len(types) > 0 && !types[head.ResourceType] {
			continue
		}
		if !since.IsZero() {
			if t, err := time.Parse(time.RFC3339Nano, head.Meta.LastUpdated); err == nil && !t.After(since) {
				continue
			}
		}
		if want, ok := codes[head.ResourceType]; ok {
			match := false
			for _, c := range head.Code.Coding {
				match = match || want[c.System+"|"+c.Code]
			}
			if !match {
				continue
			}
		}
		byType[head.ResourceType] = append(byType[head.ResourceType], raw)
	}
	s.mu.Lock()
	s.next++
	id := fmt.Sprintf("job-%d", s.next)
	j := &job{files: map[string][]byte{}, request: "http://" + r.Host + r.URL.RequestURI()}
	s.jobs[id] = j
	s.mu.Unlock()

	typeNames := make([]string, 0, len(byType))
	for t := range byType {
		typeNames = append(typeNames, t)
	}
	sort.Strings(typeNames)
	var output []map[string]any
	for _, t := range typeNames {
		lines := byType[t]
		per := s.opts.PerFile
		if per <= 0 {
			per = len(lines)
		}
		for part := 0; part*per < len(lines); part++ {
			chunk := lines[part*per : min((part+1)*per, len(lines))]
			name := fmt.Sprintf("%s-%d.ndjson", t, part+1)
			var b strings.Builder
			for _, l := range chunk {
				b.Write(l)
				b.WriteByte('\n')
			}
			j.files[name] = []byte(b.String())
			output = append(output, map[string]any{"type": t, "url": s.srv.URL + "/files/" + id + "/" + name, "count": len(chunk)})
		}
	}
	deletedFiles := []map[string]any{}
	if !since.IsZero() {
		var b strings.Builder
		n := 0
		for _, d := range s.opts.Deleted {
			typ, _, _ := strings.Cut(d.Ref, "/")
			if (len(types) > 0 && !types[typ]) || (!d.At.IsZero() && !d.At.After(since)) {
				continue
			}
			entry := map[string]any{"request": map[string]any{"method": "DELETE", "url": d.Ref}}
			if d.Stamp {
				entry["response"] = map[string]any{"status": "204", "lastModified": d.At.UTC().Format(time.RFC3339Nano)}
			}
			line, _ := json.Marshal(map[string]any{"resourceType": "Bundle", "type": "transaction", "entry": []any{entry}})
			b.Write(line)
			b.WriteByte('\n')
			n++
		}
		for _, l := range s.opts.DeletedLines {
			b.WriteString(l)
			b.WriteByte('\n')
			n++
		}
		if n > 0 {
			j.files["deleted.ndjson"] = []byte(b.String())
			deletedFiles = append(deletedFiles, map[string]any{"type": "Bundle", "url": s.srv.URL + "/files/" + id + "/deleted.ndjson", "count": n})
		}
	}
	errorFiles := []map[string]any{}
	if s.opts.ErrorFile != "" {
		b, _ := json.Marshal(map[string]any{"resourceType": "OperationOutcome", "issue": []any{map[string]any{"severity": "warning", "code": "processing", "diagnostics": s.opts.ErrorFile}}})
		j.files["errors.ndjson"] = append(b, '\n')
		errorFiles = append(errorFiles, map[string]any{"type": "OperationOutcome", "url": s.srv.URL + "/files/" + id + "/errors.ndjson"})
	}
	tt := s.opts.TransactionTime
	if tt.IsZero() {
		tt = time.Now().UTC().Truncate(time.Second)
	}
	if output == nil {
		output = []map[string]any{}
	}
	j.manifest, _ = json.Marshal(map[string]any{
		"transactionTime": tt.Format(time.RFC3339), "request": j.request,
		"requiresAccessToken": s.opts.RequiresAccessToken, "output": output, "deleted": deletedFiles, "error": errorFiles,
		"extension": map[string]any{"https://deadspace.invalid/test": true},
	})
	w.Header().Set("Content-Location", s.srv.URL+"/jobs/"+id)
	w.Header().Set("Content-Type", "application/fhir+json")
	w.WriteHeader(http.StatusAccepted)
	_, _ = w.Write([]byte(`{"resourceType":"OperationOutcome","issue":[{"severity":"information","code":"informational","diagnostics":"export accepted"}]}`))
}

// codeFilters reads raw _typeFilter values: URL-encoded queries of the
// form Observation?code=system|code,system|code joined by literal commas. Other queries are refused: this endpoint knows
// only the code parameter.
func codeFilters(values []string) (map[string]map[string]bool, error) {
	out := map[string]map[string]bool{}
	for _, v := range values {
		for _, enc := range strings.Split(v, ",") {
			qs, err := url.QueryUnescape(enc)
			if err != nil {
				return nil, fmt.Errorf("_typeFilter: %w", err)
			}
			typ, query, ok := strings.Cut(qs, "?")
			if !ok {
				return nil, fmt.Errorf("_typeFilter %q has no query", qs)
			}
			params, err := url.ParseQuery(query)
			if err != nil {
				return nil, fmt.Errorf("_typeFilter: %w", err)
			}
			for k, vs := range params {
				if k != "code" {
					return nil, fmt.Errorf("_typeFilter parameter %q is not supported", k)
				}
				if out[typ] == nil {
					out[typ] = map[string]bool{}
				}
				for _, v := range vs {
					for _, c := range strings.Split(v, ",") {
						out[typ][c] = true
					}
				}
			}
		}
	}
	return out, nil
}

// status is the Bulk Data Status Request.
func (s *Server) status(w http.ResponseWriter, r *http.Request) {
	if !s.authorized(w, r) {
		return
	}
	s.mu.Lock()
	j := s.jobs[r.PathValue("id")]
	s.polls++
	throttled := s.polls <= s.opts.StatusThrottle
	s.mu.Unlock()
	if j == nil || j.deleted {
		outcome(w, http.StatusNotFound, "not-found", "no such export job")
		return
	}
	if throttled {
		w.Header().Set("Retry-After", strconv.Itoa(s.opts.RetryAfter))
		outcome(w, http.StatusTooManyRequests, "throttled", "polling too often")
		return
	}
	held := false
	if s.opts.Hold != nil {
		select {
		case <-s.opts.Hold:
		default:
			held = true
		}
	}
	s.mu.Lock()
	running := held || j.polls < s.opts.Polls
	if running {
		j.polls++
	}
	done := j.polls
	s.mu.Unlock()
	if running {
		w.Header().Set("Retry-After", strconv.Itoa(s.opts.RetryAfter))
		pct := 100 * done / max(s.opts.Polls+1, 1)
		w.Header().Set("X-Progress", fmt.Sprintf("%d%% complete", min(pct, 99)))
		w.WriteHeader(http.StatusAccepted)
		return
	}
	if s.opts.Fail != "" {
		outcome(w, http.StatusInternalServerError, "processing", s.opts.Fail)
		return
	}
	s.mu.Lock()
	j.completed = true
	s.mu.Unlock()
	w.Header().Set("Content-Type", "application/json")
	w.Header().Set("Expires", time.Now().Add(time.Hour).UTC().Format(http.TimeFormat))
	_, _ = w.Write(j.manifest)
}

// cancel is the Bulk Data Delete Request.
func (s *Server) cancel(w http.ResponseWriter, r *http.Request) {
	if !s.authorized(w, r) {
		return
	}
	s.mu.Lock()
	j := s.jobs[r.PathValue("id")]
	gone := j == nil || j.deleted
	if !gone {
		j.deleted = true
	}
	s.mu.Unlock()
	if gone {
		outcome(w, http.StatusNotFound, "not-found", "no such export job")
		return
	}
	w.Header().Set("Content-Type", "application/fhir+json")
	w.WriteHeader(http.StatusAccepted)
	_, _ = w.Write([]byte(`{"resourceType":"OperationOutcome","issue":[{"severity":"information","code":"informational","diagnostics":"export deleted"}]}`))
}

// file is the Bulk Data Output File Request.
func (s *Server) file(w http.ResponseWriter, r *http.Request) {
	if s.opts.RequiresAccessToken && !s.authorized(w, r) {
		return
	}
	if s.opts.Expired {
		outcome(w, http.StatusNotFound, "not-found", "the file has expired")
		return
	}
	s.mu.Lock()
	j := s.jobs[r.PathValue("id")]
	var body []byte
	ok := false
	if j != nil && j.completed {
		body, ok = j.files[r.PathValue("name")]
	}
	s.mu.Unlock()
	if !ok {
		outcome(w, http.StatusNotFound, "not-found", "no such file")
		return
	}
	w.Header().Set("Content-Type", "application/fhir+ndjson")
	_, _ = w.Write(body)
}
