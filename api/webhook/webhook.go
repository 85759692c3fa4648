package webhook

import (
	"bytes"
	"context"
	"crypto/rand"
	"crypto/sha256"
	"crypto/subtle"
	"encoding/hex"
	"encoding/json"
	"errors"
	"fmt"
	"io"
	"log/slog"
	"mime"
	"net/http"
	"net/textproto"
	"strings"
	"sync"
	"time"

	"github.com/deadspace-fhir/deadspace/fhir/jsonscan"
	"github.com/deadspace-fhir/deadspace/fhir/notify"
	"github.com/deadspace-fhir/deadspace/fhir/ref"
)

// DefaultMaxBodyBytes is the body limit when Config.MaxBodyBytes is 0.
const DefaultMaxBodyBytes = 4 << 20

// MinSecretLen is the shortest secret New accepts.
const MinSecretLen = 16

// Config configures [New].
type Config struct {
	// Sink receives what the webhook accepts. Required.
	Sink Sink
	// Secret is the shared secret the FHIR server sends with every request
	// (Subscription.channel.header). Required, at least MinSecretLen bytes.
	Secret string
	// Header is the request header that carries the secret, "Authorization"
	// by default. With Authorization the value is "Bearer <secret>"; with
	// any other header the value is the secret itself.
	Header string
	// MaxBodyBytes limits the request body; 0 means DefaultMaxBodyBytes.
	MaxBodyBytes int64
	// Prefix is the path the handler answers under, "/notify" by default.
	Prefix string
	// Logger receives one line per request; nil means slog.Default().
	Logger *slog.Logger
	// Now is the clock for the elapsed time in log lines; nil means time.Now.
	Now func() time.Time
}

// Handler is the webhook. Build it with [New].
type Handler struct {
	sink    Sink
	secret  [sha256.Size]byte
	header  string
	bearer  bool
	maxBody int64
	prefix  string
	log     *slog.Logger
	now     func() time.Time
}

// New checks cfg and builds the handler. It refuses a missing or short
// secret: the endpoint accepts clinical data, and there is deliberately no
// switch to run it unauthenticated, not even for tests.
func New(cfg Config) (*Handler, error) {
	var errs []error
	if cfg.Sink == nil {
		errs = append(errs, errors.New("webhook: Sink is required"))
	}
	switch {
	case cfg.Secret == "":
		errs = append(errs, errors.New("webhook: Secret is required"))
	case len(cfg.Secret) < MinSecretLen:
		errs = append(errs, fmt.Errorf("webhook: Secret must be at least %d bytes, got %d", MinSecretLen, len(cfg.Secret)))
	case strings.TrimSpace(cfg.Secret) != cfg.Secret || strings.ContainsAny(cfg.Secret, "\r\n\x00"):
		// net/http trims header values, so such a secret could never match.
		errs = append(errs, errors.New("webhook: Secret must not start or end with white space or hold control characters"))
	}
	h := &Handler{
		sink:    cfg.Sink,
		secret:  sha256.Sum256([]byte(cfg.Secret)),
		header:  textproto.CanonicalMIMEHeaderKey(cfg.Header),
		maxBody: cfg.MaxBodyBytes,
		prefix:  strings.TrimRight(cfg.Prefix, "/"),
		log:     cfg.Logger,
		now:     cfg.Now,
	}
	if h.header == "" {
		h.header = "Authorization"
	} else if !isToken(h.header) {
		errs = append(errs, errors.New("webhook: Header is not a valid header name"))
	}
	h.bearer = h.header == "Authorization"
	if h.maxBody == 0 {
		h.maxBody = DefaultMaxBodyBytes
	} else if h.maxBody < 0 {
		errs = append(errs, fmt.Errorf("webhook: MaxBodyBytes must be >= 0, got %d", h.maxBody))
	}
	if cfg.Prefix == "" {
		h.prefix = "/notify"
	} else if !strings.HasPrefix(h.prefix, "/") {
		errs = append(errs, errors.New(`webhook: Prefix must start with "/"`))
	}
	if h.log == nil {
		h.log = slog.Default()
	}
	if h.now == nil {
		h.now = time.Now
	}
	if err := errors.Join(errs...); err != nil {
		return nil, err
	}
	return h, nil
}

// result is what one request did, for the response and the log line.
type result struct {
	mode     string
	ntype    notify.Type
	content  notify.Content
	events   int
	offered  int // resources given to the sink
	receipt  Receipt
	fetch    int
	deleted  int // resources a Bundle's DELETE entries name
	unusable int // focus references, or DELETE entries, that name no readable resource
	status   bool
	changed  bool
}

// route is a path template, logged instead of the path because the path
// holds a resource id.
type route string

// Routes, relative to Config.Prefix.
const (
	routeRoot    route = "/"
	routeTyped   route = "/{type}/{id}"
	routeUnknown route = "other"
)

func (h *Handler) ServeHTTP(w http.ResponseWriter, r *http.Request) {
	start := h.now()
	id := requestID(r.Header.Get("X-Request-Id"))
	w.Header().Set("X-Request-Id", id)

	// The body is read into a pooled buffer that goes back to the pool when
	// the request is answered: everything the sink was given is stored (and
	// copied) by then, and the answer holds no part of the body.
	buf := bodyPool.Get().(*[]byte)
	defer putBody(buf)
	rt, typ, rid := h.route(r.URL.Path)
	res, err := h.serve(r, buf, id, rt, typ, rid)
	code := http.StatusOK
	if err != nil {
		var out outcome
		code, out = answer(err)
		for k, v := range out.headers {
			w.Header().Set(k, v)
		}
		writeOutcome(w, code, out.issues)
	} else {
		writeOutcome(w, code, res.issues())
	}

	level, msg := slog.LevelInfo, "webhook request"
	var later *RetryLater
	switch {
	case errors.As(err, &later):
		// The FHIR server's load, not a fault here: the sender was told
		// when to deliver again.
		level, msg = slog.LevelWarn, "webhook request deferred"
	case code >= 500:
		level, msg = slog.LevelError, "webhook request failed"
	case code >= 400:
		level, msg = slog.LevelWarn, "webhook request refused"
	}
	ctx := r.Context()
	if !h.log.Enabled(ctx, level) {
		return
	}
	// Attrs rather than key-value pairs, and request_id among them rather
	// than through Logger.With: the line is the same, without a logger and
	// a boxed value per field on every request.
	var attrBuf [14]slog.Attr
	attrs := append(attrBuf[:0], slog.String("request_id", id), slog.String("method", r.Method),
		slog.String("route", string(rt)), slog.Int("status", code), slog.Duration("elapsed", h.now().Sub(start)))
	if res.mode != "" {
		attrs = append(attrs, slog.String("mode", res.mode))
	}
	if res.ntype != "" {
		attrs = append(attrs, slog.String("notification_type", string(res.ntype)), slog.String("content", string(res.content)), slog.Int("events", res.events))
	}
	if res.offered > 0 {
		attrs = append(attrs, slog.Int("accepted", res.receipt.Accepted), slog.Int("rejected", len(res.receipt.Rejected)))
	}
	if res.fetch > 0 {
		attrs = append(attrs, slog.Int("fetch", res.fetch))
	}
	if res.deleted > 0 {
		attrs = append(attrs, slog.Int("deleted", res.deleted))
	}
	if code >= 500 {
		// Sink errors are the engine's own text, which by project rule holds
		// no patient identifiers; 4xx texts go to the sender only.
		attrs = append(attrs, slog.Any("err", err))
	}
	h.log.LogAttrs(ctx, level, msg, attrs...)
}

func (h *Handler) route(path string) (rt route, typ, id string) {
	if path == h.prefix || path == h.prefix+"/" {
		return routeRoot, "", ""
	}
	rest, ok := strings.CutPrefix(path, h.prefix+"/")
	if !ok {
		return routeUnknown, "", ""
	}
	typ, id, ok = strings.Cut(rest, "/")
	if !ok || typ == "" || id == "" || strings.Contains(id, "/") {
		return routeUnknown, "", ""
	}
	return routeTyped, typ, id
}

// serve does the work; every failure comes back as an error for answer.
func (h *Handler) serve(r *http.Request, buf *[]byte, id string, rt route, typ, rid string) (result, error) {
	// Authentication comes before anything that depends on the request, so
	// an unauthenticated caller learns nothing about paths or formats.
	if !h.authorized(r.Header) {
		return result{}, &requestError{status: http.StatusUnauthorized, code: "login",
			msg: "missing or wrong credentials", authenticate: true}
	}
	var allow string
	switch rt {
	case routeRoot:
		allow = "POST, PUT"
	case routeTyped:
		allow = "PUT, POST"
	default:
		return result{}, &requestError{status: http.StatusNotFound, code: "not-found",
			msg: "no such endpoint: use " + h.prefix + " or " + h.prefix + "/{type}/{id}"}
	}
	if r.Method != http.MethodPost && r.Method != http.MethodPut {
		return result{}, &requestError{status: http.StatusMethodNotAllowed, code: "not-supported",
			msg: "method not allowed", allow: allow}
	}
	body, err := h.readBody(r, buf)
	if err != nil {
		return result{}, err
	}
	ctx := r.Context()
	if rt == routeTyped {
		return h.typed(ctx, id, typ, rid, body)
	}
	return h.root(ctx, id, body)
}

func (h *Handler) authorized(hd http.Header) bool {
	vals := hd.Values(h.header)
	if len(vals) != 1 {
		return false
	}
	got := strings.TrimSpace(vals[0])
	if h.bearer {
		scheme, cred, ok := strings.Cut(got, " ")
		if !ok || !strings.EqualFold(scheme, "Bearer") {
			return false
		}
		got = strings.TrimSpace(cred)
	}
	// Comparing digests keeps the comparison constant-time in the length
	// of the secret as well as its content.
	sum := sha256.Sum256([]byte(got))
	return subtle.ConstantTimeCompare(sum[:], h.secret[:]) == 1
}

// bodyPool holds request body buffers, so that a request does not allocate
// its body (several times over, growing, as io.ReadAll does).
var bodyPool = sync.Pool{New: func() any { return new([]byte) }}

// maxPooled is the largest buffer kept for reuse: notifications are a few
// KB, and a rare large body should not stay pinned in the pool.
const maxPooled = 256 << 10

func putBody(buf *[]byte) {
	if cap(*buf) > maxPooled {
		return
	}
	*buf = (*buf)[:0]
	bodyPool.Put(buf)
}

// readBody reads the body into *buf (growing it, and leaving the grown
// buffer there for the pool). With a Content-Length it reads into one
// buffer of that size, with a byte to spare for the end of the body.
func (h *Handler) readBody(r *http.Request, buf *[]byte) ([]byte, error) {
	tooBig := func() error {
		return &requestError{status: http.StatusRequestEntityTooLarge, code: "too-costly",
			msg: fmt.Sprintf("body larger than %d bytes", h.maxBody)}
	}
	if r.ContentLength > h.maxBody {
		return nil, tooBig()
	}
	if ce := r.Header.Get("Content-Encoding"); ce != "" && !strings.EqualFold(ce, "identity") {
		return nil, &requestError{status: http.StatusUnsupportedMediaType, code: "not-supported",
			msg: "content encodings are not supported"}
	}
	var body []byte
	if r.Body != nil {
		b := (*buf)[:0]
		if want := int(r.ContentLength) + 1; r.ContentLength > 0 && cap(b) < want {
			b = make([]byte, 0, want)
		}
		var err error
		body, err = readLimited(r.Body, b, h.maxBody)
		*buf = body
		switch {
		case errors.Is(err, errTooBig):
			return nil, tooBig()
		case err != nil:
			return nil, &requestError{status: http.StatusBadRequest, code: "incomplete", msg: "could not read the body"}
		}
	}
	// The media type matters only when there is something to interpret:
	// classic servers send the empty "go and search" POST with whatever
	// Content-Type they have.
	if len(bytes.TrimSpace(body)) > 0 {
		if err := checkMediaType(r.Header.Get("Content-Type")); err != nil {
			return nil, err
		}
	}
	return body, nil
}

var errTooBig = errors.New("body over the limit")

// readLimited appends what rd holds to b, up to limit bytes; one byte more
// is errTooBig, as http.MaxBytesReader would say.
func readLimited(rd io.Reader, b []byte, limit int64) ([]byte, error) {
	for {
		if len(b) == cap(b) {
			b = append(b, 0)[:len(b)]
		}
		room := b[len(b):cap(b)]
		if left := limit + 1 - int64(len(b)); int64(len(room)) > left {
			room = room[:left]
		}
		n, err := rd.Read(room)
		b = b[:len(b)+n]
		switch {
		case int64(len(b)) > limit:
			return b, errTooBig
		case err == io.EOF:
			return b, nil
		case err != nil:
			return b, err
		}
	}
}

// checkMediaType accepts FHIR JSON under its R4 name, plain JSON, and the
// DSTU2 name application/json+fhir that older servers still send.
func checkMediaType(ct string) error {
	// The types servers send, spelled as they send them, pass without
	// parsing (mime.ParseMediaType makes a map per call).
	switch ct {
	case "", "application/fhir+json", "application/json", "application/fhir+json; charset=utf-8",
		"application/fhir+json;charset=utf-8", "application/json; charset=utf-8", "application/json+fhir":
		return nil
	}
	unsupported := &requestError{status: http.StatusUnsupportedMediaType, code: "not-supported",
		msg: "Content-Type must be application/fhir+json or application/json"}
	mt, params, err := mime.ParseMediaType(ct)
	if err != nil {
		return unsupported
	}
	switch mt {
	case "application/fhir+json", "application/json", "application/json+fhir":
	default:
		return unsupported
	}
	if cs, ok := params["charset"]; ok && !strings.EqualFold(cs, "utf-8") && !strings.EqualFold(cs, "utf8") {
		return &requestError{status: http.StatusUnsupportedMediaType, code: "not-supported", msg: "charset must be UTF-8"}
	}
	return nil
}

type head struct {
	ResourceType *string
	ID           *string
}

// classify reads the body's resourceType and id. empty is true for a
// blank body and for "{}", which some servers send instead of nothing.
// One pass over the body (fhir/jsonscan) both checks the JSON and finds
// the two, without decoding the other members. Members are matched by
// exact name, the last of a repeated name counting, as encoding/json's
// decoding into a map did before.
func classify(body []byte) (h head, empty bool, err error) {
	t := bytes.TrimSpace(body)
	if len(t) == 0 {
		return head{}, true, nil
	}
	var s jsonscan.Scanner
	s.Reset(t)
	if s.Peek() != jsonscan.Object {
		if _, err := s.Skip(); err != nil || s.End() != nil {
			return head{}, false, errNotJSON
		}
		return head{}, false, errNotObject
	}
	type member struct {
		kind jsonscan.Kind
		text []byte
		raw  bool
	}
	var rt, id member
	members := 0
	read := func(m *member) error {
		*m = member{kind: s.Peek()}
		if m.kind == jsonscan.String {
			var err error
			m.text, m.raw, err = s.Str()
			return err
		}
		_, err := s.Skip()
		return err
	}
	if err := s.Object(); err != nil {
		return head{}, false, errNotJSON
	}
	for first := true; ; first = false {
		name, more, err := s.Member(first)
		if err != nil {
			return head{}, false, errNotJSON
		}
		if !more {
			break
		}
		members++
		switch string(name) {
		case "resourceType":
			err = read(&rt)
		case "id":
			err = read(&id)
		default:
			_, err = s.Skip()
		}
		if err != nil {
			return head{}, false, errNotJSON
		}
	}
	if s.End() != nil {
		return head{}, false, errNotJSON
	}
	if members == 0 {
		return head{}, true, nil
	}
	// A null resourceType or id decoded as an empty string.
	if rt.kind != jsonscan.String || len(rt.text) == 0 {
		return head{}, false, errNoResourceType
	}
	rts := jsonscan.Unquote(rt.text, rt.raw)
	h.ResourceType = &rts
	switch id.kind {
	case jsonscan.Invalid:
	case jsonscan.Null:
		ids := ""
		h.ID = &ids
	case jsonscan.String:
		ids := jsonscan.Unquote(id.text, id.raw)
		h.ID = &ids
	default:
		return head{}, false, &requestError{status: http.StatusBadRequest, code: "structure",
			msg: "body is not a FHIR resource: id is not a string"}
	}
	return h, false, nil
}

// root takes what a server POSTs to the endpoint itself. The body is
// parsed once, as a notification; what notify.Parse says of a body that is
// not one tells the other cases apart as classify would have, and classify
// itself runs only on a body that is not JSON, to word the answer.
func (h *Handler) root(ctx context.Context, id string, body []byte) (result, error) {
	res := result{mode: ModeRestHook}
	src := Source{Mode: ModeRestHook, RequestID: id}
	t := bytes.TrimSpace(body)
	if len(t) == 0 {
		res.changed = true
		return res, h.sink.Changed(ctx, src)
	}
	n, err := notify.Parse(body)
	if err == nil {
		return h.notification(ctx, id, n)
	}
	invalid := &requestError{status: http.StatusBadRequest, code: "invalid", msg: err.Error()}
	var ne *notify.Error
	if !errors.As(err, &ne) {
		return res, invalid
	}
	switch ne.Kind {
	case notify.ErrNotNotification:
		return res, h.bundle(ctx, src, &res, body)
	case notify.ErrNotBundle:
		switch {
		case emptyObject(t):
			res.changed = true
			return res, h.sink.Changed(ctx, src)
		case ne.ResourceType == "":
			return res, errNoResourceType
		}
		// Some servers POST the changed resource itself to the endpoint.
		return res, h.resources(ctx, src, &res, []json.RawMessage{t})
	case notify.ErrNotJSON:
		// Not JSON to notify.Parse; classify words the answer as before
		// (and, for white space that only it trims, still takes the body).
		hd, empty, cerr := classify(body)
		switch {
		case cerr != nil:
			return res, cerr
		case empty:
			res.changed = true
			return res, h.sink.Changed(ctx, src)
		case *hd.ResourceType != "Bundle":
			return res, h.resources(ctx, src, &res, []json.RawMessage{t})
		}
	}
	return res, invalid
}

var errNotJSON = &requestError{status: http.StatusBadRequest, code: "structure", msg: "body is not valid JSON"}

var errNotObject = &requestError{status: http.StatusBadRequest, code: "structure", msg: "body is not a JSON object"}

var errNoResourceType = &requestError{status: http.StatusBadRequest, code: "structure",
	msg: "body is not a FHIR resource: no resourceType"}

// emptyObject says whether t, valid JSON, is an object without members
// ("{}"), which some servers send instead of an empty body.
func emptyObject(t []byte) bool {
	if len(t) < 2 || t[0] != '{' {
		return false
	}
	for _, c := range t[1:] {
		switch c {
		case ' ', '\t', '\n', '\r':
		case '}':
			return true
		default:
			return false
		}
	}
	return false
}

// notification stores a topic-based notification. The status is recorded
// last: if storing the content fails, the counters stay behind, so the next
// notification shows a gap instead of the loss going unseen.
func (h *Handler) notification(ctx context.Context, id string, n notify.Notification) (result, error) {
	src := Source{Mode: ModeNotification, RequestID: id}
	res := result{mode: ModeNotification, ntype: n.Type, content: n.Content, events: len(n.Events)}
	if n.Type != notify.TypeHandshake && n.Type != notify.TypeHeartbeat {
		var rs []json.RawMessage
		if len(n.Resources) > 0 {
			rs = make([]json.RawMessage, len(n.Resources))
			for i, e := range n.Resources {
				rs[i] = e.Resource
			}
		}
		var refs []string
		var seen map[string]bool
		for _, ev := range n.Events {
			if ev.Focus == "" || ev.Resource != nil || seen[ev.Focus] {
				continue
			}
			if seen == nil {
				seen = map[string]bool{}
			}
			seen[ev.Focus] = true
			// The IG lets a focus name "a non-FHIR object"; nothing can be
			// read for those.
			if _, _, ok := notify.RelativeRef(ev.Focus, ""); !ok {
				res.unusable++
				continue
			}
			refs = append(refs, ev.Focus)
		}
		if len(rs) > 0 && len(refs) == 0 {
			// Full-resource content, the usual case: resources and status
			// in one step.
			res.offered, res.status = len(rs), true
			rc, err := h.sink.Notification(ctx, src, rs, n)
			if err != nil {
				return res, fmt.Errorf("webhook: notification: %w", err)
			}
			res.receipt = rc
			return res, nil
		}
		if len(rs) > 0 {
			if err := h.resources(ctx, src, &res, rs); err != nil {
				return res, err
			}
		}
		if len(refs) > 0 {
			res.fetch = len(refs)
			if err := h.sink.Fetch(ctx, src, refs); err != nil {
				return res, fmt.Errorf("webhook: fetch: %w", err)
			}
		}
		// Empty content (or focus references nobody can read) says only that
		// events happened: the engine has to go and search.
		if res.offered == 0 && res.fetch == 0 && (n.Type == notify.TypeEvent || n.Type == notify.TypeQueryEvent || res.unusable > 0) {
			res.changed = true
			if err := h.sink.Changed(ctx, src); err != nil {
				return res, fmt.Errorf("webhook: changed: %w", err)
			}
		}
	}
	res.status = true
	if err := h.sink.Status(ctx, src, n); err != nil {
		return res, fmt.Errorf("webhook: status: %w", err)
	}
	return res, nil
}

type rawBundle struct {
	Entry []struct {
		FullURL  string          `json:"fullUrl"`
		Resource json.RawMessage `json:"resource"`
		Request  struct {
			Method string `json:"method"`
			URL    string `json:"url"`
		} `json:"request"`
		Response struct {
			LastModified string `json:"lastModified"`
		} `json:"response"`
	} `json:"entry"`
}

// bundle takes the resources of a Bundle that is not a notification
// (batch, transaction, searchset, collection, plain history): some servers
// forward what they stored that way. An entry whose request is a DELETE
// names a resource the server deleted (by request.url, or failing that
// its fullUrl), which goes to the sink as a deletion, with the entry's
// response.lastModified as its time when it has one: a search never
// returns a deleted resource. Other entries without a resource (id-only
// history entries), and deletes that name no resource (a conditional
// delete), say only that something changed.
func (h *Handler) bundle(ctx context.Context, src Source, res *result, body []byte) error {
	var b rawBundle
	if err := json.Unmarshal(body, &b); err != nil {
		return &requestError{status: http.StatusBadRequest, code: "structure", msg: "Bundle.entry is not a list of entries"}
	}
	var rs []json.RawMessage
	var deleted []Deletion
	for i, e := range b.Entry {
		if strings.EqualFold(e.Request.Method, http.MethodDelete) {
			if d, ok := deletion(e.Request.URL, e.FullURL, e.Response.LastModified); ok {
				deleted = append(deleted, d)
			} else {
				res.unusable++
			}
			continue
		}
		t := bytes.TrimSpace(e.Resource)
		if len(t) == 0 || bytes.Equal(t, []byte("null")) {
			continue
		}
		hd, empty, err := classify(t)
		if err != nil || empty || hd.ResourceType == nil {
			return &requestError{status: http.StatusBadRequest, code: "structure",
				msg: fmt.Sprintf("Bundle.entry[%d].resource is not a FHIR resource", i)}
		}
		rs = append(rs, t)
	}
	if len(rs) > 0 {
		if err := h.resources(ctx, src, res, rs); err != nil {
			return err
		}
	}
	if len(deleted) > 0 {
		res.deleted = len(deleted)
		if err := h.sink.Deleted(ctx, src, deleted); err != nil {
			return fmt.Errorf("webhook: deleted: %w", err)
		}
	}
	if len(rs) == 0 && len(deleted) == 0 || res.unusable > 0 {
		res.changed = true
		return h.sink.Changed(ctx, src)
	}
	return nil
}

// deletion reads a Bundle entry whose request is a DELETE: the resource
// its request.url names, or its fullUrl when the url does not name one
// (a conditional delete), and when the deletion happened.
func deletion(requestURL, fullURL, lastModified string) (Deletion, bool) {
	target, ok := ref.DeleteTarget(requestURL, fullURL)
	if !ok {
		return Deletion{}, false
	}
	d := Deletion{Ref: target.String()}
	if t, err := time.Parse(time.RFC3339Nano, lastModified); err == nil {
		d.At = t
	}
	return d, true
}

func (h *Handler) resources(ctx context.Context, src Source, res *result, rs []json.RawMessage) error {
	res.offered = len(rs)
	rc, err := h.sink.Resources(ctx, src, rs)
	if err != nil {
		return fmt.Errorf("webhook: resources: %w", err)
	}
	res.receipt = rc
	return nil
}

// typed handles [prefix]/[type]/[id], where a classic R4 rest-hook with a
// payload PUTs the resource ("the URL is interpreted as the service base,
// and an update (PUT) is made", R4 subscription-channel-type rest-hook).
func (h *Handler) typed(ctx context.Context, id, typ, rid string, body []byte) (result, error) {
	res := result{mode: ModeRestHookPut}
	src := Source{Mode: ModeRestHookPut, RequestID: id}
	if typ != "Observation" && typ != "Patient" {
		return res, &requestError{status: http.StatusBadRequest, code: "not-supported",
			msg: "only Observation and Patient resources are accepted here"}
	}
	if !ref.IsID(rid) {
		return res, &requestError{status: http.StatusBadRequest, code: "value", msg: "the id in the path is not a FHIR id"}
	}
	hd, empty, err := classify(body)
	if err != nil {
		return res, err
	}
	if empty {
		// A PUT without a body still says exactly what changed.
		res.fetch = 1
		if err := h.sink.Fetch(ctx, src, []string{typ + "/" + rid}); err != nil {
			return res, fmt.Errorf("webhook: fetch: %w", err)
		}
		return res, nil
	}
	article := "a"
	if typ == "Observation" {
		article = "an"
	}
	if *hd.ResourceType != typ {
		return res, &requestError{status: http.StatusBadRequest, code: "invalid",
			msg: fmt.Sprintf("expected %s %s", article, typ)}
	}
	// R4 update: the body's id must be present and equal the id in the URL
	// (https://hl7.org/fhir/R4/http.html#update).
	if hd.ID == nil || *hd.ID == "" {
		return res, &requestError{status: http.StatusBadRequest, code: "required", msg: "the resource has no id"}
	}
	if *hd.ID != rid {
		return res, &requestError{status: http.StatusBadRequest, code: "invalid", msg: "the resource id does not match the id in the path"}
	}
	return res, h.resources(ctx, src, &res, []json.RawMessage{bytes.TrimSpace(body)})
}

// requestID keeps a caller's X-Request-Id when it is a plain token, so
// that it can be logged and echoed safely, and otherwise makes one.
func requestID(in string) string {
	if len(in) > 0 && len(in) <= 128 {
		ok := true
		for i := 0; i < len(in); i++ {
			c := in[i]
			if !(c >= 'a' && c <= 'z' || c >= 'A' && c <= 'Z' || c >= '0' && c <= '9' || c == '-' || c == '_' || c == '.') {
				ok = false
				break
			}
		}
		if ok {
			return in
		}
	}
	var b [16]byte
	_, _ = rand.Read(b[:]) // crypto/rand.Read never fails since Go 1.24
	return hex.EncodeToString(b[:])
}

// isToken checks an RFC 9110 field name.
func isToken(s string) bool {
	if s == "" {
		return false
	}
	for i := 0; i < len(s); i++ {
		c := s[i]
		if !(c >= 'a' && c <= 'z' || c >= 'A' && c <= 'Z' || c >= '0' && c <= '9' || strings.IndexByte("!#$%&'*+-.^_`|~", c) >= 0) {
			return false
		}
	}
	return true
}
