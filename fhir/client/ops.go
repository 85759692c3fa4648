package client

import (
	"context"
	"encoding/json"
	"errors"
	"fmt"
	"net/http"
	"net/url"
	"regexp"
	"strings"
)

var (
	typeRE = regexp.MustCompile(`^[A-Z][A-Za-z]{0,63}$`)
	// R4 id: "[A-Za-z0-9\-\.]{1,64}" (https://hl7.org/fhir/R4/datatypes.html#id). Checking it
	// also keeps path segments from smuggling "/" or "..".
	idRE = regexp.MustCompile(`^[A-Za-z0-9\-.]{1,64}$`)
)

// ErrPagingLoop is returned when a server's next link points at a page already fetched.
var ErrPagingLoop = errors.New("fhir: search next link repeats an earlier page")

// ErrEmptyPages is returned when a search keeps giving pages without entries, each with a new
// next link: [MaxEmptyPages] in a row. A server that pages this way (a cursor that never
// moves, a link that only changes a counter) would otherwise be read for ever.
var ErrEmptyPages = errors.New("fhir: search gives page after page without entries")

// MaxEmptyPages is how many pages in a row without entries, each with a next link, a search
// reads before it ends with [ErrEmptyPages]. Servers may return fewer entries than asked for,
// and some return an empty page or two (entries filtered out after the page was cut); a run
// this long is a server paging without end.
const MaxEmptyPages = 50

func checkType(typ string) error {
	if !typeRE.MatchString(typ) {
		return fmt.Errorf("invalid resource type %q", cleanPrefix([]byte(typ), 64))
	}
	return nil
}

// checkID says what is wrong with an id without quoting it: the error may be
// logged, and the id may be a patient's.
func checkID(what, id string) error {
	switch {
	case idRE.MatchString(id):
		return nil
	case id == "":
		return fmt.Errorf("invalid %s: empty", what)
	case len(id) > 64:
		return fmt.Errorf("invalid %s: %d bytes, more than 64", what, len(id))
	}
	return fmt.Errorf("invalid %s: a character other than A-Z, a-z, 0-9, '-' and '.'", what)
}

func (c *Client) resourceURL(parts ...string) string {
	return c.base.JoinPath(parts...).String()
}

// Read fetches the current version of typ/id.
func (c *Client) Read(ctx context.Context, typ, id string) ([]byte, Meta, error) {
	if err := checkType(typ); err != nil {
		return nil, Meta{}, fmt.Errorf("fhir read: %w", err)
	}
	if err := checkID("id", id); err != nil {
		return nil, Meta{}, fmt.Errorf("fhir read %s: %w", typ, err)
	}
	return c.get(ctx, "read", typ, c.resourceURL(typ, id))
}

// VRead fetches version vid of typ/id.
func (c *Client) VRead(ctx context.Context, typ, id, vid string) ([]byte, Meta, error) {
	if err := checkType(typ); err != nil {
		return nil, Meta{}, fmt.Errorf("fhir vread: %w", err)
	}
	if err := checkID("id", id); err != nil {
		return nil, Meta{}, fmt.Errorf("fhir vread %s: %w", typ, err)
	}
	if err := checkID("version id", vid); err != nil {
		return nil, Meta{}, fmt.Errorf("fhir vread %s: %w", typ, err)
	}
	return c.get(ctx, "vread", typ, c.resourceURL(typ, id, "_history", vid))
}

func (c *Client) get(ctx context.Context, op, typ, u string) ([]byte, Meta, error) {
	resp, err := c.do(ctx, request{op: op, resourceType: typ, method: http.MethodGet, url: u, repeatable: true})
	if err != nil {
		return nil, Meta{}, err
	}
	m, err := c.resourceResult(op, typ, resp)
	return resp.body, m, err
}

// resourceResult checks that a 2xx body, when there is one, is a resource of the expected type,
// so an OperationOutcome sent with 200 is not mistaken for the resource.
func (c *Client) resourceResult(op, typ string, resp *response) (Meta, error) {
	m := buildMeta(resp.status, resp.body, resp.header.Get("ETag"), resp.header.Get("Location"), resp.header.Get("Last-Modified"))
	if len(strings.TrimSpace(string(resp.body))) == 0 {
		if op == "read" || op == "vread" {
			return m, fmt.Errorf("fhir %s %s: HTTP %d with an empty body", op, typ, resp.status)
		}
		return m, nil
	}
	got, _, err := resourceTypeOf(resp.body)
	if err != nil {
		return m, fmt.Errorf("fhir %s %s: %w", op, typ, err)
	}
	if got != typ {
		return m, fmt.Errorf("fhir %s %s: server returned a %q resource", op, typ, cleanPrefix([]byte(got), 64))
	}
	return m, nil
}

// Create POSTs a new resource. A retry after a lost response could store it twice, so only
// 429, 503 and failures to connect are retried; use ConditionalCreate for idempotent writes.
func (c *Client) Create(ctx context.Context, typ string, body []byte) ([]byte, Meta, error) {
	return c.create(ctx, "create", typ, body, "")
}

// ConditionalCreate POSTs body with If-None-Exist: ifNoneExist. Meta.Status is 201 when the
// server created the resource and 200 when it returned the single existing match; more than
// one match gives an [*Error] matching [ErrPreconditionFailed].
//
// Prefer: handling=strict is sent so that a server that would ignore an unknown parameter
// rejects it instead: an ignored parameter can make the condition match unrelated resources.
func (c *Client) ConditionalCreate(ctx context.Context, typ string, body []byte, ifNoneExist url.Values) ([]byte, Meta, error) {
	if len(ifNoneExist) == 0 {
		return nil, Meta{}, fmt.Errorf("fhir conditional-create %s: empty If-None-Exist", typ)
	}
	return c.create(ctx, "conditional-create", typ, body, ifNoneExist.Encode())
}

func (c *Client) create(ctx context.Context, op, typ string, body []byte, ifNoneExist string) ([]byte, Meta, error) {
	if err := checkType(typ); err != nil {
		return nil, Meta{}, fmt.Errorf("fhir %s: %w", op, err)
	}
	if err := checkBodyType(typ, "", body); err != nil {
		return nil, Meta{}, fmt.Errorf("fhir %s %s: %w", op, typ, err)
	}
	h := http.Header{"Prefer": {"return=representation"}}
	if ifNoneExist != "" {
		h.Set("If-None-Exist", ifNoneExist)
		h.Add("Prefer", "handling=strict")
	}
	resp, err := c.do(ctx, request{
		op: op, resourceType: typ, method: http.MethodPost, url: c.resourceURL(typ),
		body: body, header: h, repeatable: ifNoneExist != "",
	})
	if err != nil {
		return nil, Meta{}, err
	}
	m, err := c.resourceResult(op, typ, resp)
	return resp.body, m, err
}

// Update PUTs body as typ/id. A non-empty ifMatch is sent as If-Match; a bare version id is
// wrapped as W/"vid", the form R4 shows, because at least one server (Medplum 5.2.13) ignores an
// unquoted If-Match and would overwrite a newer version. A version conflict is an [*Error]
// matching [ErrPreconditionFailed] (or [ErrConflict] on servers that use 409).
//
// PUT is retried after lost responses. With If-Match a retry of an update that did succeed
// gets 412: re-read before deciding it failed.
func (c *Client) Update(ctx context.Context, typ, id string, body []byte, ifMatch string) ([]byte, Meta, error) {
	if err := checkType(typ); err != nil {
		return nil, Meta{}, fmt.Errorf("fhir update: %w", err)
	}
	if err := checkID("id", id); err != nil {
		return nil, Meta{}, fmt.Errorf("fhir update %s: %w", typ, err)
	}
	if err := checkBodyType(typ, id, body); err != nil {
		return nil, Meta{}, fmt.Errorf("fhir update %s: %w", typ, err)
	}
	h := http.Header{"Prefer": {"return=representation"}}
	if ifMatch != "" {
		h.Set("If-Match", etagFor(ifMatch))
	}
	resp, err := c.do(ctx, request{
		op: "update", resourceType: typ, method: http.MethodPut, url: c.resourceURL(typ, id),
		body: body, header: h, repeatable: true,
	})
	if err != nil {
		return nil, Meta{}, err
	}
	m, err := c.resourceResult("update", typ, resp)
	return resp.body, m, err
}

func etagFor(v string) string {
	if strings.HasPrefix(v, `W/"`) || strings.HasPrefix(v, `"`) {
		return v
	}
	return `W/"` + v + `"`
}

// checkBodyType rejects a body whose resourceType (and, for updates, id) disagrees with the
// request before it is sent.
func checkBodyType(typ, id string, body []byte) error {
	got, gotID, err := resourceTypeOf(body)
	if err != nil {
		return err
	}
	if got != typ {
		return fmt.Errorf("body resourceType is %q", cleanPrefix([]byte(got), 64))
	}
	if id != "" && gotID != id {
		return errors.New("body id does not match the request id") // neither quoted: they may be a patient's
	}
	return nil
}

// Search runs GET [base]/typ?query and calls fn with every Bundle.entry, page after page, as
// the raw JSON of the entry (fullUrl, resource, search). Entries with search.mode "include" or
// "outcome" are passed too; the caller decides what to do with them.
//
// It follows Bundle.link[relation=next] verbatim and ends only when a page has none. A next
// link to another scheme or host, one that repeats an earlier page ([ErrPagingLoop]), or
// [MaxEmptyPages] pages in a row without entries, each with a new next link ([ErrEmptyPages]),
// ends the search with an error. An error from fn ends the search and is returned wrapped.
func (c *Client) Search(ctx context.Context, typ string, query url.Values, fn func(entry json.RawMessage) error) error {
	if err := checkType(typ); err != nil {
		return fmt.Errorf("fhir search: %w", err)
	}
	first := c.base.JoinPath(typ)
	first.RawQuery = query.Encode()
	next := first.String()
	seen := map[string]bool{}
	empty := 0
	for page := 0; next != ""; page++ {
		seen[next] = true
		resp, err := c.do(ctx, request{
			op: "search", resourceType: typ, method: http.MethodGet, url: next,
			header: http.Header{"Prefer": {"handling=strict"}}, repeatable: true,
		})
		if err != nil {
			return err
		}
		p, err := parseSearchPage(resp.body)
		if err != nil {
			return fmt.Errorf("fhir search %s: page %d: %w", typ, page, err)
		}
		for _, e := range p.Entries {
			if err := fn(e); err != nil {
				return fmt.Errorf("fhir search %s: page %d: %w", typ, page, err)
			}
		}
		if p.Next == "" {
			return nil
		}
		if len(p.Entries) == 0 {
			empty++
		} else {
			empty = 0
		}
		if empty >= MaxEmptyPages {
			return fmt.Errorf("fhir search %s: page %d: %d pages in a row without entries: %w", typ, page, empty, ErrEmptyPages)
		}
		n, err := c.nextURL(next, p.Next)
		if err != nil {
			return fmt.Errorf("fhir search %s: page %d: %w", typ, page, err)
		}
		if seen[n] {
			return fmt.Errorf("fhir search %s: page %d: %w", typ, page, ErrPagingLoop)
		}
		next = n
	}
	return nil
}

// nextURL resolves a next link against the page it came from (a relative link is still the
// server's link) and refuses links that leave the configured server.
func (c *Client) nextURL(current, link string) (string, error) {
	cur, err := url.Parse(current)
	if err != nil {
		return "", fmt.Errorf("current page URL: %w", err)
	}
	u, err := url.Parse(link)
	if err != nil {
		return "", errors.New("next link is not a URL")
	}
	u = cur.ResolveReference(u)
	if !strings.EqualFold(u.Scheme, c.base.Scheme) || !strings.EqualFold(u.Host, c.base.Host) {
		return "", fmt.Errorf("next link leaves the configured server (scheme %q host %q)", u.Scheme, u.Host)
	}
	return u.String(), nil
}

// Transaction POSTs a transaction or batch Bundle to the base and returns one EntryResponse
// per request entry, in order. A failed transaction is an [*Error] (the server rolls back, or
// should); a batch succeeds as a whole and reports failures per entry, see
// [TransactionResponse.Err].
//
// Lost responses are retried only when every entry is repeatable (GET, PUT, DELETE, or POST
// with ifNoneExist). A plain POST entry, such as a Provenance, would be stored again by a
// replay, so such bundles are retried only after 429, 503 or a failure to connect.
func (c *Client) Transaction(ctx context.Context, bundle []byte) (TransactionResponse, error) {
	info, err := inspectRequestBundle(bundle)
	if err != nil {
		return TransactionResponse{}, fmt.Errorf("fhir transaction: %w", err)
	}
	resp, err := c.do(ctx, request{
		op: info.Type, method: http.MethodPost, url: c.base.String(), body: bundle,
		header: http.Header{"Prefer": {"return=representation"}}, repeatable: info.Repeatable,
	})
	if err != nil {
		return TransactionResponse{}, err
	}
	tr, err := parseTransactionResponse(resp.body, info.Entries)
	if err != nil {
		return TransactionResponse{}, fmt.Errorf("fhir %s: %w", info.Type, err)
	}
	if tr.Type != info.Type+"-response" {
		return tr, fmt.Errorf("fhir %s: response type is %s", info.Type, tr.Type)
	}
	return tr, nil
}
