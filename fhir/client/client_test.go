package client_test

import (
	"bytes"
	"context"
	"encoding/json"
	"errors"
	"fmt"
	"io"
	"log/slog"
	"net"
	"net/http"
	"net/http/httptest"
	"net/url"
	"slices"
	"strings"
	"sync"
	"testing"
	"time"

	"github.com/deadspace-fhir/deadspace/fhir/client"
)

// sleeper records the waits the client asks for instead of sleeping, so no test depends on
// wall-clock timing.
type sleeper struct {
	mu    sync.Mutex
	waits []time.Duration
	// onSleep, if set, runs inside Sleep (e.g. to cancel the context).
	onSleep func()
}

func (s *sleeper) Sleep(ctx context.Context, d time.Duration) error {
	s.mu.Lock()
	s.waits = append(s.waits, d)
	f := s.onSleep
	s.mu.Unlock()
	if f != nil {
		f()
	}
	return ctx.Err()
}

func (s *sleeper) Waits() []time.Duration {
	s.mu.Lock()
	defer s.mu.Unlock()
	return slices.Clone(s.waits)
}

// reply is one scripted HTTP answer.
type reply struct {
	status int
	header map[string]string
	body   string
	// hangup closes the connection without answering.
	hangup bool
}

// script serves replies in order (the last one repeats) and records each request.
type script struct {
	t       *testing.T
	mu      sync.Mutex
	replies []reply
	reqs    []*http.Request
	bodies  [][]byte
}

func (s *script) ServeHTTP(w http.ResponseWriter, r *http.Request) {
	b, _ := io.ReadAll(r.Body)
	s.mu.Lock()
	i := len(s.reqs)
	s.reqs = append(s.reqs, r)
	s.bodies = append(s.bodies, b)
	rp := s.replies[min(i, len(s.replies)-1)]
	s.mu.Unlock()
	if rp.hangup {
		hj, ok := w.(http.Hijacker)
		if !ok {
			s.t.Fatal("cannot hijack")
		}
		conn, _, err := hj.Hijack()
		if err == nil {
			conn.Close()
		}
		return
	}
	for k, v := range rp.header {
		w.Header().Set(k, v)
	}
	if w.Header().Get("Content-Type") == "" {
		w.Header().Set("Content-Type", "application/fhir+json")
	}
	w.WriteHeader(rp.status)
	io.WriteString(w, rp.body)
}

func (s *script) count() int {
	s.mu.Lock()
	defer s.mu.Unlock()
	return len(s.reqs)
}

func newScript(t *testing.T, replies ...reply) (*script, *httptest.Server) {
	t.Helper()
	sc := &script{t: t, replies: replies}
	srv := httptest.NewServer(sc)
	t.Cleanup(srv.Close)
	return sc, srv
}

// newClient builds a client with a recording sleeper and a jitter that returns its ceiling, so
// backoff waits are the deterministic upper bounds of the schedule.
func newClient(t *testing.T, base string, mod func(*client.Config)) (*client.Client, *sleeper) {
	t.Helper()
	sl := &sleeper{}
	cfg := client.Config{
		BaseURL:     base,
		MaxRetries:  3,
		BackoffBase: 100 * time.Millisecond,
		BackoffMax:  time.Second,
		Sleep:       sl.Sleep,
		Jitter:      func(ceil time.Duration) time.Duration { return ceil },
	}
	if mod != nil {
		mod(&cfg)
	}
	c, err := client.New(cfg)
	if err != nil {
		t.Fatal(err)
	}
	return c, sl
}

const obsBody = `{"resourceType":"Observation","id":"o1","meta":{"versionId":"3","lastUpdated":"2025-03-01T10:15:00Z"},"status":"final","code":{"text":"x"}}`

func outcomeBody(code, diagnostics string) string {
	return fmt.Sprintf(`{"resourceType":"OperationOutcome","issue":[{"severity":"error","code":%q,"diagnostics":%q}]}`, code, diagnostics)
}

// Retry-After handling follows RFC 9110 §10.2.3 (delay-seconds or HTTP-date); R4 http.html
// gives 429/503 no extra meaning beyond HTTP's.
func TestRetries(t *testing.T) {
	now := time.Date(2025, 3, 1, 10, 0, 0, 0, time.UTC)
	cases := []struct {
		name      string
		replies   []reply
		wantWaits []time.Duration
		wantErr   error // nil: success expected
		wantHits  int
	}{
		{
			name:      "429 with Retry-After seconds is honoured exactly",
			replies:   []reply{{status: 429, header: map[string]string{"Retry-After": "3"}, body: outcomeBody("throttled", "slow down")}, {status: 200, body: obsBody}},
			wantWaits: []time.Duration{3 * time.Second},
			wantHits:  2,
		},
		{
			name:      "503 with Retry-After HTTP-date waits until that date",
			replies:   []reply{{status: 503, header: map[string]string{"Retry-After": now.Add(90 * time.Second).Format(http.TimeFormat)}}, {status: 200, body: obsBody}},
			wantWaits: []time.Duration{90 * time.Second},
			wantHits:  2,
		},
		{
			name:      "HTTP-date in the past retries at once",
			replies:   []reply{{status: 503, header: map[string]string{"Retry-After": now.Add(-time.Hour).Format(http.TimeFormat)}}, {status: 200, body: obsBody}},
			wantWaits: []time.Duration{0},
			wantHits:  2,
		},
		{
			name:      "Retry-After above the cap is capped",
			replies:   []reply{{status: 429, header: map[string]string{"Retry-After": "86400"}}, {status: 200, body: obsBody}},
			wantWaits: []time.Duration{2 * time.Minute},
			wantHits:  2,
		},
		{
			name:      "503 without Retry-After backs off exponentially up to the max",
			replies:   []reply{{status: 503}, {status: 503}, {status: 503}, {status: 503}},
			wantWaits: []time.Duration{100 * time.Millisecond, 200 * time.Millisecond, 400 * time.Millisecond},
			wantErr:   client.ErrUnavailable,
			wantHits:  4,
		},
		{
			name:      "unreadable Retry-After falls back to backoff",
			replies:   []reply{{status: 429, header: map[string]string{"Retry-After": "soon"}}, {status: 200, body: obsBody}},
			wantWaits: []time.Duration{100 * time.Millisecond},
			wantHits:  2,
		},
		{
			name:      "500 on a read is retried",
			replies:   []reply{{status: 500, body: outcomeBody("exception", "db")}, {status: 200, body: obsBody}},
			wantWaits: []time.Duration{100 * time.Millisecond},
			wantHits:  2,
		},
		{
			name:     "400 is not retried",
			replies:  []reply{{status: 400, body: outcomeBody("invalid", "bad _lastUpdated")}},
			wantErr:  client.ErrBadRequest,
			wantHits: 1,
		},
		{
			name:     "404 is not retried",
			replies:  []reply{{status: 404, body: outcomeBody("not-found", "gone fishing")}},
			wantErr:  client.ErrNotFound,
			wantHits: 1,
		},
		{
			name:      "lost response on a read is retried",
			replies:   []reply{{hangup: true}, {status: 200, body: obsBody}},
			wantWaits: []time.Duration{100 * time.Millisecond},
			wantHits:  2,
		},
	}
	for _, tc := range cases {
		t.Run(tc.name, func(t *testing.T) {
			sc, srv := newScript(t, tc.replies...)
			c, sl := newClient(t, srv.URL, func(cfg *client.Config) {
				cfg.Now = func() time.Time { return now }
				cfg.MaxRetryAfter = 2 * time.Minute
			})
			_, m, err := c.Read(context.Background(), "Observation", "o1")
			if tc.wantErr == nil {
				if err != nil {
					t.Fatalf("Read: %v", err)
				}
				if m.ID != "o1" || m.VersionID != "3" {
					t.Errorf("meta = %+v", m)
				}
			} else if !errors.Is(err, tc.wantErr) {
				t.Fatalf("Read error %v, want %v", err, tc.wantErr)
			}
			if got := sl.Waits(); !slices.Equal(got, tc.wantWaits) {
				t.Errorf("waits = %v, want %v", got, tc.wantWaits)
			}
			if sc.count() != tc.wantHits {
				t.Errorf("server saw %d requests, want %d", sc.count(), tc.wantHits)
			}
		})
	}
}

func TestErrorCarriesOutcome(t *testing.T) {
	cases := []struct {
		name        string
		reply       reply
		wantStatus  int
		wantOutcome string
		wantCode    string
		wantSent    error
	}{
		{
			name:        "diagnostics of a FHIR OperationOutcome",
			reply:       reply{status: 400, body: outcomeBody("invalid", "Unknown search parameter: foo")},
			wantStatus:  400,
			wantOutcome: "Unknown search parameter: foo",
			wantCode:    "invalid",
			wantSent:    client.ErrBadRequest,
		},
		{
			name:        "details.text when there are no diagnostics",
			reply:       reply{status: 412, body: `{"resourceType":"OperationOutcome","issue":[{"severity":"error","code":"processing","details":{"text":"Precondition Failed"}}]}`},
			wantStatus:  412,
			wantOutcome: "Precondition Failed",
			wantCode:    "processing",
			wantSent:    client.ErrPreconditionFailed,
		},
		{
			name:        "plain JSON content type is read as FHIR JSON",
			reply:       reply{status: 422, header: map[string]string{"Content-Type": "application/json"}, body: outcomeBody("business-rule", "rule")},
			wantStatus:  422,
			wantOutcome: "rule",
			wantCode:    "business-rule",
			wantSent:    client.ErrUnprocessable,
		},
		{
			name:        "HTML from a proxy gives a cleaned prefix",
			reply:       reply{status: 403, header: map[string]string{"Content-Type": "text/html"}, body: "<html>\n<body>\tForbidden\n</body></html>"},
			wantStatus:  403,
			wantOutcome: "<html> <body> Forbidden </body></html>",
			wantSent:    client.ErrForbidden,
		},
		{
			name:        "an OperationOutcome sent as text/plain is not parsed",
			reply:       reply{status: 409, header: map[string]string{"Content-Type": "text/plain"}, body: `{"resourceType":"OperationOutcome"}`},
			wantStatus:  409,
			wantOutcome: `{"resourceType":"OperationOutcome"}`,
			wantSent:    client.ErrConflict,
		},
	}
	for _, tc := range cases {
		t.Run(tc.name, func(t *testing.T) {
			_, srv := newScript(t, tc.reply)
			c, _ := newClient(t, srv.URL, nil)
			_, _, err := c.Read(context.Background(), "Observation", "o1")
			var fe *client.Error
			if !errors.As(err, &fe) {
				t.Fatalf("error %v is not a *client.Error", err)
			}
			if fe.Status != tc.wantStatus || fe.Outcome != tc.wantOutcome || fe.Code != tc.wantCode || fe.Retryable {
				t.Errorf("got status %d outcome %q code %q retryable %v", fe.Status, fe.Outcome, fe.Code, fe.Retryable)
			}
			if !errors.Is(err, tc.wantSent) {
				t.Errorf("errors.Is(%v, %v) is false", err, tc.wantSent)
			}
			if errors.Is(err, client.ErrNotFound) && tc.wantStatus != 404 {
				t.Errorf("error matches ErrNotFound for status %d", tc.wantStatus)
			}
		})
	}
}

// A plain POST may already have been applied when its response is lost, so Create retries
// only what proves the server did nothing: 429/503 and failures to connect.
func TestCreateRetriesOnlyWhenNothingWasStored(t *testing.T) {
	cases := []struct {
		name     string
		replies  []reply
		wantHits int
		wantErr  error
	}{
		{"lost response is not retried", []reply{{hangup: true}, {status: 201, body: obsBody}}, 1, client.ErrNetwork},
		{"502 is not retried", []reply{{status: 502, header: map[string]string{"Content-Type": "text/html"}, body: "<h1>Bad gateway</h1>"}, {status: 201, body: obsBody}}, 1, nil},
		{"429 is retried", []reply{{status: 429, header: map[string]string{"Retry-After": "1"}}, {status: 201, body: obsBody}}, 2, nil},
	}
	for _, tc := range cases {
		t.Run(tc.name, func(t *testing.T) {
			sc, srv := newScript(t, tc.replies...)
			c, _ := newClient(t, srv.URL, nil)
			_, m, err := c.Create(context.Background(), "Observation", []byte(`{"resourceType":"Observation","status":"final","code":{}}`))
			if sc.count() != tc.wantHits {
				t.Errorf("server saw %d requests, want %d", sc.count(), tc.wantHits)
			}
			switch {
			case tc.wantErr != nil && !errors.Is(err, tc.wantErr):
				t.Errorf("error %v, want %v", err, tc.wantErr)
			case tc.wantHits == 2 && (err != nil || m.Status != 201):
				t.Errorf("got %+v, %v; want a 201", m, err)
			case tc.wantHits == 1 && err == nil:
				t.Errorf("want an error")
			}
		})
	}
}

func TestNetworkErrors(t *testing.T) {
	// A port that was just closed: dialling fails, so even Create may retry.
	ln, err := net.Listen("tcp", "127.0.0.1:0")
	if err != nil {
		t.Fatal(err)
	}
	addr := ln.Addr().String()
	ln.Close()

	c, sl := newClient(t, "http://"+addr+"/fhir", nil)
	q := url.Values{"subject": {"Patient/secret-patient-42"}}
	err = c.Search(context.Background(), "Observation", q, func(json.RawMessage) error { return nil })
	var fe *client.Error
	if !errors.As(err, &fe) || !errors.Is(err, client.ErrNetwork) || !fe.Retryable || fe.Attempts != 4 {
		t.Fatalf("Search error %v (%+v), want a retryable network error after 4 attempts", err, fe)
	}
	if len(sl.Waits()) != 3 {
		t.Errorf("waits %v, want 3", sl.Waits())
	}
	// The dial error names host:port, which is fine; the query must not appear.
	if strings.Contains(err.Error(), "secret-patient-42") || strings.Contains(err.Error(), "subject") {
		t.Errorf("error message leaks the URL: %v", err)
	}

	_, _, err = c.Create(context.Background(), "Observation", []byte(`{"resourceType":"Observation"}`))
	if !errors.As(err, &fe) || fe.Attempts != 4 {
		t.Fatalf("Create to a closed port: %v; dial failures are safe to retry for POST too", err)
	}
}

func TestContext(t *testing.T) {
	t.Run("cancel during a wait", func(t *testing.T) {
		sc, srv := newScript(t, reply{status: 503, header: map[string]string{"Retry-After": "30"}})
		c, sl := newClient(t, srv.URL, nil)
		ctx, cancel := context.WithCancel(context.Background())
		defer cancel()
		sl.onSleep = cancel
		_, _, err := c.Read(ctx, "Observation", "o1")
		if !errors.Is(err, context.Canceled) {
			t.Fatalf("error %v, want context.Canceled", err)
		}
		if !errors.Is(err, client.ErrUnavailable) {
			t.Errorf("error %v should still carry the 503", err)
		}
		if sc.count() != 1 {
			t.Errorf("server saw %d requests after cancel, want 1", sc.count())
		}
	})
	t.Run("already cancelled", func(t *testing.T) {
		sc, srv := newScript(t, reply{status: 200, body: obsBody})
		c, _ := newClient(t, srv.URL, nil)
		ctx, cancel := context.WithCancel(context.Background())
		cancel()
		if _, _, err := c.Read(ctx, "Observation", "o1"); !errors.Is(err, context.Canceled) {
			t.Fatalf("error %v, want context.Canceled", err)
		}
		if sc.count() != 0 {
			t.Errorf("server saw %d requests", sc.count())
		}
	})
	t.Run("wait longer than the deadline is not started", func(t *testing.T) {
		_, srv := newScript(t, reply{status: 429, header: map[string]string{"Retry-After": "100"}})
		c, sl := newClient(t, srv.URL, func(cfg *client.Config) { cfg.MaxRetryAfter = 2 * time.Hour })
		ctx, cancel := context.WithTimeout(context.Background(), 10*time.Second)
		defer cancel()
		_, _, err := c.Read(ctx, "Observation", "o1")
		if !errors.Is(err, client.ErrThrottled) || errors.Is(err, context.DeadlineExceeded) {
			t.Fatalf("error %v, want the 429 and no deadline error", err)
		}
		if len(sl.Waits()) != 0 {
			t.Errorf("slept %v", sl.Waits())
		}
	})
}

// R4 http.html#paging: links "are opaque to the client" and a server "MAY return less" than
// _count, so only a missing next link ends the search.
func TestSearchPaging(t *testing.T) {
	var mu sync.Mutex
	var seen []string
	var srvURL string
	pages := map[string]string{}
	mux := http.NewServeMux()
	mux.HandleFunc("/", func(w http.ResponseWriter, r *http.Request) {
		mu.Lock()
		seen = append(seen, r.URL.RequestURI())
		mu.Unlock()
		w.Header().Set("Content-Type", "application/fhir+json")
		body, ok := pages[r.URL.RequestURI()]
		if !ok {
			w.WriteHeader(404)
			io.WriteString(w, outcomeBody("not-found", "no page"))
			return
		}
		io.WriteString(w, strings.ReplaceAll(body, "BASE", srvURL))
	})
	srv := httptest.NewServer(mux)
	defer srv.Close()
	srvURL = srv.URL

	entry := func(id string) string {
		return fmt.Sprintf(`{"fullUrl":"BASE/fhir/Observation/%s","resource":{"resourceType":"Observation","id":%q},"search":{"mode":"match"}}`, id, id)
	}
	bundle := func(next string, ids ...string) string {
		var es []string
		for _, id := range ids {
			es = append(es, entry(id))
		}
		link := `[{"relation":"self","url":"BASE/whatever"}`
		if next != "" {
			link += fmt.Sprintf(`,{"relation":"next","url":%q}`, next)
		}
		link += "]"
		return fmt.Sprintf(`{"resourceType":"Bundle","type":"searchset","link":%s,"entry":[%s]}`, link, strings.Join(es, ","))
	}
	// Page 2 is shorter than _count and page 3 is empty of a next link: the client must read
	// all three. The next links have shapes the client could not have built itself.
	pages["/fhir/Observation?_count=3&code=http%3A%2F%2Floinc.org%7C2019-8"] = bundle("BASE/fhir?_getpages=abc&_page=2&_format=json", "a", "b", "c")
	pages["/fhir?_getpages=abc&_page=2&_format=json"] = bundle("/paging/xyz;p=3", "d")
	pages["/paging/xyz;p=3"] = bundle("", "e", "f")

	c, _ := newClient(t, srv.URL+"/fhir", nil)
	var ids []string
	err := c.Search(context.Background(), "Observation", url.Values{"code": {"http://loinc.org|2019-8"}, "_count": {"3"}}, func(e json.RawMessage) error {
		var v struct {
			Resource struct{ ID string } `json:"resource"`
		}
		if err := json.Unmarshal(e, &v); err != nil {
			return err
		}
		ids = append(ids, v.Resource.ID)
		return nil
	})
	if err != nil {
		t.Fatalf("Search: %v", err)
	}
	if want := []string{"a", "b", "c", "d", "e", "f"}; !slices.Equal(ids, want) {
		t.Errorf("ids = %v, want %v", ids, want)
	}
	want := []string{"/fhir/Observation?_count=3&code=http%3A%2F%2Floinc.org%7C2019-8", "/fhir?_getpages=abc&_page=2&_format=json", "/paging/xyz;p=3"}
	if !slices.Equal(seen, want) {
		t.Errorf("requested %v, want the next links verbatim %v", seen, want)
	}

	t.Run("callback error stops the search", func(t *testing.T) {
		mu.Lock()
		seen = nil
		mu.Unlock()
		stop := errors.New("stop")
		err := c.Search(context.Background(), "Observation", url.Values{"code": {"http://loinc.org|2019-8"}, "_count": {"3"}}, func(json.RawMessage) error { return stop })
		if !errors.Is(err, stop) || len(seen) != 1 {
			t.Fatalf("err %v after %d pages", err, len(seen))
		}
	})
}

func TestSearchRefusesBadPages(t *testing.T) {
	cases := []struct {
		name    string
		body    string
		wantErr error
		wantMsg string
	}{
		{"next link to another host", `{"resourceType":"Bundle","type":"searchset","link":[{"relation":"next","url":"http://evil.example/fhir/Observation?page=2"}]}`, nil, "leaves the configured server"},
		{"next link to the same page", `{"resourceType":"Bundle","type":"searchset","link":[{"relation":"next","url":"/fhir/Observation"}]}`, client.ErrPagingLoop, ""},
		{"not a searchset", `{"resourceType":"Bundle","type":"history"}`, nil, "want searchset"},
		{"an OperationOutcome with 200", outcomeBody("informational", "hello"), nil, "want Bundle"},
	}
	for _, tc := range cases {
		t.Run(tc.name, func(t *testing.T) {
			_, srv := newScript(t, reply{status: 200, body: tc.body})
			c, _ := newClient(t, srv.URL+"/fhir", nil)
			err := c.Search(context.Background(), "Observation", nil, func(json.RawMessage) error { return nil })
			if err == nil {
				t.Fatal("want an error")
			}
			if tc.wantErr != nil && !errors.Is(err, tc.wantErr) {
				t.Errorf("error %v, want %v", err, tc.wantErr)
			}
			if tc.wantMsg != "" && !strings.Contains(err.Error(), tc.wantMsg) {
				t.Errorf("error %q does not mention %q", err, tc.wantMsg)
			}
		})
	}
}

func TestRequestHeaders(t *testing.T) {
	cases := []struct {
		name  string
		call  func(c *client.Client) error
		check func(t *testing.T, r *http.Request, body []byte)
	}{
		{
			name: "bearer token, accept and user agent on every request",
			call: func(c *client.Client) error {
				_, _, err := c.Read(context.Background(), "Observation", "o1")
				return err
			},
			check: func(t *testing.T, r *http.Request, _ []byte) {
				if r.Header.Get("Authorization") != "Bearer tok-123" || r.Header.Get("Accept") != "application/fhir+json" || r.Header.Get("User-Agent") != client.DefaultUserAgent {
					t.Errorf("headers %v", r.Header)
				}
				if r.URL.Path != "/fhir/Observation/o1" {
					t.Errorf("path %q", r.URL.Path)
				}
			},
		},
		{
			name: "conditional create sends If-None-Exist and strict handling",
			call: func(c *client.Client) error {
				_, _, err := c.ConditionalCreate(context.Background(), "Observation", []byte(`{"resourceType":"Observation"}`), url.Values{"identifier": {"https://svc.example/derived-obs|sha256-ab12"}})
				return err
			},
			check: func(t *testing.T, r *http.Request, body []byte) {
				v, err := url.ParseQuery(r.Header.Get("If-None-Exist"))
				if err != nil || v.Get("identifier") != "https://svc.example/derived-obs|sha256-ab12" {
					t.Errorf("If-None-Exist %q", r.Header.Get("If-None-Exist"))
				}
				if !slices.Contains(r.Header.Values("Prefer"), "handling=strict") {
					t.Errorf("Prefer %v", r.Header.Values("Prefer"))
				}
				if r.Method != http.MethodPost || r.Header.Get("Content-Type") != "application/fhir+json; charset=utf-8" || !bytes.Equal(body, []byte(`{"resourceType":"Observation"}`)) {
					t.Errorf("%s %q %s", r.Method, r.Header.Get("Content-Type"), body)
				}
			},
		},
		{
			name: "bare version id is sent as a weak ETag",
			call: func(c *client.Client) error {
				_, _, err := c.Update(context.Background(), "Observation", "o1", []byte(`{"resourceType":"Observation","id":"o1"}`), "3")
				return err
			},
			check: func(t *testing.T, r *http.Request, _ []byte) {
				if r.Header.Get("If-Match") != `W/"3"` || r.Method != http.MethodPut {
					t.Errorf("%s If-Match %q", r.Method, r.Header.Get("If-Match"))
				}
			},
		},
		{
			name: "an ETag is sent as given",
			call: func(c *client.Client) error {
				_, _, err := c.Update(context.Background(), "Observation", "o1", []byte(`{"resourceType":"Observation","id":"o1"}`), `"7"`)
				return err
			},
			check: func(t *testing.T, r *http.Request, _ []byte) {
				if r.Header.Get("If-Match") != `"7"` {
					t.Errorf("If-Match %q", r.Header.Get("If-Match"))
				}
			},
		},
	}
	for _, tc := range cases {
		t.Run(tc.name, func(t *testing.T) {
			sc, srv := newScript(t, reply{status: 200, body: obsBody})
			c, _ := newClient(t, srv.URL+"/fhir", func(cfg *client.Config) { cfg.Auth = client.BearerToken("tok-123") })
			if err := tc.call(c); err != nil {
				t.Fatal(err)
			}
			if sc.count() != 1 {
				t.Fatalf("%d requests", sc.count())
			}
			tc.check(t, sc.reqs[0], sc.bodies[0])
		})
	}
}

// TestBadArgumentsSendNothing: a call with bad arguments fails before any
// request, and its error does not quote the id (it may be a patient's, and
// errors are logged).
func TestBadArgumentsSendNothing(t *testing.T) {
	sc, srv := newScript(t, reply{status: 200, body: obsBody})
	c, _ := newClient(t, srv.URL, nil)
	ctx := context.Background()
	cases := []struct {
		name string
		call func() error
		want string // the error says
		id   string // and does not quote
	}{
		{"id with a slash", func() error { _, _, err := c.Read(ctx, "Observation", "a/../b"); return err }, "invalid id: a character", "a/../b"},
		{"id with a space", func() error { _, _, err := c.Read(ctx, "Observation", "obs 3355"); return err }, "invalid id: a character", "3355"},
		{"empty id", func() error { _, _, err := c.Read(ctx, "Observation", ""); return err }, "invalid id: empty", ""},
		{"lower-case type", func() error { _, _, err := c.Read(ctx, "observation", "a"); return err }, "invalid resource type", ""},
		{"id longer than 64", func() error { _, _, err := c.Read(ctx, "Observation", strings.Repeat("a", 60)+"TAIL9988"); return err }, "68 bytes, more than 64", "TAIL9988"},
		{"version id with a space", func() error { _, _, err := c.VRead(ctx, "Observation", "o-1", "v 7788"); return err }, "invalid version id", "7788"},
		{"update id with a space", func() error {
			_, _, err := c.Update(ctx, "Observation", "obs 4455", []byte(`{"resourceType":"Observation","id":"obs 4455"}`), "")
			return err
		}, "invalid id", "4455"},
		{"body of another type", func() error {
			_, _, err := c.Create(ctx, "Observation", []byte(`{"resourceType":"Patient"}`))
			return err
		}, "body resourceType", ""},
		{"update body id differs", func() error {
			_, _, err := c.Update(ctx, "Observation", "obs-1122", []byte(`{"resourceType":"Observation","id":"obs-3344"}`), "")
			return err
		}, "body id does not match the request id", "obs-"},
		{"empty If-None-Exist", func() error {
			_, _, err := c.ConditionalCreate(ctx, "Observation", []byte(`{"resourceType":"Observation"}`), nil)
			return err
		}, "empty If-None-Exist", ""},
		{"transaction of a searchset", func() error {
			_, err := c.Transaction(ctx, []byte(`{"resourceType":"Bundle","type":"searchset"}`))
			return err
		}, "searchset", ""},
	}
	for _, tc := range cases {
		t.Run(tc.name, func(t *testing.T) {
			err := tc.call()
			if err == nil {
				t.Fatal("want an error")
			}
			if !strings.Contains(err.Error(), tc.want) || tc.id != "" && strings.Contains(err.Error(), tc.id) {
				t.Errorf("error %q: want %q in it and not %q", err, tc.want, tc.id)
			}
		})
	}
	if sc.count() != 0 {
		t.Errorf("server saw %d requests", sc.count())
	}
}

func TestReadRejectsWrongResource(t *testing.T) {
	_, srv := newScript(t, reply{status: 200, body: outcomeBody("informational", "all ok")})
	c, _ := newClient(t, srv.URL, nil)
	if _, _, err := c.Read(context.Background(), "Observation", "o1"); err == nil || !strings.Contains(err.Error(), "OperationOutcome") {
		t.Fatalf("error %v, want a resource type complaint", err)
	}
}

func TestMetaFromHeaders(t *testing.T) {
	// Prefer: return=minimal servers answer 201 with headers only (R4 http.html#create:
	// Location and ETag carry the new id and version).
	_, srv := newScript(t, reply{status: 201, header: map[string]string{
		"Location":      "http://x/fhir/Observation/new-1/_history/9",
		"ETag":          `W/"9"`,
		"Last-Modified": "Sat, 01 Mar 2025 10:15:07 GMT",
	}})
	c, _ := newClient(t, srv.URL, nil)
	body, m, err := c.Create(context.Background(), "Observation", []byte(`{"resourceType":"Observation"}`))
	if err != nil {
		t.Fatal(err)
	}
	want := client.Meta{Status: 201, ResourceType: "Observation", ID: "new-1", VersionID: "9",
		LastUpdated: time.Date(2025, 3, 1, 10, 15, 7, 0, time.UTC), ETag: `W/"9"`, Location: "http://x/fhir/Observation/new-1/_history/9"}
	if len(body) != 0 || m != want {
		t.Errorf("got %+v %q, want %+v", m, body, want)
	}
}

func TestTransaction(t *testing.T) {
	const conditional = `{"resourceType":"Bundle","type":"transaction","entry":[
{"fullUrl":"urn:uuid:1","resource":{"resourceType":"Observation"},"request":{"method":"POST","url":"Observation","ifNoneExist":"identifier=s|v"}},
{"resource":{"resourceType":"Device","id":"d1"},"request":{"method":"PUT","url":"Device/d1"}}]}`
	const withPlainPost = `{"resourceType":"Bundle","type":"transaction","entry":[
{"fullUrl":"urn:uuid:1","resource":{"resourceType":"Observation"},"request":{"method":"POST","url":"Observation","ifNoneExist":"identifier=s|v"}},
{"resource":{"resourceType":"Provenance"},"request":{"method":"POST","url":"Provenance"}}]}`
	const ok = `{"resourceType":"Bundle","type":"transaction-response","entry":[
{"response":{"status":"200 OK","location":"Observation/o9/_history/2","etag":"W/\"2\"","lastModified":"2025-03-01T10:15:07Z"}},
{"response":{"status":"201","location":"Device/d1"},"resource":{"resourceType":"Device","id":"d1","meta":{"versionId":"1"}}}]}`
	cases := []struct {
		name     string
		bundle   string
		replies  []reply
		wantHits int
		wantErr  bool
	}{
		{"conditional bundle is retried after 500", conditional, []reply{{status: 500}, {status: 200, body: ok}}, 2, false},
		{"bundle with a plain POST is not retried after 500", withPlainPost, []reply{{status: 500}, {status: 200, body: ok}}, 1, true},
		{"bundle with a plain POST is retried after 429", withPlainPost, []reply{{status: 429}, {status: 200, body: ok}}, 2, false},
		{"response with fewer entries is an error", conditional, []reply{{status: 200, body: `{"resourceType":"Bundle","type":"transaction-response","entry":[{"response":{"status":"200"}}]}`}}, 1, true},
		{"batch-response to a transaction is an error", conditional, []reply{{status: 200, body: strings.Replace(ok, "transaction-response", "batch-response", 1)}}, 1, true},
	}
	for _, tc := range cases {
		t.Run(tc.name, func(t *testing.T) {
			sc, srv := newScript(t, tc.replies...)
			c, _ := newClient(t, srv.URL+"/fhir", nil)
			tr, err := c.Transaction(context.Background(), []byte(tc.bundle))
			if sc.count() != tc.wantHits {
				t.Errorf("server saw %d requests, want %d", sc.count(), tc.wantHits)
			}
			if tc.wantErr {
				if err == nil {
					t.Fatal("want an error")
				}
				return
			}
			if err != nil {
				t.Fatal(err)
			}
			if sc.reqs[0].URL.Path != "/fhir" || sc.reqs[0].Method != http.MethodPost {
				t.Errorf("%s %s", sc.reqs[0].Method, sc.reqs[0].URL.Path)
			}
			want := []client.Meta{
				{Status: 200, ResourceType: "Observation", ID: "o9", VersionID: "2", ETag: `W/"2"`, Location: "Observation/o9/_history/2", LastUpdated: time.Date(2025, 3, 1, 10, 15, 7, 0, time.UTC)},
				{Status: 201, ResourceType: "Device", ID: "d1", VersionID: "1", Location: "Device/d1"},
			}
			if len(tr.Entries) != 2 || tr.Entries[0].Meta != want[0] || tr.Entries[1].Meta != want[1] {
				t.Errorf("entries %+v, want %+v", tr.Entries, want)
			}
			if tr.Err() != nil {
				t.Errorf("Err() = %v", tr.Err())
			}
		})
	}
}

func TestBatchEntryErrors(t *testing.T) {
	const batch = `{"resourceType":"Bundle","type":"batch","entry":[
{"request":{"method":"GET","url":"Observation/a"}},{"request":{"method":"GET","url":"Observation/b"}}]}`
	const resp = `{"resourceType":"Bundle","type":"batch-response","entry":[
{"response":{"status":"404 Not Found","outcome":{"resourceType":"OperationOutcome","issue":[{"severity":"error","code":"not-found","diagnostics":"no a"}]}}},
{"response":{"status":"200 OK"},"resource":{"resourceType":"Observation","id":"b"}}]}`
	_, srv := newScript(t, reply{status: 200, body: resp})
	c, _ := newClient(t, srv.URL, nil)
	tr, err := c.Transaction(context.Background(), []byte(batch))
	if err != nil {
		t.Fatal(err)
	}
	berr := tr.Err()
	var fe *client.Error
	if !errors.Is(berr, client.ErrNotFound) || !errors.As(berr, &fe) || fe.Outcome != "no a" || fe.Op != "batch entry 0" {
		t.Fatalf("Err() = %v (%+v)", berr, fe)
	}
	if tr.Entries[1].Status != 200 || tr.Entries[1].ID != "b" {
		t.Errorf("entry 1 = %+v", tr.Entries[1])
	}
}

// Logs may go to shared sinks, so they must carry neither URLs (search queries name patients)
// nor bodies.
func TestLogsAndObserver(t *testing.T) {
	_, srv := newScript(t,
		reply{status: 429, header: map[string]string{"Retry-After": "1"}, body: outcomeBody("throttled", "secret-diagnostic")},
		reply{status: 200, body: `{"resourceType":"Bundle","type":"searchset","entry":[{"resource":{"resourceType":"Observation","id":"o1","subject":{"reference":"Patient/secret-patient-42"}}}]}`})
	var buf bytes.Buffer
	var mu sync.Mutex
	var calls []string
	c, _ := newClient(t, srv.URL, func(cfg *client.Config) {
		cfg.Logger = slog.New(slog.NewTextHandler(&buf, &slog.HandlerOptions{Level: slog.LevelDebug}))
		cfg.Observer = func(op string, status int, dur time.Duration) {
			mu.Lock()
			defer mu.Unlock()
			calls = append(calls, fmt.Sprintf("%s %d", op, status))
		}
	})
	err := c.Search(context.Background(), "Observation", url.Values{"subject": {"Patient/secret-patient-42"}}, func(json.RawMessage) error { return nil })
	if err != nil {
		t.Fatal(err)
	}
	if want := []string{"search 429", "search 200"}; !slices.Equal(calls, want) {
		t.Errorf("observer calls %v, want %v", calls, want)
	}
	logs := buf.String()
	for _, bad := range []string{"secret-patient-42", "secret-diagnostic", "127.0.0.1", "subject"} {
		if strings.Contains(logs, bad) {
			t.Errorf("logs contain %q:\n%s", bad, logs)
		}
	}
	for _, want := range []string{"op=search", "type=Observation", "status=429", "attempt=1", "attempt=2"} {
		if !strings.Contains(logs, want) {
			t.Errorf("logs lack %q:\n%s", want, logs)
		}
	}
}

func TestBearerTokenRedacted(t *testing.T) {
	tok := client.BearerToken("s3cr3t")
	var buf bytes.Buffer
	slog.New(slog.NewTextHandler(&buf, nil)).Info("cfg", "auth", tok)
	if s := fmt.Sprintf("%v %s %+v", tok, tok, client.Config{Auth: tok}); strings.Contains(s+buf.String(), "s3cr3t") {
		t.Errorf("token printed: %s %s", s, buf.String())
	}
}

func TestConfigValidate(t *testing.T) {
	cases := []struct {
		name    string
		cfg     client.Config
		wantErr string
	}{
		{"ok", client.Config{BaseURL: "https://fhir.example/r4/"}, ""},
		{"missing base", client.Config{}, "BaseURL is required"},
		{"relative base", client.Config{BaseURL: "/fhir"}, "scheme must be http or https"},
		{"query in base", client.Config{BaseURL: "http://h/fhir?x=1"}, "query or fragment"},
		{"max below base", client.Config{BaseURL: "http://h", BackoffBase: time.Second, BackoffMax: time.Millisecond}, "below BackoffBase"},
		{"negative", client.Config{BaseURL: "http://h", MaxRetryAfter: -1}, "must not be negative"},
	}
	for _, tc := range cases {
		t.Run(tc.name, func(t *testing.T) {
			_, err := client.New(tc.cfg)
			if tc.wantErr == "" {
				if err != nil {
					t.Fatal(err)
				}
				return
			}
			if err == nil || !strings.Contains(err.Error(), tc.wantErr) {
				t.Fatalf("error %v, want %q", err, tc.wantErr)
			}
		})
	}
}

// uncomparable is an error type that cannot be a map key.
type uncomparable struct{ parts []string }

func (u uncomparable) Error() string { return strings.Join(u.parts, ",") }

func TestErrorIsWithUncomparableTarget(t *testing.T) {
	err := &client.Error{Op: "read", Status: 404}
	if errors.Is(err, uncomparable{}) {
		t.Error("matched an unrelated error")
	}
	if !errors.Is(fmt.Errorf("wrapped: %w", err), client.ErrNotFound) || errors.Is(err, client.ErrGone) || errors.Is(err, client.ErrNetwork) {
		t.Error("sentinel matching is wrong")
	}
}
