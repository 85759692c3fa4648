// Package fakefhir is a small FHIR R4 server written in Go for tests: fast to
// start (no Node), deterministic, and able to misbehave on purpose. It is for
// tests only: nothing shipped may import it.
//
// It keeps every version of every resource in memory and implements the part
// of the RESTful API deadspace uses (https://hl7.org/fhir/R4/http.html):
//   - read, vread, create (POST, with If-None-Exist for conditional create),
//     update (PUT, with If-Match on W/"vid": 412 when the version moved),
//     delete (DELETE: a version that marks the resource deleted; a read of
//     it then answers 410 Gone, searches leave it out, and a PUT brings it
//     back with the next version);
//   - search with code, identifier, _tag, subject, url, _lastUpdated
//     (eq, gt, ge, lt, le), _count, sorted by _lastUpdated, with real
//     searchset next links; an unknown parameter under Prefer:
//     handling=strict is refused with 400;
//   - transaction and batch Bundles (POST then PUT then GET, urn:uuid
//     references resolved; a transaction is all or nothing);
//   - fault injection ([Server.Fail], [Server.Drop], [Server.Stall]): answer
//     a matching request with a status and Retry-After without doing it, do
//     it and drop the connection before answering (the answer is lost), or
//     hold the answer back (a slow server, or one that never answers);
//   - ignored search parameters ([Server.Ignore]): a parameter of a type
//     that the server leaves out of searches and of the conditions of
//     conditional creates, as servers do with parameters they do not
//     support, so a condition on it matches every resource of the type;
//   - answers without resources ([Server.OmitResources]): creates and
//     updates, alone or in a Bundle, answered with the location and ETag
//     only, as a server that ignores Prefer: return=representation does.
//
// ids are "f" and a seven-digit counter; versionIds count from 1; lastUpdated strictly
// increases, in milliseconds, so a _lastUpdated cursor is exact.
package fakefhir

import (
	"bufio"
	"bytes"
	"encoding/json"
	"fmt"
	"io"
	"net/http"
	"net/http/httptest"
	"net/url"
	"regexp"
	"sort"
	"strconv"
	"strings"
	"sync"
	"time"
)

// DefaultPageSize is the page size of a search without _count.
const DefaultPageSize = 50

type version struct {
	vid     string
	updated time.Time
	body    []byte // with id and meta set; nil for a deletion
	deleted bool
}

// Fault is a misbehaviour for requests whose method and path match.
type Fault struct {
	// Method is the HTTP method to match ("" matches any).
	Method string
	// Path is a prefix of the path below the base, e.g. "Observation" or "" for
	// a transaction; "*" matches every path.
	Path string
	// Status answers the request with this status without doing it.
	Status int
	// RetryAfter is sent as Retry-After with Status when set.
	RetryAfter string
	// Drop does the request, then closes the connection without answering.
	Drop bool
	// Delay holds the request this long before anything else (Status, Drop
	// or the request done as usual): a slow server, or with a long Delay one
	// that never answers. The wait ends early when the client gives up (the
	// request is then not done) or the server is closed.
	Delay time.Duration
	// Times is how many requests the fault applies to; 0 means every one.
	Times int
	// Text is the OperationOutcome diagnostics sent with Status; tests put
	// identifiers in it to check they never reach a log.
	Text string
}

// Request is one request the server received, for assertions.
type Request struct {
	Method, Path, Query string
	Header              http.Header
}

// Server is a running fake FHIR server.
type Server struct {
	// BaseURL is the FHIR base, http://127.0.0.1:PORT/fhir, without a trailing slash.
	BaseURL string

	ts *httptest.Server

	mu       sync.Mutex
	res      map[string]map[string][]version
	nextID   int
	last     time.Time
	faults   []*Fault
	requests []Request
	pageSize int
	ignored  map[string]bool // "type?name" of ignored search parameters
	minimal  bool            // creates and updates answered without the resource

	closing   chan struct{} // closed by Close: requests held by a Delay end
	closeOnce sync.Once
}

// Start runs a server until tb's cleanup.
func Start(tb interface {
	Helper()
	Cleanup(func())
}) *Server {
	tb.Helper()
	s := New()
	tb.Cleanup(s.Close)
	return s
}

// New runs a server; Close stops it.
func New() *Server {
	s := &Server{res: map[string]map[string][]version{}, pageSize: DefaultPageSize, closing: make(chan struct{})}
	s.ts = httptest.NewServer(http.HandlerFunc(s.serve))
	s.BaseURL = s.ts.URL + "/fhir"
	return s
}

// Close stops the server. Requests held by a Delay end at once,
// unanswered.
func (s *Server) Close() {
	s.closeOnce.Do(func() {
		close(s.closing)
		s.ts.Close()
	})
}

// SetPageSize sets the page size of searches without _count.
func (s *Server) SetPageSize(n int) {
	s.mu.Lock()
	defer s.mu.Unlock()
	s.pageSize = n
}

// Fail adds a fault that answers matching requests with status (and
// Retry-After when retryAfter is not empty) without doing them, times
// times (0: until ClearFaults).
func (s *Server) Fail(method, path string, status int, retryAfter string, times int) {
	s.addFault(&Fault{Method: method, Path: path, Status: status, RetryAfter: retryAfter, Times: times})
}

// Drop adds a fault that does matching requests and then drops the
// connection, so the client never sees the answer.
func (s *Server) Drop(method, path string, times int) {
	s.addFault(&Fault{Method: method, Path: path, Drop: true, Times: times})
}

// Stall adds a fault that holds matching requests for d before doing
// them (times times; 0: until ClearFaults): a slow server, or with a d
// longer than the client waits, one that never answers.
func (s *Server) Stall(method, path string, d time.Duration, times int) {
	s.addFault(&Fault{Method: method, Path: path, Delay: d, Times: times})
}

// Inject adds any fault.
func (s *Server) Inject(f Fault) { s.addFault(&f) }

// Ignore makes the server leave the search parameter name of typ out of
// searches and conditional creates from now on, even under Prefer:
// handling=strict: a condition on it alone matches every resource of typ.
func (s *Server) Ignore(typ, name string) {
	s.mu.Lock()
	defer s.mu.Unlock()
	if s.ignored == nil {
		s.ignored = map[string]bool{}
	}
	s.ignored[typ+"?"+name] = true
}

// OmitResources makes the server answer creates and updates from now on,
// alone or as entries of a Bundle, without the resource, whatever the
// client prefers: the Location (response.location) and ETag still name it.
// ClearFaults leaves it.
func (s *Server) OmitResources() {
	s.mu.Lock()
	defer s.mu.Unlock()
	s.minimal = true
}

func (s *Server) addFault(f *Fault) {
	s.mu.Lock()
	defer s.mu.Unlock()
	s.faults = append(s.faults, f)
}

// ClearFaults removes every fault and every ignored parameter.
func (s *Server) ClearFaults() {
	s.mu.Lock()
	defer s.mu.Unlock()
	s.faults = nil
	s.ignored = nil
}

// Requests returns the requests received so far, oldest first.
func (s *Server) Requests() []Request {
	s.mu.Lock()
	defer s.mu.Unlock()
	return append([]Request(nil), s.requests...)
}

// Count returns how many requests matched method and a path prefix.
func (s *Server) Count(method, pathPrefix string) int {
	n := 0
	for _, r := range s.Requests() {
		if (method == "" || r.Method == method) && strings.HasPrefix(r.Path, pathPrefix) {
			n++
		}
	}
	return n
}

// Put stores resource (which must carry resourceType) as a new resource or a
// new version of its id, as a server-side change would, and returns it as
// stored. Tests use it to change the server without going through HTTP.
func (s *Server) Put(resource []byte) (json.RawMessage, error) {
	s.mu.Lock()
	defer s.mu.Unlock()
	var head struct{ ResourceType, ID string }
	if err := json.Unmarshal(resource, &head); err != nil || head.ResourceType == "" {
		return nil, fmt.Errorf("fakefhir: not a resource: %v", err)
	}
	v, _, err := s.store(head.ResourceType, head.ID, resource)
	return v.body, err
}

// Delete deletes typ/id, as a server-side change would: a version that
// marks it deleted. It reports whether there was a resource to delete.
func (s *Server) Delete(typ, id string) bool {
	s.mu.Lock()
	defer s.mu.Unlock()
	return s.delete(typ, id)
}

func (s *Server) delete(typ, id string) bool {
	hist := s.res[typ][id]
	if len(hist) == 0 || hist[len(hist)-1].deleted {
		return false
	}
	s.res[typ][id] = append(hist, version{vid: strconv.Itoa(len(hist) + 1), updated: s.tick(), deleted: true})
	return true
}

// Current returns the current version of every resource of typ, in the
// order they were last updated (deleted resources left out).
func (s *Server) Current(typ string) []json.RawMessage {
	s.mu.Lock()
	defer s.mu.Unlock()
	var out []json.RawMessage
	for _, v := range s.sorted(typ) {
		out = append(out, v.body)
	}
	return out
}

// History returns every version of typ/id, oldest first, deletions left
// out.
func (s *Server) History(typ, id string) []json.RawMessage {
	s.mu.Lock()
	defer s.mu.Unlock()
	var out []json.RawMessage
	for _, v := range s.res[typ][id] {
		if !v.deleted {
			out = append(out, v.body)
		}
	}
	return out
}

func (s *Server) fault(r *http.Request, path string) *Fault {
	s.mu.Lock()
	defer s.mu.Unlock()
	for i, f := range s.faults {
		if f.Method != "" && f.Method != r.Method {
			continue
		}
		if f.Path != "*" && !strings.HasPrefix(path, f.Path) {
			continue
		}
		if f.Path == "" && path != "" {
			continue
		}
		if f.Times > 0 {
			f.Times--
			if f.Times == 0 {
				s.faults = append(s.faults[:i:i], s.faults[i+1:]...)
			}
		}
		return f
	}
	return nil
}

// answer is a response built under the lock and written after it.
type answer struct {
	status int
	header http.Header
	body   []byte
}

func outcome(status int, code, text string) answer {
	b, _ := json.Marshal(map[string]any{
		"resourceType": "OperationOutcome",
		"issue":        []any{map[string]any{"severity": "error", "code": code, "diagnostics": text}},
	})
	return answer{status: status, body: b}
}

func (s *Server) serve(w http.ResponseWriter, r *http.Request) {
	path, ok := strings.CutPrefix(r.URL.Path, "/fhir")
	if !ok {
		http.NotFound(w, r)
		return
	}
	path = strings.Trim(path, "/")
	body, _ := io.ReadAll(r.Body)
	s.mu.Lock()
	s.requests = append(s.requests, Request{Method: r.Method, Path: path, Query: r.URL.RawQuery, Header: r.Header.Clone()})
	s.mu.Unlock()

	f := s.fault(r, path)
	if f != nil && f.Delay > 0 {
		t := time.NewTimer(f.Delay)
		select {
		case <-t.C:
		case <-r.Context().Done():
			t.Stop()
			return
		case <-s.closing:
			t.Stop()
			return
		}
	}
	if f != nil && f.Status != 0 && !f.Drop {
		if f.RetryAfter != "" {
			w.Header().Set("Retry-After", f.RetryAfter)
		}
		text := f.Text
		if text == "" {
			text = "injected fault"
		}
		a := outcome(f.Status, "transient", text)
		w.Header().Set("Content-Type", "application/fhir+json")
		w.WriteHeader(a.status)
		_, _ = w.Write(a.body)
		return
	}
	a := s.handle(r, path, body)
	s.mu.Lock()
	if s.minimal && path != "" && (r.Method == http.MethodPost || r.Method == http.MethodPut) && a.status < 300 {
		a.body = nil
	}
	s.mu.Unlock()
	if f != nil && f.Drop {
		if hj, ok := w.(http.Hijacker); ok {
			if conn, _, err := hj.Hijack(); err == nil {
				conn.Close()
				return
			}
		}
	}
	for k, v := range a.header {
		w.Header()[k] = v
	}
	w.Header().Set("Content-Type", "application/fhir+json")
	w.WriteHeader(a.status)
	_, _ = w.Write(a.body)
}

var (
	typePattern = regexp.MustCompile(`^[A-Z][A-Za-z]{0,63}$`)
	idPattern   = regexp.MustCompile(`^[A-Za-z0-9\-.]{1,64}$`)
)

func (s *Server) handle(r *http.Request, path string, body []byte) answer {
	s.mu.Lock()
	defer s.mu.Unlock()
	parts := strings.Split(path, "/")
	if path == "" {
		if r.Method != http.MethodPost {
			return outcome(http.StatusMethodNotAllowed, "not-supported", "only POST at the base")
		}
		return s.bundle(body)
	}
	if !typePattern.MatchString(parts[0]) {
		return outcome(http.StatusNotFound, "not-found", "unknown path")
	}
	typ := parts[0]
	switch {
	case len(parts) == 1 && r.Method == http.MethodGet:
		return s.search(typ, r.URL.Query(), r.Header.Values("Prefer"))
	case len(parts) == 1 && r.Method == http.MethodPost:
		return s.create(typ, body, r.Header.Get("If-None-Exist"))
	case len(parts) == 2 && r.Method == http.MethodGet:
		return s.read(typ, parts[1], "")
	case len(parts) == 2 && r.Method == http.MethodPut:
		return s.update(typ, parts[1], body, r.Header.Get("If-Match"))
	case len(parts) == 2 && r.Method == http.MethodDelete:
		s.delete(typ, parts[1])
		return answer{status: http.StatusNoContent}
	case len(parts) == 4 && parts[2] == "_history" && r.Method == http.MethodGet:
		return s.read(typ, parts[1], parts[3])
	}
	return outcome(http.StatusMethodNotAllowed, "not-supported", "unsupported interaction")
}

// tick returns the next lastUpdated: now in milliseconds, strictly after the last.
func (s *Server) tick() time.Time {
	t := time.Now().UTC().Truncate(time.Millisecond)
	if !t.After(s.last) {
		t = s.last.Add(time.Millisecond)
	}
	s.last = t
	return t
}

// store writes a new version of typ/id (a new resource when id is empty or
// unknown) and reports whether it was created.
func (s *Server) store(typ, id string, resource []byte) (version, bool, error) {
	var m map[string]any
	if err := json.Unmarshal(resource, &m); err != nil {
		return version{}, false, err
	}
	if rt, _ := m["resourceType"].(string); rt != typ {
		return version{}, false, fmt.Errorf("resourceType %q is not %s", rt, typ)
	}
	if id == "" {
		s.nextID++
		id = fmt.Sprintf("f%07d", s.nextID)
	} else if !idPattern.MatchString(id) {
		return version{}, false, fmt.Errorf("invalid id")
	}
	if s.res[typ] == nil {
		s.res[typ] = map[string][]version{}
	}
	hist := s.res[typ][id]
	v := version{vid: strconv.Itoa(len(hist) + 1), updated: s.tick()}
	meta, _ := m["meta"].(map[string]any)
	if meta == nil {
		meta = map[string]any{}
	}
	meta["versionId"] = v.vid
	meta["lastUpdated"] = v.updated.Format("2006-01-02T15:04:05.000Z07:00")
	m["meta"] = meta
	m["id"] = id
	v.body, _ = json.Marshal(m)
	s.res[typ][id] = append(hist, v)
	return v, len(hist) == 0, nil
}

func (s *Server) resourceAnswer(status int, typ, id string, v version) answer {
	h := http.Header{}
	h.Set("ETag", `W/"`+v.vid+`"`)
	h.Set("Last-Modified", v.updated.Format(http.TimeFormat))
	if status == http.StatusCreated || status == http.StatusOK {
		h.Set("Location", s.BaseURL+"/"+typ+"/"+id+"/_history/"+v.vid)
	}
	return answer{status: status, header: h, body: v.body}
}

func (s *Server) read(typ, id, vid string) answer {
	hist := s.res[typ][id]
	if len(hist) == 0 {
		return outcome(http.StatusNotFound, "not-found", fmt.Sprintf("Resource %s/%s not found", typ, id))
	}
	v := hist[len(hist)-1]
	if vid != "" {
		n, err := strconv.Atoi(vid)
		if err != nil || n < 1 || n > len(hist) {
			return outcome(http.StatusNotFound, "not-found", fmt.Sprintf("Version %s of %s/%s not found", vid, typ, id))
		}
		v = hist[n-1]
	}
	if v.deleted {
		return outcome(http.StatusGone, "deleted", fmt.Sprintf("Resource %s/%s was deleted", typ, id))
	}
	return s.resourceAnswer(http.StatusOK, typ, id, v)
}

func (s *Server) create(typ string, body []byte, ifNoneExist string) answer {
	if ifNoneExist != "" {
		q, err := url.ParseQuery(strings.TrimPrefix(ifNoneExist, typ+"?"))
		if err != nil {
			return outcome(http.StatusBadRequest, "invalid", "bad If-None-Exist")
		}
		matches, err := s.match(typ, q, true)
		if err != nil {
			return outcome(http.StatusBadRequest, "invalid", err.Error())
		}
		switch len(matches) {
		case 0:
		case 1:
			return s.resourceAnswer(http.StatusOK, typ, idOf(matches[0].body), matches[0])
		default:
			return outcome(http.StatusPreconditionFailed, "duplicate", "If-None-Exist matches more than one resource")
		}
	}
	v, _, err := s.store(typ, "", stripID(body))
	if err != nil {
		return outcome(http.StatusBadRequest, "invalid", err.Error())
	}
	return s.resourceAnswer(http.StatusCreated, typ, idOf(v.body), v)
}

func (s *Server) update(typ, id string, body []byte, ifMatch string) answer {
	var head struct{ ResourceType, ID string }
	if err := json.Unmarshal(body, &head); err != nil || head.ID != id {
		return outcome(http.StatusBadRequest, "invalid", "the body's id does not match the URL")
	}
	hist := s.res[typ][id]
	if ifMatch != "" {
		want := strings.TrimSuffix(strings.TrimPrefix(strings.TrimPrefix(ifMatch, "W/"), `"`), `"`)
		if len(hist) == 0 || hist[len(hist)-1].vid != want {
			return outcome(http.StatusPreconditionFailed, "conflict", fmt.Sprintf("version %s is not the current version", want))
		}
	}
	v, created, err := s.store(typ, id, body)
	if err != nil {
		return outcome(http.StatusBadRequest, "invalid", err.Error())
	}
	status := http.StatusOK
	if created {
		status = http.StatusCreated
	}
	return s.resourceAnswer(status, typ, id, v)
}

func stripID(body []byte) []byte {
	var m map[string]any
	if json.Unmarshal(body, &m) != nil {
		return body
	}
	delete(m, "id")
	b, _ := json.Marshal(m)
	return b
}

func idOf(body []byte) string {
	var h struct{ ID string }
	_ = json.Unmarshal(body, &h)
	return h.ID
}

// sorted returns the current versions of typ by lastUpdated.
func (s *Server) sorted(typ string) []version {
	var out []version
	for _, hist := range s.res[typ] {
		if v := hist[len(hist)-1]; !v.deleted {
			out = append(out, v)
		}
	}
	sort.Slice(out, func(i, j int) bool { return out[i].updated.Before(out[j].updated) })
	return out
}

// match returns the current resources of typ that match every parameter.
func (s *Server) match(typ string, q url.Values, strict bool) ([]version, error) {
	var tests []func(map[string]any, version) bool
	for name, values := range q {
		if s.ignored[typ+"?"+name] {
			continue
		}
		switch name {
		case "_count", "_offset":
			continue
		case "_lastUpdated":
			for _, v := range values {
				t, err := lastUpdatedTest(v)
				if err != nil {
					return nil, err
				}
				tests = append(tests, func(_ map[string]any, ver version) bool { return t(ver.updated) })
			}
		case "code", "identifier", "_tag":
			for _, v := range values {
				tokens := strings.Split(v, ",")
				field := name
				tests = append(tests, func(m map[string]any, _ version) bool { return tokenMatch(m, field, tokens) })
			}
		case "version":
			for _, v := range values {
				want := v
				tests = append(tests, func(m map[string]any, _ version) bool { s, _ := m["version"].(string); return s == want })
			}
		case "subject", "patient", "url":
			for _, v := range values {
				field, want := name, v
				tests = append(tests, func(m map[string]any, _ version) bool { return referenceMatch(m, field, want) })
			}
		default:
			if strict {
				return nil, fmt.Errorf("unknown search parameter %q", name)
			}
		}
	}
	var out []version
	for _, v := range s.sorted(typ) {
		var m map[string]any
		_ = json.Unmarshal(v.body, &m)
		ok := true
		for _, t := range tests {
			if !t(m, v) {
				ok = false
				break
			}
		}
		if ok {
			out = append(out, v)
		}
	}
	return out, nil
}

func lastUpdatedTest(v string) (func(time.Time) bool, error) {
	prefix := "eq"
	if len(v) > 2 && v[0] >= 'a' && v[0] <= 'z' {
		prefix, v = v[:2], v[2:]
	}
	t, err := time.Parse(time.RFC3339Nano, v)
	if err != nil {
		return nil, fmt.Errorf("_lastUpdated: %w", err)
	}
	switch prefix {
	case "eq":
		return func(u time.Time) bool { return u.Equal(t) }, nil
	case "gt":
		return func(u time.Time) bool { return u.After(t) }, nil
	case "ge":
		return func(u time.Time) bool { return !u.Before(t) }, nil
	case "lt":
		return func(u time.Time) bool { return u.Before(t) }, nil
	case "le":
		return func(u time.Time) bool { return !u.After(t) }, nil
	}
	return nil, fmt.Errorf("_lastUpdated: unknown prefix %q", prefix)
}

// tokenMatch matches code (code.coding), identifier or _tag (meta.tag)
// against "system|code", "|code" or "code" tokens.
func tokenMatch(m map[string]any, field string, tokens []string) bool {
	var codings []any
	switch field {
	case "code":
		c, _ := m["code"].(map[string]any)
		codings, _ = c["coding"].([]any)
	case "identifier":
		codings, _ = m["identifier"].([]any)
	case "_tag":
		meta, _ := m["meta"].(map[string]any)
		codings, _ = meta["tag"].([]any)
	}
	for _, c := range codings {
		cm, _ := c.(map[string]any)
		system, _ := cm["system"].(string)
		code, _ := cm["code"].(string)
		if field == "identifier" {
			code, _ = cm["value"].(string)
		}
		for _, t := range tokens {
			sys, val, hasSys := strings.Cut(t, "|")
			if !hasSys {
				val = sys
			}
			if val == code && (!hasSys || sys == system) {
				return true
			}
		}
	}
	return false
}

func referenceMatch(m map[string]any, field, want string) bool {
	switch field {
	case "url":
		ch, _ := m["channel"].(map[string]any)
		endpoint, _ := ch["endpoint"].(string)
		u, _ := m["url"].(string)
		return endpoint == want || u == want
	default:
		s, _ := m["subject"].(map[string]any)
		ref, _ := s["reference"].(string)
		return ref == want || strings.HasSuffix(ref, "/"+want)
	}
}

func (s *Server) search(typ string, q url.Values, prefer []string) answer {
	strict := false
	for _, p := range prefer {
		if strings.Contains(p, "handling=strict") {
			strict = true
		}
	}
	matches, err := s.match(typ, q, strict)
	if err != nil {
		return outcome(http.StatusBadRequest, "invalid", err.Error())
	}
	count := s.pageSize
	if c, err := strconv.Atoi(q.Get("_count")); err == nil && c > 0 {
		count = c
	}
	offset, _ := strconv.Atoi(q.Get("_offset"))
	offset = max(0, min(offset, len(matches)))
	end := min(offset+count, len(matches))
	self := url.Values{}
	for k, v := range q {
		self[k] = v
	}
	link := func(off int) string {
		self.Set("_offset", strconv.Itoa(off))
		self.Set("_count", strconv.Itoa(count))
		return s.BaseURL + "/" + typ + "?" + self.Encode()
	}
	links := []any{map[string]any{"relation": "self", "url": link(offset)}}
	if end < len(matches) {
		links = append(links, map[string]any{"relation": "next", "url": link(end)})
	}
	entries := []any{}
	for _, v := range matches[offset:end] {
		entries = append(entries, map[string]any{
			"fullUrl":  s.BaseURL + "/" + typ + "/" + idOf(v.body),
			"resource": json.RawMessage(v.body),
			"search":   map[string]any{"mode": "match"},
		})
	}
	b, _ := json.Marshal(map[string]any{
		"resourceType": "Bundle", "type": "searchset", "total": len(matches), "link": links, "entry": entries,
	})
	return answer{status: http.StatusOK, body: b}
}

type bundleEntry struct {
	FullURL  string          `json:"fullUrl"`
	Resource json.RawMessage `json:"resource"`
	Request  struct {
		Method      string `json:"method"`
		URL         string `json:"url"`
		IfNoneExist string `json:"ifNoneExist"`
		IfMatch     string `json:"ifMatch"`
	} `json:"request"`
}

// bundle runs a transaction or batch. POSTs run first, then PUTs, then GETs
// (R4 http.html#trules); in a transaction, references to an entry's
// urn:uuid fullUrl are rewritten to the id it was given, and any failure
// undoes the whole Bundle.
func (s *Server) bundle(body []byte) answer {
	var b struct {
		ResourceType string        `json:"resourceType"`
		Type         string        `json:"type"`
		Entry        []bundleEntry `json:"entry"`
	}
	if err := json.Unmarshal(body, &b); err != nil || b.ResourceType != "Bundle" {
		return outcome(http.StatusBadRequest, "invalid", "not a Bundle")
	}
	if b.Type != "transaction" && b.Type != "batch" {
		return outcome(http.StatusBadRequest, "invalid", "Bundle.type must be transaction or batch")
	}
	tx := b.Type == "transaction"
	var snapshot map[string]map[string][]version
	if tx {
		snapshot = s.copyState()
	}
	answers := make([]answer, len(b.Entry))
	rewrite := map[string]string{}
	order := []string{http.MethodPost, http.MethodPut, http.MethodGet}
	for _, method := range order {
		for i, e := range b.Entry {
			if e.Request.Method != method {
				continue
			}
			res := []byte(e.Resource)
			if tx {
				for from, to := range rewrite {
					res = bytes.ReplaceAll(res, []byte(`"`+from+`"`), []byte(`"`+to+`"`))
				}
			}
			path := strings.Trim(strings.SplitN(e.Request.URL, "?", 2)[0], "/")
			parts := strings.Split(path, "/")
			var a answer
			switch {
			case method == http.MethodPost && len(parts) == 1:
				a = s.create(parts[0], res, e.Request.IfNoneExist)
				if tx && a.status < 300 && strings.HasPrefix(e.FullURL, "urn:uuid:") {
					rewrite[e.FullURL] = parts[0] + "/" + idOf(a.body)
				}
			case method == http.MethodPut && len(parts) == 2:
				a = s.update(parts[0], parts[1], res, e.Request.IfMatch)
			case method == http.MethodGet && len(parts) == 2:
				a = s.read(parts[0], parts[1], "")
			case method == http.MethodGet && len(parts) == 1:
				q, _ := url.ParseQuery(strings.SplitN(e.Request.URL+"?", "?", 2)[1])
				a = s.search(parts[0], q, nil)
			default:
				a = outcome(http.StatusBadRequest, "not-supported", "unsupported entry request")
			}
			if tx && a.status >= 300 {
				s.res = snapshot
				return a
			}
			answers[i] = a
		}
	}
	for i, e := range b.Entry {
		if answers[i].status == 0 {
			answers[i] = outcome(http.StatusBadRequest, "not-supported", "unsupported method "+e.Request.Method)
			if tx {
				s.res = snapshot
				return answers[i]
			}
		}
	}
	var entries []any
	for i, a := range answers {
		resp := map[string]any{"status": strconv.Itoa(a.status) + " " + http.StatusText(a.status)}
		if loc := a.header.Get("Location"); loc != "" {
			resp["location"] = strings.TrimPrefix(loc, s.BaseURL+"/")
		}
		if et := a.header.Get("ETag"); et != "" {
			resp["etag"] = et
		}
		entry := map[string]any{"response": resp}
		switch {
		case a.status < 300 && s.minimal && b.Entry[i].Request.Method != http.MethodGet:
		case a.status < 300:
			entry["resource"] = json.RawMessage(a.body)
		default:
			resp["outcome"] = json.RawMessage(a.body)
		}
		entries = append(entries, entry)
	}
	out, _ := json.Marshal(map[string]any{"resourceType": "Bundle", "type": b.Type + "-response", "entry": entries})
	return answer{status: http.StatusOK, body: out}
}

func (s *Server) copyState() map[string]map[string][]version {
	out := make(map[string]map[string][]version, len(s.res))
	for t, byID := range s.res {
		m := make(map[string][]version, len(byID))
		for id, hist := range byID {
			m[id] = append([]version(nil), hist...)
		}
		out[t] = m
	}
	return out
}

// Lines splits NDJSON into resources, for loading test data with Put.
func Lines(ndjson []byte) []json.RawMessage {
	var out []json.RawMessage
	sc := bufio.NewScanner(bytes.NewReader(ndjson))
	sc.Buffer(make([]byte, 1<<20), 1<<24)
	for sc.Scan() {
		if line := bytes.TrimSpace(sc.Bytes()); len(line) > 0 {
			out = append(out, append(json.RawMessage(nil), line...))
		}
	}
	return out
}
