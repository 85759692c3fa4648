package bulk

import (
	"encoding/json"
	"errors"
	"fmt"
	"net/url"
	"strings"
	"time"
	"unicode"

	"github.com/deadspace-fhir/deadspace/fhir/client"
)

// Manifest is the body of a complete status response (Bulk Data Access IG
// 2.0.0, "Response - Complete Status"): the instant the export reflects,
// whether the files need the access token, and the files.
type Manifest struct {
	// TransactionTime: the export includes every matching resource modified
	// up to and including this instant, so it is the next run's _since.
	TransactionTime     time.Time
	Request             string
	RequiresAccessToken bool
	Output              []File
	// Deleted lists files of transaction Bundles naming deleted resources
	// (only with _since); Export downloads them and ParseDeletions reads
	// their lines.
	Deleted []File
	// Error lists NDJSON files of OperationOutcomes: a partial success.
	Error []File
	// Expires is when the server stops serving the files (the status
	// response's Expires header); zero when it did not say.
	Expires time.Time
}

// File is one item of a manifest's output, deleted or error array.
type File struct {
	Type  string
	URL   string
	Count int // -1 when the server did not say
}

type wireFile struct {
	Type  string          `json:"type"`
	URL   string          `json:"url"`
	Count json.RawMessage `json:"count"`
}

type wireManifest struct {
	TransactionTime     *string     `json:"transactionTime"`
	Request             string      `json:"request"`
	RequiresAccessToken *bool       `json:"requiresAccessToken"`
	Output              *[]wireFile `json:"output"`
	Deleted             []wireFile  `json:"deleted"`
	Error               []wireFile  `json:"error"`
}

// ErrBadManifest marks a complete-status body this client cannot use.
var ErrBadManifest = errors.New("bulk: unusable export manifest")

// ParseManifest reads a complete status body. transactionTime,
// requiresAccessToken and output are required by the IG and checked; every
// file needs a resource type and an absolute http(s) URL. Unknown fields
// (extension) are ignored.
func ParseManifest(body []byte) (Manifest, error) {
	var w wireManifest
	if err := json.Unmarshal(body, &w); err != nil {
		return Manifest{}, fmt.Errorf("%w: %w", ErrBadManifest, err)
	}
	var errs []error
	var m Manifest
	switch {
	case w.TransactionTime == nil:
		errs = append(errs, errors.New("transactionTime is missing"))
	default:
		t, err := parseInstant(*w.TransactionTime)
		switch {
		case err != nil:
			errs = append(errs, fmt.Errorf("transactionTime: %w", err))
		case t.IsZero():
			// Year 1 is no time an export ran, and a zero time would
			// read as "no cursor" to the next export's _since.
			errs = append(errs, errors.New("transactionTime: the zero instant (0001-01-01T00:00:00Z)"))
		}
		m.TransactionTime = t
	}
	if w.RequiresAccessToken == nil {
		errs = append(errs, errors.New("requiresAccessToken is missing"))
	} else {
		m.RequiresAccessToken = *w.RequiresAccessToken
	}
	var err error
	if w.Output == nil {
		errs = append(errs, errors.New("output is missing"))
	} else if m.Output, err = files("output", *w.Output); err != nil {
		errs = append(errs, err)
	}
	m.Request = w.Request
	if m.Deleted, err = files("deleted", w.Deleted); err != nil {
		errs = append(errs, err)
	}
	if m.Error, err = files("error", w.Error); err != nil {
		errs = append(errs, err)
	}
	if len(errs) > 0 {
		return Manifest{}, fmt.Errorf("%w: %w", ErrBadManifest, errors.Join(errs...))
	}
	return m, nil
}

func files(field string, in []wireFile) ([]File, error) {
	var out []File
	var errs []error
	for i, f := range in {
		if !isResourceType(f.Type) {
			errs = append(errs, fmt.Errorf("%s[%d].type %q is not a resource type", field, i, clip(f.Type)))
			continue
		}
		u, err := url.Parse(f.URL)
		if err != nil || !u.IsAbs() || (u.Scheme != "http" && u.Scheme != "https") || u.Host == "" {
			errs = append(errs, fmt.Errorf("%s[%d].url is not an absolute http(s) URL", field, i))
			continue
		}
		count := -1
		if len(f.Count) > 0 && string(f.Count) != "null" {
			var n int
			if err := json.Unmarshal(f.Count, &n); err != nil || n < 0 {
				errs = append(errs, fmt.Errorf("%s[%d].count is not a non-negative integer", field, i))
				continue
			}
			count = n
		}
		out = append(out, File{Type: f.Type, URL: f.URL, Count: count})
	}
	return out, errors.Join(errs...)
}

// isResourceType accepts the shape of a FHIR resource type name: a capital
// letter, then letters, at most 64.
func isResourceType(s string) bool {
	if s == "" || len(s) > 64 || s[0] < 'A' || s[0] > 'Z' {
		return false
	}
	for _, r := range s {
		if !(r >= 'A' && r <= 'Z' || r >= 'a' && r <= 'z') {
			return false
		}
	}
	return true
}

// parseInstant reads a FHIR instant: RFC 3339 with seconds and a zone.
func parseInstant(s string) (time.Time, error) {
	t, err := time.Parse(time.RFC3339Nano, s)
	if err != nil {
		return time.Time{}, fmt.Errorf("%q is not a FHIR instant", clip(s))
	}
	return t.UTC(), nil
}

// clip keeps a server's text short and printable for an error message.
func clip(s string) string {
	var b strings.Builder
	for _, r := range s {
		if b.Len() >= 100 {
			b.WriteString("…")
			break
		}
		if !unicode.IsPrint(r) {
			r = ' '
		}
		b.WriteRune(r)
	}
	return b.String()
}

// Issue is one OperationOutcome issue, as the IG's error responses and
// error files carry them.
type Issue = client.Issue

// Outcome is a parsed OperationOutcome.
type Outcome struct {
	Issues []Issue
}

// String joins the issues' texts, for an error message.
func (o Outcome) String() string {
	var parts []string
	for _, is := range o.Issues {
		t := is.Text
		if t == "" {
			t = is.Code
		}
		parts = append(parts, is.Severity+": "+t)
	}
	return clip(strings.Join(parts, "; "))
}

// Transient reports whether every issue has a code from the IssueType
// value set's transient branch, which the IG uses to say "the poll failed,
// not the job: ask again later".
func (o Outcome) Transient() bool {
	if len(o.Issues) == 0 {
		return false
	}
	for _, is := range o.Issues {
		switch is.Code {
		case "transient", "lock-error", "no-store", "exception", "timeout", "incomplete", "throttled":
		default:
			return false
		}
	}
	return true
}

// ErrNotOutcome marks a body that is not an OperationOutcome.
var ErrNotOutcome = errors.New("bulk: not an OperationOutcome")

// ParseOutcome reads an OperationOutcome in JSON: each issue's severity,
// code and text, read as the FHIR client reads error bodies.
func ParseOutcome(body []byte) (Outcome, error) {
	issues, ok := client.OutcomeIssues(body)
	if !ok {
		return Outcome{}, ErrNotOutcome
	}
	return Outcome{Issues: issues}, nil
}
