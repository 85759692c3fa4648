package fhirtest

import (
	"bytes"
	"io"
	"net/http"
	"net/http/httptest"
	"net/url"
	"slices"
	"strings"
	"sync"
	"testing"
)

// Proxy stands in front of a FHIR server and can hold requests: a held
// request gets no answer (its client gives up after its own timeout) and
// reaches the server only when the test releases it, possibly after later
// requests and in another order. That is what a server does that holds a
// write in a queue, or a network that delivers a retried request before the
// first one: the late request is committed after the client moved on.
type Proxy struct {
	// BaseURL is the proxy's FHIR base, to give to the client under test.
	BaseURL string

	target string
	srv    *httptest.Server
	tb     testing.TB

	mu    sync.Mutex
	hold  int
	match func(method, path string, body []byte) bool
	held  []heldRequest
}

type heldRequest struct {
	method, path, rawQuery string
	header                 http.Header
	body                   []byte
}

// NewProxy starts a proxy in front of baseURL (a FHIR base such as
// [Server.BaseURL]) and closes it in tb.Cleanup.
func NewProxy(tb testing.TB, baseURL string) *Proxy {
	tb.Helper()
	u, err := url.Parse(baseURL)
	if err != nil {
		tb.Fatalf("fhirtest: proxy target: %v", err)
	}
	p := &Proxy{target: strings.TrimRight(baseURL, "/"), tb: tb}
	p.srv = httptest.NewServer(http.HandlerFunc(p.serve))
	p.BaseURL = p.srv.URL + u.Path
	tb.Cleanup(p.srv.Close)
	return p
}

// HoldNext makes the proxy hold the next n requests for which match (nil:
// any) reports true.
func (p *Proxy) HoldNext(n int, match func(method, path string, body []byte) bool) {
	p.mu.Lock()
	defer p.mu.Unlock()
	p.hold, p.match = n, match
}

// Held is how many requests wait to be released.
func (p *Proxy) Held() int {
	p.mu.Lock()
	defer p.mu.Unlock()
	return len(p.held)
}

// Release sends every held request to the server, in the order they
// arrived or, when reversed, latest first, and returns the server's
// statuses in that order. The answers reach no client.
func (p *Proxy) Release(reversed bool) []int {
	p.tb.Helper()
	p.mu.Lock()
	held := p.held
	p.held = nil
	p.mu.Unlock()
	if reversed {
		slices.Reverse(held)
	}
	var statuses []int
	for _, h := range held {
		resp, err := p.forward(h)
		if err != nil {
			p.tb.Errorf("fhirtest: releasing a held %s: %v", h.method, err)
			continue
		}
		_, _ = io.Copy(io.Discard, resp.Body)
		resp.Body.Close()
		statuses = append(statuses, resp.StatusCode)
	}
	return statuses
}

// TransactionPOST matches transaction Bundles posted to the base.
func TransactionPOST(method, path string, body []byte) bool {
	return method == http.MethodPost && strings.Trim(path, "/") == "" && bytes.Contains(body, []byte(`"transaction"`))
}

func (p *Proxy) serve(w http.ResponseWriter, r *http.Request) {
	body, err := io.ReadAll(r.Body)
	if err != nil {
		http.Error(w, err.Error(), http.StatusBadGateway)
		return
	}
	u, _ := url.Parse(p.BaseURL)
	path := strings.TrimPrefix(r.URL.Path, u.Path)
	h := heldRequest{method: r.Method, path: path, rawQuery: r.URL.RawQuery, header: r.Header.Clone(), body: body}
	p.mu.Lock()
	if p.hold > 0 && (p.match == nil || p.match(r.Method, path, body)) {
		p.hold--
		p.held = append(p.held, h)
		p.mu.Unlock()
		// No answer until the client gives up.
		<-r.Context().Done()
		return
	}
	p.mu.Unlock()
	resp, err := p.forward(h)
	if err != nil {
		http.Error(w, err.Error(), http.StatusBadGateway)
		return
	}
	defer resp.Body.Close()
	for k, vs := range resp.Header {
		for _, v := range vs {
			w.Header().Add(k, v)
		}
	}
	w.WriteHeader(resp.StatusCode)
	_, _ = io.Copy(w, resp.Body)
}

func (p *Proxy) forward(h heldRequest) (*http.Response, error) {
	u := p.target + h.path
	if h.rawQuery != "" {
		u += "?" + h.rawQuery
	}
	req, err := http.NewRequest(h.method, u, bytes.NewReader(h.body))
	if err != nil {
		return nil, err
	}
	for k, vs := range h.header {
		if k == "Host" || k == "Content-Length" {
			continue
		}
		req.Header[k] = vs
	}
	return httpClient.Do(req)
}
