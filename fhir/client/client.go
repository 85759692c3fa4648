package client

import (
	"bytes"
	"context"
	"errors"
	"fmt"
	"io"
	"log/slog"
	"net/http"
	"net/url"
	"strings"
	"time"
)

// Defaults for zero Config fields.
const (
	DefaultMaxRetries       = 4
	DefaultBackoffBase      = 500 * time.Millisecond
	DefaultBackoffMax       = 30 * time.Second
	DefaultMaxRetryAfter    = 2 * time.Minute
	DefaultMaxResponseBytes = 64 << 20
	DefaultTimeout          = 60 * time.Second
	DefaultUserAgent        = "deadspace-fhir-client/1"
)

// Observer receives one call per attempt: the operation ("read", "vread", "search", "create",
// "conditional-create", "update", "transaction", "batch"), the HTTP status (0 when no response
// arrived) and how long the attempt took. It must be safe for concurrent use.
type Observer func(op string, status int, dur time.Duration)

// Config configures a [Client]. Only BaseURL is required.
type Config struct {
	// BaseURL is the FHIR service base, e.g. https://fhir.example/r4. A trailing slash is
	// ignored.
	BaseURL string
	// HTTPClient defaults to a client with a DefaultTimeout overall timeout per attempt.
	HTTPClient *http.Client
	// Auth, if set, is applied to every attempt.
	Auth Authorizer
	// UserAgent defaults to DefaultUserAgent.
	UserAgent string
	// MaxRetries is the number of retries after the first attempt. Zero selects
	// DefaultMaxRetries; a negative value disables retries.
	MaxRetries int
	// BackoffBase and BackoffMax bound the jittered exponential backoff.
	BackoffBase time.Duration
	BackoffMax  time.Duration
	// MaxRetryAfter caps the wait a server may ask for with Retry-After.
	MaxRetryAfter time.Duration
	// MaxResponseBytes caps a response body; larger bodies fail the attempt.
	MaxResponseBytes int64
	// Logger gets debug records per attempt; nil discards them.
	Logger *slog.Logger
	// Observer, if set, is called after every attempt.
	Observer Observer
	// Sleep waits between attempts; it must return early with ctx.Err() when ctx ends. Tests
	// replace it to record waits instead of sleeping.
	Sleep func(ctx context.Context, d time.Duration) error
	// Jitter draws the backoff wait uniformly from [0, ceil]; tests may make it deterministic.
	Jitter func(ceil time.Duration) time.Duration
	// Now is the clock used to read HTTP-date Retry-After values.
	Now func() time.Time
}

// Validate reports every problem in c at once.
func (c Config) Validate() error {
	var errs []error
	if c.BaseURL == "" {
		errs = append(errs, errors.New("BaseURL is required"))
	} else if u, err := url.Parse(c.BaseURL); err != nil {
		errs = append(errs, fmt.Errorf("BaseURL: %w", err))
	} else {
		if u.Scheme != "http" && u.Scheme != "https" {
			errs = append(errs, fmt.Errorf("BaseURL scheme must be http or https, got %q", u.Scheme))
		}
		if u.Host == "" {
			errs = append(errs, errors.New("BaseURL has no host"))
		}
		if u.RawQuery != "" || u.Fragment != "" {
			errs = append(errs, errors.New("BaseURL must not have a query or fragment"))
		}
	}
	if c.BackoffBase < 0 || c.BackoffMax < 0 || c.MaxRetryAfter < 0 {
		errs = append(errs, errors.New("backoff and Retry-After limits must not be negative"))
	}
	if c.BackoffBase > 0 && c.BackoffMax > 0 && c.BackoffMax < c.BackoffBase {
		errs = append(errs, fmt.Errorf("BackoffMax %v is below BackoffBase %v", c.BackoffMax, c.BackoffBase))
	}
	if c.MaxResponseBytes < 0 {
		errs = append(errs, errors.New("MaxResponseBytes must not be negative"))
	}
	return errors.Join(errs...)
}

// Client talks to one FHIR server. It is safe for concurrent use.
type Client struct {
	base        *url.URL
	hc          *http.Client
	stream      *http.Client // hc without its overall timeout, for Stream
	auth        Authorizer
	ua          string
	maxRetries  int
	backoffBase time.Duration
	backoffMax  time.Duration
	maxRA       time.Duration
	maxBody     int64
	log         *slog.Logger
	observe     Observer
	sleep       func(context.Context, time.Duration) error
	jitter      func(time.Duration) time.Duration
	now         func() time.Time
}

// New checks cfg and returns a client.
func New(cfg Config) (*Client, error) {
	if err := cfg.Validate(); err != nil {
		return nil, fmt.Errorf("client.New: %w", err)
	}
	base, _ := url.Parse(strings.TrimRight(cfg.BaseURL, "/"))
	c := &Client{
		base:        base,
		hc:          cfg.HTTPClient,
		auth:        cfg.Auth,
		ua:          cfg.UserAgent,
		maxRetries:  cfg.MaxRetries,
		backoffBase: cfg.BackoffBase,
		backoffMax:  cfg.BackoffMax,
		maxRA:       cfg.MaxRetryAfter,
		maxBody:     cfg.MaxResponseBytes,
		log:         cfg.Logger,
		observe:     cfg.Observer,
		sleep:       cfg.Sleep,
		jitter:      cfg.Jitter,
		now:         cfg.Now,
	}
	if c.hc == nil {
		c.hc = &http.Client{Timeout: DefaultTimeout}
	}
	c.stream = &http.Client{Transport: c.hc.Transport, CheckRedirect: c.hc.CheckRedirect, Jar: c.hc.Jar}
	if c.ua == "" {
		c.ua = DefaultUserAgent
	}
	switch {
	case c.maxRetries == 0:
		c.maxRetries = DefaultMaxRetries
	case c.maxRetries < 0:
		c.maxRetries = 0
	}
	if c.backoffBase == 0 {
		c.backoffBase = DefaultBackoffBase
	}
	if c.backoffMax == 0 {
		c.backoffMax = max(DefaultBackoffMax, c.backoffBase)
	}
	if c.maxRA == 0 {
		c.maxRA = DefaultMaxRetryAfter
	}
	if c.maxBody == 0 {
		c.maxBody = DefaultMaxResponseBytes
	}
	if c.log == nil {
		c.log = slog.New(slog.DiscardHandler)
	}
	if c.sleep == nil {
		c.sleep = defaultSleep
	}
	if c.jitter == nil {
		c.jitter = defaultJitter
	}
	if c.now == nil {
		c.now = time.Now
	}
	return c, nil
}

// request is one logical operation; do turns it into one or more HTTP attempts.
type request struct {
	op           string
	resourceType string
	method       string
	url          string
	body         []byte
	header       http.Header
	// repeatable marks operations that may be sent again after a lost response.
	repeatable bool
}

type response struct {
	status int
	header http.Header
	body   []byte
}

// do runs the attempts. It returns a 2xx response, an *Error, or an error wrapping ctx.Err().
func (c *Client) do(ctx context.Context, rq request) (*response, error) {
	var last *Error
	reauthorized := false
	for attempt := 0; ; attempt++ {
		if err := ctx.Err(); err != nil {
			return nil, c.ctxErr(rq, err, last)
		}
		resp, fe, err := c.attempt(ctx, rq, attempt)
		if err != nil {
			return nil, err
		}
		if fe == nil {
			return resp, nil
		}
		fe.Attempts = attempt + 1
		last = fe
		if fe.Status == http.StatusUnauthorized && !reauthorized && attempt < c.maxRetries {
			if inv, ok := c.auth.(Invalidator); ok {
				// The server refused the credentials, not the request (a token revoked or
				// rotated before its expiry): retry once, at once, with a fresh token.
				inv.Invalidate()
				reauthorized = true
				continue
			}
		}
		if !fe.Retryable || attempt >= c.maxRetries {
			return nil, fe
		}
		wait := backoff(attempt, c.backoffBase, c.backoffMax, c.jitter)
		if fe.hasRetryAfter && (fe.Status == http.StatusTooManyRequests || fe.Status == http.StatusServiceUnavailable) {
			wait = min(fe.RetryAfter, c.maxRA)
		}
		if dl, ok := ctx.Deadline(); ok && time.Until(dl) < wait {
			// Waiting would only end in DeadlineExceeded; report the failure we have instead.
			return nil, fmt.Errorf("retry wait %v exceeds the context deadline: %w", wait, fe)
		}
		c.log.DebugContext(ctx, "fhir retry", "op", rq.op, "type", rq.resourceType, "status", fe.Status, "attempt", attempt+1, "wait", wait)
		if err := c.sleep(ctx, wait); err != nil {
			return nil, c.ctxErr(rq, err, last)
		}
	}
}

func (c *Client) ctxErr(rq request, err error, last *Error) error {
	name := strings.TrimSpace(rq.op + " " + rq.resourceType)
	if last != nil {
		return fmt.Errorf("fhir %s: %w while waiting to retry after: %w", name, err, last)
	}
	return fmt.Errorf("fhir %s: %w", name, err)
}

// attempt makes one HTTP request. It returns (resp, nil, nil) on 2xx; (_, *Error, nil) on a
// failure do may retry; (nil, nil, err) on errors that end the operation at once (a cancelled
// context, a failing Authorizer).
func (c *Client) attempt(ctx context.Context, rq request, attempt int) (*response, *Error, error) {
	var body io.Reader
	if rq.body != nil {
		body = bytes.NewReader(rq.body)
	}
	req, err := http.NewRequestWithContext(ctx, rq.method, rq.url, body)
	if err != nil {
		return nil, nil, fmt.Errorf("fhir %s %s: building request: %w", rq.op, rq.resourceType, stripURL(err))
	}
	for k, vs := range rq.header {
		req.Header[k] = vs
	}
	req.Header.Set("Accept", "application/fhir+json")
	req.Header.Set("User-Agent", c.ua)
	if rq.body != nil {
		req.Header.Set("Content-Type", "application/fhir+json; charset=utf-8")
	}
	if c.auth != nil {
		if err := c.auth.Authorize(req); err != nil {
			return nil, nil, fmt.Errorf("fhir %s %s: authorizing: %w", rq.op, rq.resourceType, err)
		}
	}

	start := time.Now()
	hresp, err := c.hc.Do(req)
	var resp *response
	if err == nil {
		resp = &response{status: hresp.StatusCode, header: hresp.Header}
		resp.body, err = io.ReadAll(io.LimitReader(hresp.Body, c.maxBody+1))
		hresp.Body.Close()
		if err == nil && int64(len(resp.body)) > c.maxBody {
			err = fmt.Errorf("response body exceeds %d bytes", c.maxBody)
			c.finish(ctx, rq, resp.status, attempt, start)
			return nil, &Error{Op: rq.op, ResourceType: rq.resourceType, Status: 0, Err: err}, nil
		}
	}
	if err != nil {
		c.finish(ctx, rq, 0, attempt, start)
		if ctxErr := ctx.Err(); ctxErr != nil {
			return nil, nil, c.ctxErr(rq, ctxErr, nil)
		}
		err = stripURL(err)
		return nil, &Error{
			Op:           rq.op,
			ResourceType: rq.resourceType,
			Err:          err,
			Retryable:    neverSent(err) || rq.repeatable,
		}, nil
	}
	c.finish(ctx, rq, resp.status, attempt, start)
	if resp.status >= 200 && resp.status < 300 {
		return resp, nil, nil
	}
	oi := parseOutcome(resp.header.Get("Content-Type"), resp.body)
	fe := &Error{
		Op:           rq.op,
		ResourceType: rq.resourceType,
		Status:       resp.status,
		Code:         oi.Code,
		Outcome:      oi.Text,
		Retryable:    retryableStatus(resp.status, rq.repeatable),
	}
	// An unreadable Retry-After is treated as absent, so backoff applies.
	if d, ok := parseRetryAfter(resp.header.Get("Retry-After"), c.now()); ok {
		fe.RetryAfter, fe.hasRetryAfter = d, true
	}
	if d, err := http.ParseTime(resp.header.Get("Date")); err == nil {
		fe.Date = d.UTC()
	}
	return resp, fe, nil
}

func (c *Client) finish(ctx context.Context, rq request, status, attempt int, start time.Time) {
	dur := time.Since(start)
	if c.observe != nil {
		c.observe(rq.op, status, dur)
	}
	c.log.DebugContext(ctx, "fhir request", "op", rq.op, "type", rq.resourceType, "status", status, "attempt", attempt+1, "duration", dur)
}
