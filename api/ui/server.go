package ui

import (
	"bytes"
	"context"
	"crypto/rand"
	"encoding/base64"
	"errors"
	"log/slog"
	"net/http"
	"strconv"
	"strings"
	"sync/atomic"
	"time"
)

// ErrNotFound is returned by a [Source] for a patient or value it does not
// have; the pages answer 404.
var ErrNotFound = errors.New("not found")

// Source is what the pages read. The live engine and a replay report are
// both sources.
type Source interface {
	Overview(ctx context.Context) (Overview, error)
	Timeline(ctx context.Context, patientID string) (Timeline, error)
	Explain(ctx context.Context, id string) (Explanation, error)
	// Operations returns ErrNotFound where there is no service to report on.
	Operations(ctx context.Context) (Operations, error)
}

// Handler serves the pages. Every route but sign-in needs a signed-in
// user; every page that shows a patient is written to the access log.
type Handler struct {
	src    Source
	auth   Authenticator
	access *AccessLog
	log    *slog.Logger
	mux    *http.ServeMux
	// nonce makes the style nonce; tests fix it for golden files.
	nonce func() string
}

// HandlerConfig configures a Handler.
type HandlerConfig struct {
	Source Source
	Auth   Authenticator
	Access *AccessLog
	Logger *slog.Logger
}

// NewHandler returns the pages' handler.
func NewHandler(cfg HandlerConfig) (*Handler, error) {
	if cfg.Source == nil || cfg.Auth == nil || cfg.Access == nil {
		return nil, errors.New("ui: a source, an authenticator and an access log are required")
	}
	h := &Handler{src: cfg.Source, auth: cfg.Auth, access: cfg.Access, log: cfg.Logger, mux: http.NewServeMux(), nonce: newNonce}
	if h.log == nil {
		h.log = slog.New(slog.DiscardHandler)
	}
	for pattern, route := range h.auth.Routes() {
		h.mux.Handle(pattern, route)
	}
	h.mux.HandleFunc("GET /{$}", h.signedIn(h.overview))
	h.mux.HandleFunc("GET /patient/{id}", h.signedIn(h.timeline))
	h.mux.HandleFunc("GET /explain/{id}", h.signedIn(h.explain))
	h.mux.HandleFunc("GET /operations", h.signedIn(h.operations))
	return h, nil
}

func newNonce() string {
	b := make([]byte, 18)
	_, _ = rand.Read(b)
	return base64.RawURLEncoding.EncodeToString(b)
}

// ServeHTTP sets the security headers every answer carries.
func (h *Handler) ServeHTTP(w http.ResponseWriter, r *http.Request) {
	hd := w.Header()
	hd.Set("X-Content-Type-Options", "nosniff")
	hd.Set("Referrer-Policy", "no-referrer")
	hd.Set("X-Frame-Options", "DENY")
	hd.Set("Cache-Control", "no-store")
	hd.Set("Cross-Origin-Opener-Policy", "same-origin")
	hd.Set("Content-Security-Policy", "default-src 'none'; frame-ancestors 'none'; base-uri 'none'; form-action 'self'")
	h.mux.ServeHTTP(w, r)
}

// signedIn refuses a request without a signed-in user: a browser is sent
// to sign in, anything else gets 401.
func (h *Handler) signedIn(next func(http.ResponseWriter, *http.Request, string)) http.HandlerFunc {
	return func(w http.ResponseWriter, r *http.Request) {
		user, ok := h.auth.User(r)
		if !ok {
			h.auth.Challenge(w, r)
			return
		}
		next(w, r, user)
	}
}

func (h *Handler) page(w http.ResponseWriter, r *http.Request, status int, p *Page) {
	p.Nonce = h.nonce()
	p.Nav = true
	p.L = Links{Live: true}
	w.Header().Set("Content-Security-Policy", "default-src 'none'; style-src 'nonce-"+p.Nonce+"'; img-src 'self' data:; form-action 'self'; frame-ancestors 'none'; base-uri 'none'")
	w.Header().Set("Content-Type", "text/html; charset=utf-8")
	var buf bytes.Buffer
	if err := render(&buf, p); err != nil {
		h.log.ErrorContext(r.Context(), "rendering a page failed", "route", r.Pattern, "err", err)
		http.Error(w, "the page could not be rendered", http.StatusInternalServerError)
		return
	}
	w.WriteHeader(status)
	_, _ = w.Write(buf.Bytes())
}

func (h *Handler) fail(w http.ResponseWriter, r *http.Request, user string, err error) {
	if errors.Is(err, ErrNotFound) {
		h.page(w, r, http.StatusNotFound, &Page{Title: "not found", User: user, Message: "There is nothing here: the patient or value is unknown, or no longer retained."})
		return
	}
	// The error may name a patient; the operational log gets the route only.
	h.log.ErrorContext(r.Context(), "reading a page's data failed", "route", r.Pattern)
	h.page(w, r, http.StatusInternalServerError, &Page{Title: "error", User: user, Message: "The data could not be read; the service log has the details."})
}

func (h *Handler) overview(w http.ResponseWriter, r *http.Request, user string) {
	o, err := h.src.Overview(r.Context())
	if err != nil {
		h.fail(w, r, user, err)
		return
	}
	ids := make([]string, len(o.Patients))
	for i, p := range o.Patients {
		ids[i] = p.ID
	}
	if err := h.access.Record(user, "overview", ids...); err != nil {
		h.fail(w, r, user, err)
		return
	}
	h.page(w, r, http.StatusOK, &Page{Title: "unit overview", User: user, Overview: &o})
}

func (h *Handler) timeline(w http.ResponseWriter, r *http.Request, user string) {
	id := r.PathValue("id")
	if !validID(id) {
		h.fail(w, r, user, ErrNotFound)
		return
	}
	t, err := h.src.Timeline(r.Context(), id)
	if err != nil {
		h.fail(w, r, user, err)
		return
	}
	if err := h.access.Record(user, "timeline", id); err != nil {
		h.fail(w, r, user, err)
		return
	}
	h.page(w, r, http.StatusOK, &Page{Title: "patient " + id, User: user, Timeline: &t})
}

func (h *Handler) explain(w http.ResponseWriter, r *http.Request, user string) {
	id := r.PathValue("id")
	if !validKey(id) {
		h.fail(w, r, user, ErrNotFound)
		return
	}
	ex, err := h.explainTarget(r, id)
	if err != nil {
		h.fail(w, r, user, err)
		return
	}
	if err := h.access.Record(user, "explain", ex.PatientID); err != nil {
		h.fail(w, r, user, err)
		return
	}
	h.page(w, r, http.StatusOK, &Page{Title: "how a value was made", User: user, Explanation: &ex})
}

// VersionExplainer is a [Source] that can also explain one version of a
// value's series: /explain/{series}?revision=N (1 the series' first key)
// or ?server-version=V (the FHIR server's versionId of the Observation).
type VersionExplainer interface {
	// ExplainVersion names the version by revision (from 1) or, when
	// revision is 0, by the server's versionId.
	ExplainVersion(ctx context.Context, series string, revision int, serverVersion string) (Explanation, error)
}

// explainTarget explains id, or the version of series id the query names.
func (h *Handler) explainTarget(r *http.Request, id string) (Explanation, error) {
	q := r.URL.Query()
	if !q.Has("revision") && !q.Has("server-version") {
		return h.src.Explain(r.Context(), id)
	}
	ve, ok := h.src.(VersionExplainer)
	if !ok {
		return Explanation{}, ErrNotFound
	}
	revision := 0
	if q.Has("revision") {
		n, err := strconv.Atoi(q.Get("revision"))
		if err != nil || n < 1 {
			return Explanation{}, ErrNotFound
		}
		revision = n
	}
	return ve.ExplainVersion(r.Context(), id, revision, q.Get("server-version"))
}

func (h *Handler) operations(w http.ResponseWriter, r *http.Request, user string) {
	op, err := h.src.Operations(r.Context())
	if err != nil {
		h.fail(w, r, user, err)
		return
	}
	h.page(w, r, http.StatusOK, &Page{Title: "operations", User: user, Operations: &op})
}

// validID accepts a FHIR id.
func validID(s string) bool {
	if s == "" || len(s) > 64 {
		return false
	}
	for _, c := range s {
		if !(c >= 'a' && c <= 'z' || c >= 'A' && c <= 'Z' || c >= '0' && c <= '9' || c == '-' || c == '.') {
			return false
		}
	}
	return true
}

// validKey accepts "sha256:" and 64 hex digits.
func validKey(s string) bool {
	h, ok := strings.CutPrefix(s, "sha256:")
	if !ok || len(h) != 64 {
		return false
	}
	for _, c := range h {
		if !(c >= '0' && c <= '9' || c >= 'a' && c <= 'f') {
			return false
		}
	}
	return true
}

// ReportSource serves a replay's report as pages, for tests and for
// looking at a report with the same pages as the live service.
type ReportSource struct{ R Report }

// Overview implements Source.
func (s ReportSource) Overview(context.Context) (Overview, error) { return s.R.Overview, nil }

// Timeline implements Source.
func (s ReportSource) Timeline(_ context.Context, id string) (Timeline, error) {
	for _, t := range s.R.Timelines {
		if t.ID == id {
			return t, nil
		}
	}
	return Timeline{}, ErrNotFound
}

// Explain implements Source.
func (s ReportSource) Explain(_ context.Context, id string) (Explanation, error) {
	for _, e := range s.R.Explanations {
		if e.ID == id {
			return e, nil
		}
	}
	return Explanation{}, ErrNotFound
}

// Operations implements Source: a report has no service.
func (s ReportSource) Operations(context.Context) (Operations, error) {
	return Operations{}, ErrNotFound
}

// clockSkew moves the clock of sessions and the access log, so tests can
// expire a session without waiting.
var clockSkew atomic.Int64

func now() time.Time { return time.Now().Add(time.Duration(clockSkew.Load())) }
