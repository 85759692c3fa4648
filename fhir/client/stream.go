package client

import (
	"context"
	"fmt"
	"io"
	"net/http"
	"net/url"
	"time"
)

// StreamRequest is one request whose response the caller reads itself: the
// FHIR Bulk Data flow, whose answers are status codes, headers and NDJSON
// files rather than FHIR resources, and whose files are too large to hold in
// memory.
type StreamRequest struct {
	// Op names the request for the Observer and the debug log
	// ("bulk-kickoff", "bulk-status", "bulk-file", "bulk-cancel").
	Op     string
	Method string
	// URL is absolute, or a path relative to the base ("Group/x/$export").
	URL    string
	Header http.Header
	// Authorize applies the client's credentials. They are only ever sent to
	// the base URL's scheme and host: a URL elsewhere with Authorize set is
	// refused rather than handed the token.
	Authorize bool
}

// ErrForeignHost refuses to send credentials to a host other than the base's.
var ErrForeignHost = fmt.Errorf("fhir: refusing to send credentials to a host other than the FHIR base")

// Stream sends one request through the client's transport with its user
// agent, credentials (when r.Authorize) and Observer, and returns the
// response whatever its status, with the body unread; the caller closes it.
// It makes one attempt, except that a 401 with an [Invalidator] authorizer
// is retried once with fresh credentials: in the Bulk Data flow 202 and 429
// mean different things, so waiting is the caller's decision. There is no
// overall timeout beyond ctx, because a file may take long to download.
func (c *Client) Stream(ctx context.Context, r StreamRequest) (*http.Response, error) {
	u, err := c.resolve(r.URL)
	if err != nil {
		return nil, fmt.Errorf("fhir %s: %w", r.Op, err)
	}
	if r.Authorize && c.auth != nil && !c.sameOrigin(u) {
		return nil, fmt.Errorf("fhir %s: %w (%s)", r.Op, ErrForeignHost, u.Host)
	}
	for attempt := 0; ; attempt++ {
		req, err := http.NewRequestWithContext(ctx, r.Method, u.String(), nil)
		if err != nil {
			return nil, fmt.Errorf("fhir %s: building request: %w", r.Op, stripURL(err))
		}
		for k, vs := range r.Header {
			req.Header[k] = vs
		}
		req.Header.Set("User-Agent", c.ua)
		if r.Authorize && c.auth != nil {
			if err := c.auth.Authorize(req); err != nil {
				return nil, fmt.Errorf("fhir %s: authorizing: %w", r.Op, err)
			}
		}
		start := time.Now()
		resp, err := c.stream.Do(req)
		rq := request{op: r.Op}
		if err != nil {
			c.finish(ctx, rq, 0, attempt, start)
			if ctxErr := ctx.Err(); ctxErr != nil {
				return nil, fmt.Errorf("fhir %s: %w", r.Op, ctxErr)
			}
			return nil, &Error{Op: r.Op, Err: stripURL(err), Retryable: true, Attempts: attempt + 1}
		}
		c.finish(ctx, rq, resp.StatusCode, attempt, start)
		if resp.StatusCode == http.StatusUnauthorized && attempt == 0 && r.Authorize {
			if inv, ok := c.auth.(Invalidator); ok {
				_, _ = io.Copy(io.Discard, io.LimitReader(resp.Body, 64<<10))
				resp.Body.Close()
				inv.Invalidate()
				continue
			}
		}
		return resp, nil
	}
}

// ResponseError reads a failed response's body (a bounded prefix), closes
// it, and describes it as an [*Error]: the status, the OperationOutcome text
// and code when the body is FHIR JSON, and the Retry-After the server asked
// for.
func (c *Client) ResponseError(op string, resp *http.Response) *Error {
	body, _ := io.ReadAll(io.LimitReader(resp.Body, 1<<20))
	resp.Body.Close()
	oi := parseOutcome(resp.Header.Get("Content-Type"), body)
	fe := &Error{
		Op: op, Status: resp.StatusCode, Code: oi.Code, Outcome: oi.Text, Attempts: 1,
		Retryable: retryableStatus(resp.StatusCode, true),
	}
	if d, ok := parseRetryAfter(resp.Header.Get("Retry-After"), c.now()); ok {
		fe.RetryAfter, fe.hasRetryAfter = min(d, c.maxRA), true
	}
	return fe
}

// RetryAfter reads a response's Retry-After header (seconds or HTTP-date),
// capped at the client's MaxRetryAfter; ok is false when it is absent or
// unreadable.
func (c *Client) RetryAfter(h http.Header) (time.Duration, bool) {
	d, ok := parseRetryAfter(h.Get("Retry-After"), c.now())
	return min(d, c.maxRA), ok
}

// Sleep waits d or until ctx ends, with the client's wait function (tests
// replace it).
func (c *Client) Sleep(ctx context.Context, d time.Duration) error { return c.sleep(ctx, d) }

// Backoff is the client's jittered exponential wait before retry number
// attempt (0 for the first retry).
func (c *Client) Backoff(attempt int) time.Duration {
	return backoff(attempt, c.backoffBase, c.backoffMax, c.jitter)
}

// BaseURL is the FHIR base the client was configured with.
func (c *Client) BaseURL() string { return c.base.String() }

func (c *Client) resolve(raw string) (*url.URL, error) {
	u, err := url.Parse(raw)
	if err != nil {
		return nil, fmt.Errorf("bad URL: %w", stripURL(err))
	}
	if !u.IsAbs() {
		u = c.base.JoinPath(u.Path)
		ref, _ := url.Parse(raw)
		u.RawQuery = ref.RawQuery
	}
	if u.Scheme != "http" && u.Scheme != "https" {
		return nil, fmt.Errorf("URL scheme must be http or https, got %q", u.Scheme)
	}
	return u, nil
}

func (c *Client) sameOrigin(u *url.URL) bool {
	return u.Scheme == c.base.Scheme && u.Host == c.base.Host
}
