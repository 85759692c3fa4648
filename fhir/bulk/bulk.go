// Package bulk is a FHIR Bulk Data Access client (HL7 FHIR Bulk Data Access
// IG 2.0.0, https://hl7.org/fhir/uv/bulkdata/export.html): it kicks off an
// $export at system, Patient or Group level, polls the status URL honouring
// Retry-After and reporting X-Progress, reads the manifest, downloads the
// NDJSON files to disk as they stream, and cancels the job with DELETE when
// the caller gives up.
//
// It sends its requests through a [client.Client], so the bearer token or
// SMART Backend Services credentials, the user agent and the request
// observer are the same as for every other FHIR call; credentials go only
// to the FHIR base's host, and to file URLs only when the manifest says
// requiresAccessToken.
package bulk

import (
	"context"
	"errors"
	"fmt"
	"io"
	"log/slog"
	"net/http"
	"net/url"
	"os"
	"path/filepath"
	"strings"
	"time"

	"github.com/deadspace-fhir/deadspace/fhir/client"
)

// Level says what an export covers.
type Level string

// Export levels ("Endpoint - System Level Export", "All Patients", "Group
// of Patients").
const (
	System  Level = "system"
	Patient Level = "patient"
	Group   Level = "group"
)

// Request is what to export.
type Request struct {
	Level Level
	// GroupID is the Group's logical id, for Level Group.
	GroupID string
	// Types are the resource types (_type); empty asks for all.
	Types []string
	// Since asks only for resources changed after it (_since); zero asks
	// for everything.
	Since time.Time
	// TypeFilters are FHIR search queries ("Observation?code=a|b,c|d") sent
	// as _typeFilter. The parameter is optional for servers: when the
	// kick-off is refused with one, it is sent again without it, as the IG
	// suggests, and the caller filters what comes back.
	TypeFilters []string
}

// Validate reports every problem at once.
func (r Request) Validate() error {
	var errs []error
	switch r.Level {
	case System, Patient:
		if r.GroupID != "" {
			errs = append(errs, fmt.Errorf("a group id goes only with a Group export"))
		}
	case Group:
		if r.GroupID == "" || strings.ContainsAny(r.GroupID, "/?#") {
			errs = append(errs, fmt.Errorf("a Group export needs a Group id, got %q", r.GroupID))
		}
	default:
		errs = append(errs, fmt.Errorf("export level must be system, patient or group, got %q", r.Level))
	}
	for _, t := range r.Types {
		if !isResourceType(t) {
			errs = append(errs, fmt.Errorf("%q is not a resource type", t))
		}
	}
	return errors.Join(errs...)
}

// path is the kick-off endpoint relative to the FHIR base.
func (r Request) path() string {
	switch r.Level {
	case Patient:
		return "Patient/$export"
	case Group:
		return "Group/" + url.PathEscape(r.GroupID) + "/$export"
	}
	return "$export"
}

func (r Request) query(withFilters bool) string {
	q := url.Values{}
	if len(r.Types) > 0 {
		q.Set("_type", strings.Join(r.Types, ","))
	}
	if !r.Since.IsZero() {
		q.Set("_since", r.Since.UTC().Format(time.RFC3339))
	}
	if withFilters {
		// Each query is URL-encoded on its own and the encoded queries are
		// joined with a literal comma ("_typeFilter Experimental Query
		// Parameter", example request).
		var parts []string
		for _, f := range r.TypeFilters {
			parts = append(parts, url.QueryEscape(f))
		}
		if len(parts) > 0 {
			enc := q.Encode()
			if enc != "" {
				enc += "&"
			}
			return enc + "_typeFilter=" + strings.Join(parts, ",")
		}
	}
	return q.Encode()
}

// Hooks report progress; any nil field is skipped.
type Hooks struct {
	// KickedOff is called once the server accepted the export;
	// typeFilter says whether it was accepted with _typeFilter.
	KickedOff func(typeFilter bool)
	// Running is called for each in-progress status answer, with the
	// server's X-Progress text (cleaned, at most 100 characters) and the
	// wait before the next poll.
	Running func(progress string, wait time.Duration)
	// Throttled is called for each 429, with the wait.
	Throttled func(wait time.Duration)
	// Manifest is called when the export is complete.
	Manifest func(m Manifest)
	// Bytes is called as a file downloads, with the bytes just written.
	Bytes func(n int64)
	// FileDone is called after each file is on disk.
	FileDone func(f LocalFile)
}

// Config configures an [Exporter].
type Config struct {
	// Client is the FHIR server's client; its credentials, user agent,
	// observer and wait function are used.
	Client *client.Client
	// Dir receives the downloaded files.
	Dir    string
	Logger *slog.Logger
	Hooks  Hooks
	// MaxPollWait caps the wait between status polls (default 2 minutes).
	MaxPollWait time.Duration
	// MaxAttempts bounds consecutive failed attempts of one step (a
	// throttled kick-off, a failing poll, a broken download); default 8.
	MaxAttempts int
	Now         func() time.Time
}

// Exporter runs Bulk Data exports against one server.
type Exporter struct {
	c     *client.Client
	dir   string
	log   *slog.Logger
	hooks Hooks
	max   time.Duration
	tries int
	now   func() time.Time
}

// New checks cfg and returns an Exporter.
func New(cfg Config) (*Exporter, error) {
	if cfg.Client == nil {
		return nil, errors.New("bulk: a FHIR client is required")
	}
	if cfg.Dir == "" {
		return nil, errors.New("bulk: a download directory is required")
	}
	if cfg.Logger == nil {
		cfg.Logger = slog.New(slog.DiscardHandler)
	}
	if cfg.MaxPollWait <= 0 {
		cfg.MaxPollWait = 2 * time.Minute
	}
	if cfg.MaxAttempts <= 0 {
		cfg.MaxAttempts = 8
	}
	if cfg.Now == nil {
		cfg.Now = time.Now
	}
	return &Exporter{c: cfg.Client, dir: cfg.Dir, log: cfg.Logger, hooks: cfg.Hooks, max: cfg.MaxPollWait, tries: cfg.MaxAttempts, now: cfg.Now}, nil
}

// Job is an export the server accepted.
type Job struct {
	// StatusURL is the polling location (the kick-off's Content-Location).
	StatusURL string
	// TypeFilter says whether the server took the _typeFilter.
	TypeFilter bool
}

// Errors a caller may want to tell apart.
var (
	// ErrKickOff: the server refused to start the export.
	ErrKickOff = errors.New("bulk: the server refused the export request")
	// ErrJobFailed: the export job failed on the server.
	ErrJobFailed = errors.New("bulk: the export failed on the server")
	// ErrJobGone: the polling location answers 404 (the job was cancelled
	// or expired).
	ErrJobGone = errors.New("bulk: the export job no longer exists on the server")
	// ErrExpired: a file URL is no longer served (404 or 410, or past the
	// manifest's Expires time).
	ErrExpired = errors.New("bulk: the export's files have expired; run again to request a fresh export")
)

// KickOff starts an export and returns its polling location. A 429 (the
// server is busy with another export) is waited out as its Retry-After
// asks. A refusal of a request with _typeFilter is retried once without it.
func (x *Exporter) KickOff(ctx context.Context, r Request) (Job, error) {
	if err := r.Validate(); err != nil {
		return Job{}, fmt.Errorf("bulk: %w", err)
	}
	withFilters := len(r.TypeFilters) > 0
	for attempt := 0; ; attempt++ {
		u := r.path()
		if q := r.query(withFilters); q != "" {
			u += "?" + q
		}
		resp, err := x.c.Stream(ctx, client.StreamRequest{
			Op: "bulk-kickoff", Method: http.MethodGet, URL: u, Authorize: true,
			Header: http.Header{"Accept": {"application/fhir+json"}, "Prefer": {"respond-async"}},
		})
		if err != nil {
			if ctx.Err() == nil && client.IsRetryable(err) && attempt+1 < x.tries {
				if serr := x.c.Sleep(ctx, x.c.Backoff(attempt)); serr != nil {
					return Job{}, fmt.Errorf("bulk: kick-off: %w", serr)
				}
				continue
			}
			return Job{}, fmt.Errorf("bulk: kick-off: %w", err)
		}
		switch {
		case resp.StatusCode == http.StatusAccepted:
			drain(resp)
			loc := resp.Header.Get("Content-Location")
			if loc == "" {
				return Job{}, fmt.Errorf("%w: 202 without a Content-Location header", ErrKickOff)
			}
			base := resp.Request.URL
			abs, err := base.Parse(loc)
			if err != nil {
				return Job{}, fmt.Errorf("%w: unreadable Content-Location", ErrKickOff)
			}
			job := Job{StatusURL: abs.String(), TypeFilter: withFilters}
			if x.hooks.KickedOff != nil {
				x.hooks.KickedOff(withFilters)
			}
			return job, nil
		case resp.StatusCode == http.StatusTooManyRequests && attempt+1 < x.tries:
			wait := x.wait(resp, attempt)
			drain(resp)
			x.throttled(wait)
			if err := x.c.Sleep(ctx, wait); err != nil {
				return Job{}, fmt.Errorf("bulk: kick-off: %w", err)
			}
		case withFilters && resp.StatusCode >= 400 && resp.StatusCode < 500 && refusedParameter(resp.StatusCode):
			fe := x.c.ResponseError("bulk-kickoff", resp)
			x.log.WarnContext(ctx, "the server refused _typeFilter; asking again without it and filtering here", "status", fe.Status, "outcome", fe.Outcome)
			withFilters = false
		default:
			return Job{}, fmt.Errorf("%w: %w", ErrKickOff, x.c.ResponseError("bulk-kickoff", resp))
		}
	}
}

// refusedParameter: a status that may mean "I do not support a parameter
// you sent", as opposed to credentials, a missing endpoint or throttling.
func refusedParameter(status int) bool {
	switch status {
	case http.StatusUnauthorized, http.StatusForbidden, http.StatusNotFound, http.StatusTooManyRequests:
		return false
	}
	return true
}

// Wait polls the job until it completes and returns its manifest. Between
// polls it waits what Retry-After asks (capped at MaxPollWait), or an
// exponential backoff when the server gives no Retry-After. A 429 is waited
// out the same way. A 5xx whose OperationOutcome is transient is a failed
// poll, not a failed job, and is retried; any other error status is the
// job's failure and is returned with its OperationOutcome text.
func (x *Exporter) Wait(ctx context.Context, job Job) (Manifest, error) {
	failures := 0
	for poll := 0; ; poll++ {
		resp, err := x.c.Stream(ctx, client.StreamRequest{
			Op: "bulk-status", Method: http.MethodGet, URL: job.StatusURL, Authorize: true,
			Header: http.Header{"Accept": {"application/json"}},
		})
		if err != nil {
			failures++
			if ctx.Err() == nil && client.IsRetryable(err) && failures < x.tries {
				if serr := x.c.Sleep(ctx, x.c.Backoff(failures)); serr != nil {
					return Manifest{}, fmt.Errorf("bulk: status: %w", serr)
				}
				continue
			}
			return Manifest{}, fmt.Errorf("bulk: status: %w", err)
		}
		switch {
		case resp.StatusCode == http.StatusOK:
			body, err := io.ReadAll(io.LimitReader(resp.Body, 16<<20))
			resp.Body.Close()
			if err != nil {
				return Manifest{}, fmt.Errorf("bulk: reading the manifest: %w", err)
			}
			m, err := ParseManifest(body)
			if err != nil {
				return Manifest{}, err
			}
			if exp, err := http.ParseTime(resp.Header.Get("Expires")); err == nil {
				m.Expires = exp
			}
			if x.hooks.Manifest != nil {
				x.hooks.Manifest(m)
			}
			return m, nil
		case resp.StatusCode == http.StatusAccepted:
			failures = 0
			progress := clip(strings.Trim(resp.Header.Get("X-Progress"), "\"“” "))
			wait := x.wait(resp, poll)
			drain(resp)
			if x.hooks.Running != nil {
				x.hooks.Running(progress, wait)
			}
			x.log.DebugContext(ctx, "export running", "progress", progress, "wait", wait)
			if err := x.c.Sleep(ctx, wait); err != nil {
				return Manifest{}, fmt.Errorf("bulk: status: %w", err)
			}
		case resp.StatusCode == http.StatusTooManyRequests:
			failures++
			wait := x.wait(resp, failures)
			drain(resp)
			x.throttled(wait)
			if failures >= x.tries {
				return Manifest{}, fmt.Errorf("bulk: status: throttled %d times in a row", failures)
			}
			if err := x.c.Sleep(ctx, wait); err != nil {
				return Manifest{}, fmt.Errorf("bulk: status: %w", err)
			}
		case resp.StatusCode == http.StatusNotFound:
			return Manifest{}, fmt.Errorf("%w: %w", ErrJobGone, x.c.ResponseError("bulk-status", resp))
		default:
			body, _ := io.ReadAll(io.LimitReader(resp.Body, 1<<20))
			resp.Body.Close()
			oo, perr := ParseOutcome(body)
			if perr == nil && oo.Transient() && resp.StatusCode >= 500 {
				failures++
				if failures < x.tries {
					wait := x.c.Backoff(failures)
					if err := x.c.Sleep(ctx, wait); err != nil {
						return Manifest{}, fmt.Errorf("bulk: status: %w", err)
					}
					continue
				}
			}
			if perr == nil {
				return Manifest{}, &JobError{Status: resp.StatusCode, Outcome: oo}
			}
			return Manifest{}, &JobError{Status: resp.StatusCode, Outcome: Outcome{Issues: []Issue{{Severity: "error", Text: clip(string(body))}}}}
		}
	}
}

// JobError is a failed export, with the server's OperationOutcome.
type JobError struct {
	Status  int
	Outcome Outcome
}

func (e *JobError) Error() string {
	return fmt.Sprintf("%v: HTTP %d: %s", ErrJobFailed, e.Status, e.Outcome)
}

// Is matches [ErrJobFailed].
func (e *JobError) Is(target error) bool { return target == ErrJobFailed }

// Cancel deletes the job (the IG's Bulk Data Delete Request): the server
// stops it, or may remove its files when it is complete.
func (x *Exporter) Cancel(ctx context.Context, job Job) error {
	resp, err := x.c.Stream(ctx, client.StreamRequest{
		Op: "bulk-cancel", Method: http.MethodDelete, URL: job.StatusURL, Authorize: true,
		Header: http.Header{"Accept": {"application/fhir+json"}},
	})
	if err != nil {
		return fmt.Errorf("bulk: cancel: %w", err)
	}
	if resp.StatusCode >= 200 && resp.StatusCode < 300 {
		drain(resp)
		return nil
	}
	return fmt.Errorf("bulk: cancel: %w", x.c.ResponseError("bulk-cancel", resp))
}

// LocalFile is a downloaded file.
type LocalFile struct {
	Type  string
	Path  string
	Bytes int64
}

// Download streams one manifest file to path (through a temporary file, so
// a file that is there is whole). requiresAccessToken decides whether the
// credentials go with it. A 404 or 410, or a time past the manifest's
// Expires, is [ErrExpired]; a 429 or 503 is waited out; a broken transfer
// starts the file again.
func (x *Exporter) Download(ctx context.Context, m Manifest, f File, path string) (LocalFile, error) {
	if !m.Expires.IsZero() && x.now().After(m.Expires) {
		return LocalFile{}, fmt.Errorf("%w (the manifest said the files expire at %s)", ErrExpired, m.Expires.UTC().Format(time.RFC3339))
	}
	failures := 0
	for {
		n, err := x.downloadOnce(ctx, m, f, path)
		if err == nil {
			lf := LocalFile{Type: f.Type, Path: path, Bytes: n}
			if x.hooks.FileDone != nil {
				x.hooks.FileDone(lf)
			}
			return lf, nil
		}
		var retry *retryable
		if ctx.Err() != nil || !errors.As(err, &retry) {
			return LocalFile{}, err
		}
		failures++
		if failures >= x.tries {
			return LocalFile{}, retry.err
		}
		wait := retry.wait
		if wait <= 0 {
			wait = x.c.Backoff(failures)
		}
		if err := x.c.Sleep(ctx, wait); err != nil {
			return LocalFile{}, fmt.Errorf("bulk: download: %w", err)
		}
	}
}

type retryable struct {
	err  error
	wait time.Duration
}

func (r *retryable) Error() string { return r.err.Error() }
func (r *retryable) Unwrap() error { return r.err }

func (x *Exporter) downloadOnce(ctx context.Context, m Manifest, f File, path string) (int64, error) {
	resp, err := x.c.Stream(ctx, client.StreamRequest{
		Op: "bulk-file", Method: http.MethodGet, URL: f.URL, Authorize: m.RequiresAccessToken,
		Header: http.Header{"Accept": {"application/fhir+ndjson"}},
	})
	if err != nil {
		if client.IsRetryable(err) {
			return 0, &retryable{err: fmt.Errorf("bulk: download %s file: %w", f.Type, err)}
		}
		return 0, fmt.Errorf("bulk: download %s file: %w", f.Type, err)
	}
	switch {
	case resp.StatusCode == http.StatusOK:
	case resp.StatusCode == http.StatusNotFound || resp.StatusCode == http.StatusGone:
		fe := x.c.ResponseError("bulk-file", resp)
		return 0, fmt.Errorf("%w: %s file: %w", ErrExpired, f.Type, fe)
	case resp.StatusCode == http.StatusTooManyRequests || resp.StatusCode == http.StatusServiceUnavailable || resp.StatusCode >= 500:
		wait, _ := x.c.RetryAfter(resp.Header)
		fe := x.c.ResponseError("bulk-file", resp)
		if resp.StatusCode == http.StatusTooManyRequests {
			x.throttled(wait)
		}
		return 0, &retryable{err: fmt.Errorf("bulk: download %s file: %w", f.Type, fe), wait: min(wait, x.max)}
	default:
		return 0, fmt.Errorf("bulk: download %s file: %w", f.Type, x.c.ResponseError("bulk-file", resp))
	}
	defer resp.Body.Close()
	tmp, err := os.CreateTemp(filepath.Dir(path), ".download-*")
	if err != nil {
		return 0, fmt.Errorf("bulk: download: %w", err)
	}
	defer os.Remove(tmp.Name())
	n, err := io.Copy(tmp, &countingReader{r: resp.Body, hook: x.hooks.Bytes})
	if err != nil {
		tmp.Close()
		if ctx.Err() != nil {
			return 0, fmt.Errorf("bulk: download %s file: %w", f.Type, ctx.Err())
		}
		return 0, &retryable{err: fmt.Errorf("bulk: download %s file: transfer broke after %d bytes: %w", f.Type, n, err)}
	}
	if err := tmp.Sync(); err != nil {
		tmp.Close()
		return 0, fmt.Errorf("bulk: download: %w", err)
	}
	if err := tmp.Close(); err != nil {
		return 0, fmt.Errorf("bulk: download: %w", err)
	}
	if err := os.Rename(tmp.Name(), path); err != nil {
		return 0, fmt.Errorf("bulk: download: %w", err)
	}
	return n, nil
}

// CountReader returns a reader of r that calls hook with the bytes of
// each read, for progress.
func CountReader(r io.Reader, hook func(n int64)) io.Reader { return &countingReader{r: r, hook: hook} }

type countingReader struct {
	r    io.Reader
	hook func(int64)
}

func (c *countingReader) Read(p []byte) (int, error) {
	n, err := c.r.Read(p)
	if n > 0 && c.hook != nil {
		c.hook(int64(n))
	}
	return n, err
}

// Result is a finished export on disk.
type Result struct {
	Manifest Manifest
	// Files are the downloaded output files of the wanted types, Patient
	// files first (so patient facts are stored before readings), then in
	// manifest order.
	Files []LocalFile
	// Deleted are the downloaded deleted files (only with _since): NDJSON
	// of Bundles naming deleted resources, read with [ParseDeletions].
	Deleted []LocalFile
	// Issues are the OperationOutcome issues of the manifest's error files
	// (a partial success).
	Issues []Issue
	Bytes  int64
}

// Export runs a whole export: kick-off, polling, and download of the
// output files whose type is in want (all when want is empty), of the
// deleted files and of the error files. The job is deleted when done, and also when ctx ends or a
// step fails after the kick-off, so the server does not keep working for a
// client that left (the DELETE gets its own short deadline).
func (x *Exporter) Export(ctx context.Context, r Request, want []string) (res Result, err error) {
	job, err := x.KickOff(ctx, r)
	if err != nil {
		return Result{}, err
	}
	defer func() {
		cctx, cancel := context.WithTimeout(context.WithoutCancel(ctx), 15*time.Second)
		defer cancel()
		if cerr := x.Cancel(cctx, job); cerr != nil {
			if err != nil && !errors.Is(err, ErrJobGone) {
				x.log.WarnContext(ctx, "cancelling the export job failed", "err", cerr)
			} else if err == nil {
				x.log.DebugContext(ctx, "deleting the finished export job failed", "err", cerr)
			}
		}
	}()
	m, err := x.Wait(ctx, job)
	if err != nil {
		return Result{}, err
	}
	res.Manifest = m
	wanted := func(t string) bool {
		if len(want) == 0 {
			return true
		}
		for _, w := range want {
			if w == t {
				return true
			}
		}
		return false
	}
	var order []File
	for _, f := range m.Output {
		if f.Type == "Patient" && wanted(f.Type) {
			order = append(order, f)
		}
	}
	for _, f := range m.Output {
		if f.Type != "Patient" && wanted(f.Type) {
			order = append(order, f)
		}
	}
	if err := os.MkdirAll(x.dir, 0o700); err != nil {
		return Result{}, fmt.Errorf("bulk: %w", err)
	}
	for i, f := range order {
		lf, err := x.Download(ctx, m, f, filepath.Join(x.dir, fmt.Sprintf("%04d.%s.ndjson", i+1, f.Type)))
		if err != nil {
			return Result{}, err
		}
		res.Files = append(res.Files, lf)
		res.Bytes += lf.Bytes
	}
	for i, f := range m.Deleted {
		lf, err := x.Download(ctx, m, f, filepath.Join(x.dir, fmt.Sprintf("deleted-%04d.ndjson", i+1)))
		if err != nil {
			return Result{}, err
		}
		res.Deleted = append(res.Deleted, lf)
		res.Bytes += lf.Bytes
	}
	for i, f := range m.Error {
		lf, err := x.Download(ctx, m, f, filepath.Join(x.dir, fmt.Sprintf("error-%04d.ndjson", i+1)))
		if err != nil {
			return Result{}, err
		}
		res.Bytes += lf.Bytes
		issues, err := readIssues(lf.Path)
		if err != nil {
			return Result{}, err
		}
		res.Issues = append(res.Issues, issues...)
	}
	return res, nil
}

// readIssues reads an error file: NDJSON of OperationOutcomes.
func readIssues(path string) ([]Issue, error) {
	f, err := os.Open(path)
	if err != nil {
		return nil, fmt.Errorf("bulk: %w", err)
	}
	defer f.Close()
	var out []Issue
	err = EachLine(f, func(_ int, line []byte, _ error) error {
		oo, err := ParseOutcome(line)
		if err != nil {
			out = append(out, Issue{Severity: "error", Code: "invalid", Text: "an error file line is not an OperationOutcome"})
			return nil
		}
		out = append(out, oo.Issues...)
		return nil
	})
	return out, err
}

func (x *Exporter) wait(resp *http.Response, attempt int) time.Duration {
	if d, ok := x.c.RetryAfter(resp.Header); ok {
		return min(d, x.max)
	}
	return min(max(x.c.Backoff(attempt), time.Second), x.max)
}

func (x *Exporter) throttled(wait time.Duration) {
	if x.hooks.Throttled != nil {
		x.hooks.Throttled(wait)
	}
}

func drain(resp *http.Response) {
	_, _ = io.Copy(io.Discard, io.LimitReader(resp.Body, 64<<10))
	resp.Body.Close()
}
