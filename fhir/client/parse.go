package client

import (
	"bytes"
	"encoding/json"
	"errors"
	"fmt"
	"mime"
	"net/http"
	"strconv"
	"strings"
	"time"
	"unicode"
	"unicode/utf8"

	"github.com/deadspace-fhir/deadspace/fhir/ref"
)

// The wire structs below read only the fields this package needs, with plain strings for coded
// values. The samply models reject unknown codes in their enum UnmarshalJSON, and a client must
// not lose a server's error text because that server used a non-standard issue code.

type wireOutcome struct {
	ResourceType string `json:"resourceType"`
	Issue        []struct {
		Severity    string `json:"severity"`
		Code        string `json:"code"`
		Diagnostics string `json:"diagnostics"`
		Details     *struct {
			Text   string `json:"text"`
			Coding []struct {
				Display string `json:"display"`
				Code    string `json:"code"`
			} `json:"coding"`
		} `json:"details"`
	} `json:"issue"`
}

type wireMeta struct {
	ResourceType string `json:"resourceType"`
	ID           string `json:"id"`
	Meta         *struct {
		VersionID   string `json:"versionId"`
		LastUpdated string `json:"lastUpdated"`
	} `json:"meta"`
}

type wireLink struct {
	Relation string `json:"relation"`
	URL      string `json:"url"`
}

type wireBundle struct {
	ResourceType string            `json:"resourceType"`
	Type         string            `json:"type"`
	Link         []wireLink        `json:"link"`
	Entry        []json.RawMessage `json:"entry"`
}

type wireResponseEntry struct {
	Resource json.RawMessage `json:"resource"`
	Response *struct {
		Status       string          `json:"status"`
		Location     string          `json:"location"`
		Etag         string          `json:"etag"`
		LastModified string          `json:"lastModified"`
		Outcome      json.RawMessage `json:"outcome"`
	} `json:"response"`
}

const (
	maxOutcomeText = 1000
	maxBodyPrefix  = 200
)

// Outcome is what a client can say about an error body.
type outcomeInfo struct {
	Code string
	Text string
}

// isFHIRJSON accepts the R4 media type, the DSTU2 one some servers still send, and plain JSON,
// which many servers use for OperationOutcome bodies.
func isFHIRJSON(contentType string) bool {
	mt, _, err := mime.ParseMediaType(contentType)
	if err != nil {
		return false
	}
	switch mt {
	case "application/fhir+json", "application/json+fhir", "application/json":
		return true
	}
	return false
}

// parseOutcome describes an error body. An OperationOutcome in FHIR JSON gives its issue text;
// anything else (a proxy's HTML page, plain text) gives a short cleaned prefix of the body.
func parseOutcome(contentType string, body []byte) outcomeInfo {
	if isFHIRJSON(contentType) {
		if oi, ok := outcomeFromJSON(body); ok {
			return oi
		}
	}
	return outcomeInfo{Text: cleanPrefix(body, maxBodyPrefix)}
}

func outcomeFromJSON(body []byte) (outcomeInfo, bool) {
	issues, ok := OutcomeIssues(body)
	if !ok {
		return outcomeInfo{}, false
	}
	var oi outcomeInfo
	var texts []string
	for _, is := range issues {
		if oi.Code == "" {
			oi.Code = is.Code
		}
		t := is.Text
		if t == "" {
			t = is.Code
		}
		if t != "" {
			texts = append(texts, t)
		}
	}
	oi.Text = cleanPrefix([]byte(strings.Join(texts, "; ")), maxOutcomeText)
	return oi, true
}

// Issue is one OperationOutcome issue: its severity, its code, and its text
// (diagnostics, else details.text, else a details coding's display or
// code), each cleaned to one short line of printable text.
type Issue struct {
	Severity string
	Code     string
	Text     string
}

// OutcomeIssues reads an OperationOutcome in JSON; ok is false when body is
// not one. Codes are read as plain strings, so a server's non-standard
// issue code never loses its text.
func OutcomeIssues(body []byte) (issues []Issue, ok bool) {
	var oo wireOutcome
	if err := json.Unmarshal(body, &oo); err != nil || oo.ResourceType != "OperationOutcome" {
		return nil, false
	}
	for _, is := range oo.Issue {
		t := is.Diagnostics
		if t == "" && is.Details != nil {
			t = is.Details.Text
			for _, c := range is.Details.Coding {
				if t != "" {
					break
				}
				t = c.Display
				if t == "" {
					t = c.Code
				}
			}
		}
		issues = append(issues, Issue{
			Severity: cleanPrefix([]byte(is.Severity), 64),
			Code:     cleanPrefix([]byte(is.Code), 64),
			Text:     cleanPrefix([]byte(t), maxOutcomeText),
		})
	}
	return issues, true
}

// cleanPrefix returns at most n bytes of b as one line of valid UTF-8: control characters and
// runs of white space become single spaces, so a body cannot forge log lines.
func cleanPrefix(b []byte, n int) string {
	var out strings.Builder
	space := false
	for len(b) > 0 && out.Len() < n {
		r, size := utf8.DecodeRune(b)
		b = b[size:]
		if r == utf8.RuneError && size <= 1 {
			r = '\uFFFD'
		}
		if unicode.IsSpace(r) || unicode.IsControl(r) {
			space = out.Len() > 0
			continue
		}
		if space {
			out.WriteByte(' ')
			space = false
		}
		if out.Len()+utf8.RuneLen(r) > n {
			break
		}
		out.WriteRune(r)
	}
	s := out.String()
	if len(b) > 0 && s != "" {
		s += "…"
	}
	return s
}

// Meta is what a write or read tells about the resource: from the body's id and meta when there
// is one, else from the ETag, Location and Last-Modified headers (or, in a transaction response
// entry, their entry.response counterparts).
type Meta struct {
	// Status is the HTTP status, or entry.response.status in a transaction response. For a
	// conditional create 201 means created and 200 means an existing match was returned.
	Status       int
	ResourceType string
	ID           string
	VersionID    string
	LastUpdated  time.Time
	// ETag and Location are as the server sent them.
	ETag     string
	Location string
}

// parseLocation takes Type/id[/_history/vid] from a Location, relative or absolute (fhir/ref
// parses it). A query or fragment and one trailing slash, which some servers add, are ignored.
func parseLocation(loc string) (typ, id, vid string) {
	if i := strings.IndexAny(loc, "?#"); i >= 0 {
		loc = loc[:i]
	}
	r, _, err := ref.ParseAny(strings.TrimSuffix(loc, "/"))
	if err != nil {
		return "", "", ""
	}
	return r.Type, r.ID, r.Version
}

// parseETag returns the version from W/"vid" or "vid"; anything else gives "".
func parseETag(etag string) string {
	s := strings.TrimSpace(etag)
	s = strings.TrimPrefix(s, "W/")
	if len(s) >= 2 && s[0] == '"' && s[len(s)-1] == '"' {
		return s[1 : len(s)-1]
	}
	return ""
}

func parseInstant(s string) time.Time {
	if s == "" {
		return time.Time{}
	}
	if t, err := time.Parse(time.RFC3339Nano, s); err == nil {
		return t
	}
	if t, err := http.ParseTime(s); err == nil {
		return t
	}
	return time.Time{}
}

// buildMeta fills Meta from the body first (it is the resource itself) and from the header
// values for whatever the body does not say, e.g. under Prefer: return=minimal.
func buildMeta(status int, body []byte, etag, location, lastModified string) Meta {
	m := Meta{Status: status, ETag: etag, Location: location}
	if len(bytes.TrimSpace(body)) > 0 {
		var wm wireMeta
		if json.Unmarshal(body, &wm) == nil {
			m.ResourceType, m.ID = wm.ResourceType, wm.ID
			if wm.Meta != nil {
				m.VersionID = wm.Meta.VersionID
				m.LastUpdated = parseInstant(wm.Meta.LastUpdated)
			}
		}
	}
	lt, lid, lvid := parseLocation(location)
	if m.ResourceType == "" {
		m.ResourceType = lt
	}
	if m.ID == "" && (m.ResourceType == lt || lt == "") {
		m.ID = lid
	}
	if m.VersionID == "" {
		m.VersionID = parseETag(etag)
	}
	if m.VersionID == "" && m.ID == lid {
		m.VersionID = lvid
	}
	if m.LastUpdated.IsZero() {
		m.LastUpdated = parseInstant(lastModified)
	}
	return m
}

// parseStatusLine reads entry.response.status, which R4 says starts with the 3-digit code
// ("201 Created"); some servers send the code alone.
func parseStatusLine(s string) (int, error) {
	s = strings.TrimSpace(s)
	end := strings.IndexFunc(s, func(r rune) bool { return r < '0' || r > '9' })
	if end < 0 {
		end = len(s)
	}
	if end != 3 || (end < len(s) && s[end] != ' ') {
		return 0, fmt.Errorf("bad entry.response.status %q", cleanPrefix([]byte(s), 40))
	}
	n, _ := strconv.Atoi(s[:3])
	if n < 100 {
		return 0, fmt.Errorf("bad entry.response.status %q", s)
	}
	return n, nil
}

// EntryResponse is one entry of a transaction-response or batch-response Bundle.
type EntryResponse struct {
	// Meta carries the parsed status, location, etag and lastModified, completed from the
	// returned resource when the server included it.
	Meta
	// StatusLine is entry.response.status as sent ("201 Created").
	StatusLine string
	// OutcomeCode and Outcome describe entry.response.outcome, if present.
	OutcomeCode string
	Outcome     string
	// Resource is entry.resource, nil when absent.
	Resource json.RawMessage
}

// TransactionResponse is the reply to a transaction or batch, one entry per request entry, in
// request order.
type TransactionResponse struct {
	// Type is transaction-response or batch-response.
	Type    string
	Entries []EntryResponse
}

// Err joins an [*Error] for every entry with status 400 or more; nil when all succeeded. A
// transaction that fails fails as a whole with an HTTP error, so this matters mainly for
// batches.
func (r TransactionResponse) Err() error {
	op := strings.TrimSuffix(r.Type, "-response")
	var errs []error
	for i, e := range r.Entries {
		if e.Status >= 400 {
			errs = append(errs, &Error{
				Op:           fmt.Sprintf("%s entry %d", op, i),
				ResourceType: e.ResourceType,
				Status:       e.Status,
				Code:         e.OutcomeCode,
				Outcome:      e.Outcome,
				Retryable:    e.Status == http.StatusTooManyRequests || e.Status == http.StatusServiceUnavailable,
				Attempts:     1,
			})
		}
	}
	return errors.Join(errs...)
}

// parseTransactionResponse reads a transaction-response or batch-response Bundle. want is the
// number of request entries; R4 requires exactly one response entry for each.
func parseTransactionResponse(body []byte, want int) (TransactionResponse, error) {
	var b wireBundle
	if err := json.Unmarshal(body, &b); err != nil {
		return TransactionResponse{}, fmt.Errorf("response is not a Bundle: %w", err)
	}
	if b.ResourceType != "Bundle" {
		return TransactionResponse{}, fmt.Errorf("response resourceType is %q, want Bundle", cleanPrefix([]byte(b.ResourceType), 64))
	}
	if b.Type != "transaction-response" && b.Type != "batch-response" {
		return TransactionResponse{}, fmt.Errorf("response Bundle.type is %q, want transaction-response or batch-response", cleanPrefix([]byte(b.Type), 64))
	}
	if want >= 0 && len(b.Entry) != want {
		return TransactionResponse{}, fmt.Errorf("response has %d entries for %d request entries", len(b.Entry), want)
	}
	tr := TransactionResponse{Type: b.Type, Entries: make([]EntryResponse, 0, len(b.Entry))}
	for i, raw := range b.Entry {
		var we wireResponseEntry
		if err := json.Unmarshal(raw, &we); err != nil {
			return TransactionResponse{}, fmt.Errorf("response entry %d: %w", i, err)
		}
		if we.Response == nil {
			return TransactionResponse{}, fmt.Errorf("response entry %d has no response", i)
		}
		st, err := parseStatusLine(we.Response.Status)
		if err != nil {
			return TransactionResponse{}, fmt.Errorf("response entry %d: %w", i, err)
		}
		var res json.RawMessage
		if len(we.Resource) > 0 && !bytes.Equal(bytes.TrimSpace(we.Resource), []byte("null")) {
			res = we.Resource
		}
		er := EntryResponse{
			Meta:       buildMeta(st, res, we.Response.Etag, we.Response.Location, we.Response.LastModified),
			StatusLine: we.Response.Status,
			Resource:   res,
		}
		if len(we.Response.Outcome) > 0 {
			if oi, ok := outcomeFromJSON(we.Response.Outcome); ok {
				er.OutcomeCode, er.Outcome = oi.Code, oi.Text
			}
		}
		tr.Entries = append(tr.Entries, er)
	}
	return tr, nil
}

// requestBundleInfo is what Transaction needs to know about the bundle it sends.
type requestBundleInfo struct {
	Type    string
	Entries int
	// Repeatable is true when replaying the bundle cannot store anything twice: every entry is
	// a GET, HEAD, PUT, DELETE or a POST guarded by ifNoneExist.
	Repeatable bool
}

func inspectRequestBundle(body []byte) (requestBundleInfo, error) {
	var b requestBundleJSON
	if noInspectFast || !inspectFast(body, &b) {
		b = requestBundleJSON{}
		if err := json.Unmarshal(body, &b); err != nil {
			return requestBundleInfo{}, fmt.Errorf("bundle is not JSON: %w", err)
		}
	}
	if b.ResourceType != "Bundle" {
		return requestBundleInfo{}, fmt.Errorf("resourceType is %q, want Bundle", cleanPrefix([]byte(b.ResourceType), 64))
	}
	if b.Type != "transaction" && b.Type != "batch" {
		//lint:ignore ST1005 the message names the FHIR element Bundle.type
		return requestBundleInfo{}, fmt.Errorf("Bundle.type is %q, want transaction or batch", cleanPrefix([]byte(b.Type), 64))
	}
	info := requestBundleInfo{Type: b.Type, Entries: len(b.Entry), Repeatable: true}
	for i, e := range b.Entry {
		if e.Request == nil || e.Request.Method == "" {
			return requestBundleInfo{}, fmt.Errorf("entry %d has no request.method", i)
		}
		switch e.Request.Method {
		case "GET", "HEAD", "PUT", "DELETE":
		case "POST":
			if e.Request.IfNoneExist == "" {
				info.Repeatable = false
			}
		default:
			// PATCH and anything unknown: assume a replay could apply twice.
			info.Repeatable = false
		}
	}
	return info, nil
}

// searchPage is one parsed searchset page.
type searchPage struct {
	Entries []json.RawMessage
	Next    string
}

func parseSearchPage(body []byte) (searchPage, error) {
	var b wireBundle
	if err := json.Unmarshal(body, &b); err != nil {
		return searchPage{}, fmt.Errorf("search response is not a Bundle: %w", err)
	}
	if b.ResourceType != "Bundle" {
		return searchPage{}, fmt.Errorf("search response resourceType is %q, want Bundle", cleanPrefix([]byte(b.ResourceType), 64))
	}
	if b.Type != "searchset" {
		return searchPage{}, fmt.Errorf("search response Bundle.type is %q, want searchset", cleanPrefix([]byte(b.Type), 64))
	}
	p := searchPage{Entries: b.Entry}
	for _, l := range b.Link {
		if l.Relation == "next" {
			if p.Next != "" && p.Next != l.URL {
				return searchPage{}, errors.New("search response has two different next links")
			}
			p.Next = l.URL
		}
	}
	return p, nil
}

// resourceTypeOf reads the top-level resourceType and id of a JSON resource.
func resourceTypeOf(body []byte) (typ, id string, err error) {
	var wm wireMeta
	if noInspectFast || !metaFast(body, &wm) {
		wm = wireMeta{}
		if err := json.Unmarshal(body, &wm); err != nil {
			return "", "", fmt.Errorf("resource is not a JSON object: %w", err)
		}
	}
	return wm.ResourceType, wm.ID, nil
}
