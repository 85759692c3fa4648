package client_test

import (
	"context"
	"errors"
	"io"
	"net/http"
	"net/http/httptest"
	"sync/atomic"
	"testing"
	"time"

	"github.com/deadspace-fhir/deadspace/fhir/client"
)

// rotating hands out a new token after each Invalidate.
type rotating struct{ n atomic.Int32 }

func (r *rotating) Authorize(req *http.Request) error {
	req.Header.Set("Authorization", "Bearer t"+string(rune('0'+r.n.Load())))
	return nil
}
func (r *rotating) Invalidate() { r.n.Add(1) }

func TestStream(t *testing.T) {
	var seen []string
	srv := httptest.NewServer(http.HandlerFunc(func(w http.ResponseWriter, r *http.Request) {
		seen = append(seen, r.Method+" "+r.URL.RequestURI()+" "+r.Header.Get("Authorization"))
		switch {
		case r.Header.Get("Authorization") == "Bearer t0":
			w.WriteHeader(http.StatusUnauthorized)
		case r.URL.Path == "/r4/busy":
			w.Header().Set("Retry-After", "7")
			w.Header().Set("Content-Type", "application/fhir+json")
			w.WriteHeader(http.StatusTooManyRequests)
			_, _ = io.WriteString(w, `{"resourceType":"OperationOutcome","issue":[{"severity":"error","code":"throttled","diagnostics":"an export is running"}]}`)
		default:
			w.Header().Set("Content-Location", "/jobs/1")
			w.WriteHeader(http.StatusAccepted)
		}
	}))
	defer srv.Close()
	auth := &rotating{}
	c, err := client.New(client.Config{BaseURL: srv.URL + "/r4", Auth: auth})
	if err != nil {
		t.Fatal(err)
	}
	ctx := context.Background()

	// A relative URL resolves against the base and keeps its query; a 401
	// is retried once with fresh credentials.
	resp, err := c.Stream(ctx, client.StreamRequest{Op: "bulk-kickoff", Method: http.MethodGet, URL: "Group/g1/$export?_type=Patient", Authorize: true})
	if err != nil {
		t.Fatal(err)
	}
	resp.Body.Close()
	if resp.StatusCode != http.StatusAccepted || len(seen) != 2 || seen[1] != "GET /r4/Group/g1/$export?_type=Patient Bearer t1" {
		t.Errorf("status %d, requests %q", resp.StatusCode, seen)
	}

	// Any status comes back to the caller; ResponseError reads it.
	resp, err = c.Stream(ctx, client.StreamRequest{Op: "bulk-kickoff", Method: http.MethodGet, URL: srv.URL + "/r4/busy", Authorize: true})
	if err != nil {
		t.Fatal(err)
	}
	fe := c.ResponseError("bulk-kickoff", resp)
	if fe.Status != http.StatusTooManyRequests || fe.RetryAfter != 7*time.Second || fe.Code != "throttled" || fe.Outcome != "an export is running" || !errors.Is(fe, client.ErrThrottled) {
		t.Errorf("ResponseError = %+v", fe)
	}

	// Credentials never go to another host.
	other := httptest.NewServer(http.HandlerFunc(func(w http.ResponseWriter, r *http.Request) {
		t.Errorf("the other host was called with %q", r.Header.Get("Authorization"))
	}))
	defer other.Close()
	if _, err := c.Stream(ctx, client.StreamRequest{Op: "bulk-file", Method: http.MethodGet, URL: other.URL + "/f.ndjson", Authorize: true}); !errors.Is(err, client.ErrForeignHost) {
		t.Errorf("foreign host: err = %v", err)
	}
	// Without credentials it may go anywhere (a signed file URL).
	resp, err = c.Stream(ctx, client.StreamRequest{Op: "bulk-file", Method: http.MethodGet, URL: srv.URL + "/files/f.ndjson"})
	if err != nil {
		t.Fatal(err)
	}
	resp.Body.Close()
	if last := seen[len(seen)-1]; last != "GET /files/f.ndjson " {
		t.Errorf("unauthorised request %q", last)
	}
	if _, err := c.Stream(ctx, client.StreamRequest{Op: "x", Method: http.MethodGet, URL: "ftp://x/y"}); err == nil {
		t.Error("ftp URL accepted")
	}
}
