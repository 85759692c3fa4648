package ui

// Access control. The pages show patient data, so every page needs a user:
// either signed in through the hospital's OpenID Connect provider
// (authorization code flow with PKCE, membership of an allowed group or
// role checked on the ID token), or named by an authenticating proxy in a
// header that is trusted only from the proxy's addresses.

import (
	"context"
	"crypto/hmac"
	"crypto/rand"
	"encoding/base64"
	"encoding/json"
	"errors"
	"fmt"
	"io"
	"log/slog"
	"net"
	"net/http"
	"net/netip"
	"net/url"
	"slices"
	"strings"
	"sync"
	"time"

	"github.com/coreos/go-oidc/v3/oidc"
	"golang.org/x/oauth2"
)

// Authenticator decides who is asking.
type Authenticator interface {
	// User returns the signed-in user's name.
	User(r *http.Request) (string, bool)
	// Challenge answers a request without a user.
	Challenge(w http.ResponseWriter, r *http.Request)
	// Routes are the sign-in routes, served without a user.
	Routes() map[string]http.Handler
}

// sessionCookie is host-only and Secure by its prefix.
const (
	sessionCookie = "__Host-deadspace-session"
	stateCookie   = "__Host-deadspace-signin"
	signinTimeout = 10 * time.Minute
)

// OIDCConfig configures sign-in through an OpenID Connect provider.
type OIDCConfig struct {
	Issuer       string
	ClientID     string
	ClientSecret string
	// RedirectURL is this service's callback, ".../signin/callback".
	RedirectURL string
	Scopes      []string
	// Claim names the ID token claim holding the user's groups or roles
	// (a string or a list of strings); Allowed are the values that may
	// see the pages. Both are required.
	Claim   string
	Allowed []string
	// UserClaim names the claim shown as the user and written to the
	// access log; "preferred_username" when empty, falling back to "sub".
	UserClaim  string
	SessionTTL time.Duration
	// SessionKey signs sessions and seals sign-ins in progress (at least
	// MinSessionKeyBytes). Every replica must have the same one for a
	// session to be accepted by all, and it must outlive restarts. When it
	// is empty a random key is made, and sessions last only as long as the
	// process.
	SessionKey []byte
	// HTTPClient reaches the provider; nil means http.DefaultClient.
	HTTPClient *http.Client
	Logger     *slog.Logger
}

// OIDC signs users in with an OpenID Connect provider.
type OIDC struct {
	cfg      OIDCConfig
	oauth    oauth2.Config
	verifier *oidc.IDTokenVerifier
	sessions *sessions
	log      *slog.Logger
}

// NewOIDC discovers the provider and returns the authenticator.
func NewOIDC(ctx context.Context, cfg OIDCConfig) (*OIDC, error) {
	var errs []error
	if cfg.Issuer == "" || cfg.ClientID == "" || cfg.RedirectURL == "" {
		errs = append(errs, errors.New("ui: OpenID Connect needs an issuer, a client id and a redirect URL"))
	}
	if cfg.Claim == "" || len(cfg.Allowed) == 0 {
		errs = append(errs, errors.New("ui: OpenID Connect needs the group or role claim and its allowed values"))
	}
	if cfg.SessionTTL <= 0 {
		errs = append(errs, errors.New("ui: the session lifetime must be positive"))
	}
	log := cfg.Logger
	if log == nil {
		log = slog.New(slog.DiscardHandler)
	}
	key := cfg.SessionKey
	if len(key) == 0 {
		log.Warn("no session key given (--ui-session-key-file or DEADSPACE_UI_SESSION_KEY): sessions are signed with a key made at start, so they will not survive a restart and other replicas will not accept them")
		key = RandomSessionKey()
	}
	sess, err := newSessions(cfg.SessionTTL, key)
	if err != nil {
		errs = append(errs, err)
	}
	if err := errors.Join(errs...); err != nil {
		return nil, err
	}
	if cfg.HTTPClient != nil {
		ctx = oidc.ClientContext(ctx, cfg.HTTPClient)
	}
	provider, err := oidc.NewProvider(ctx, cfg.Issuer)
	if err != nil {
		return nil, fmt.Errorf("ui: OpenID Connect discovery: %w", err)
	}
	scopes := cfg.Scopes
	if !slices.Contains(scopes, oidc.ScopeOpenID) {
		scopes = append([]string{oidc.ScopeOpenID}, scopes...)
	}
	o := &OIDC{
		cfg: cfg,
		oauth: oauth2.Config{
			ClientID: cfg.ClientID, ClientSecret: cfg.ClientSecret, Endpoint: provider.Endpoint(),
			RedirectURL: cfg.RedirectURL, Scopes: scopes,
		},
		verifier: provider.Verifier(&oidc.Config{ClientID: cfg.ClientID, Now: now}),
		sessions: sess,
		log:      log,
	}
	return o, nil
}

// User implements Authenticator.
func (o *OIDC) User(r *http.Request) (string, bool) { return o.sessions.user(r) }

// Challenge sends a browser to sign in and refuses anything else.
func (o *OIDC) Challenge(w http.ResponseWriter, r *http.Request) {
	if r.Method == http.MethodGet && strings.Contains(r.Header.Get("Accept"), "text/html") {
		http.Redirect(w, r, "/signin?next="+url.QueryEscape(r.URL.RequestURI()), http.StatusSeeOther)
		return
	}
	http.Error(w, "sign in first", http.StatusUnauthorized)
}

// Routes implements Authenticator.
func (o *OIDC) Routes() map[string]http.Handler {
	return map[string]http.Handler{
		"GET /signin":          http.HandlerFunc(o.start),
		"GET /signin/callback": http.HandlerFunc(o.callback),
		"POST /signout":        http.HandlerFunc(o.sessions.signout),
	}
}

func randomToken() string {
	b := make([]byte, 32)
	_, _ = rand.Read(b)
	return base64.RawURLEncoding.EncodeToString(b)
}

// start begins the authorization code flow with PKCE (S256) and a nonce.
func (o *OIDC) start(w http.ResponseWriter, r *http.Request) {
	next := r.URL.Query().Get("next")
	if !strings.HasPrefix(next, "/") || strings.HasPrefix(next, "//") || strings.Contains(next, "\\") {
		next = "/"
	}
	s := signinState{
		State: randomToken(), Verifier: oauth2.GenerateVerifier(), Nonce: randomToken(), Next: next,
		Expires: now().Add(signinTimeout).Unix(),
	}
	// The sign-in travels in the browser's cookie, sealed, so the
	// callback may reach any replica.
	http.SetCookie(w, &http.Cookie{
		Name: stateCookie, Value: o.sessions.seal(s), Path: "/", MaxAge: int(signinTimeout.Seconds()),
		Secure: true, HttpOnly: true, SameSite: http.SameSiteLaxMode,
	})
	http.Redirect(w, r, o.oauth.AuthCodeURL(s.State, oauth2.S256ChallengeOption(s.Verifier), oidc.Nonce(s.Nonce)), http.StatusFound)
}

// callback finishes the flow: the state must match this browser's, the
// code is exchanged with the PKCE verifier, the ID token verified, its
// nonce checked and the group or role claim allowed.
func (o *OIDC) callback(w http.ResponseWriter, r *http.Request) {
	q := r.URL.Query()
	c, err := r.Cookie(stateCookie)
	if err != nil {
		http.Error(w, "the sign-in did not start in this browser; start again", http.StatusBadRequest)
		return
	}
	http.SetCookie(w, &http.Cookie{Name: stateCookie, Value: "", Path: "/", MaxAge: -1, Secure: true, HttpOnly: true, SameSite: http.SameSiteLaxMode})
	s, err := o.sessions.open(c.Value)
	switch {
	case errors.Is(err, errSigninExpired):
		http.Error(w, "the sign-in expired; start again", http.StatusBadRequest)
		return
	case err != nil || q.Get("state") == "" || !hmac.Equal([]byte(q.Get("state")), []byte(s.State)):
		http.Error(w, "the sign-in did not start in this browser; start again", http.StatusBadRequest)
		return
	}
	if e := q.Get("error"); e != "" {
		o.log.WarnContext(r.Context(), "sign-in refused by the identity provider", "error", e)
		http.Error(w, "the identity provider refused the sign-in", http.StatusForbidden)
		return
	}
	ctx := r.Context()
	if o.cfg.HTTPClient != nil {
		ctx = context.WithValue(ctx, oauth2.HTTPClient, o.cfg.HTTPClient)
	}
	tok, err := o.oauth.Exchange(ctx, q.Get("code"), oauth2.VerifierOption(s.Verifier))
	if err != nil {
		o.log.WarnContext(ctx, "sign-in: code exchange failed", "err", err)
		http.Error(w, "the sign-in could not be completed", http.StatusBadGateway)
		return
	}
	raw, _ := tok.Extra("id_token").(string)
	idt, err := o.verifier.Verify(ctx, raw)
	if err != nil {
		o.log.WarnContext(ctx, "sign-in: ID token not valid", "err", err)
		http.Error(w, "the identity provider's token is not valid", http.StatusForbidden)
		return
	}
	if idt.Nonce != s.Nonce {
		http.Error(w, "the identity provider's token is for another sign-in", http.StatusForbidden)
		return
	}
	var claims map[string]any
	if err := idt.Claims(&claims); err != nil {
		http.Error(w, "the identity provider's token is not readable", http.StatusForbidden)
		return
	}
	user := claimString(claims, o.cfg.UserClaim, "preferred_username", "sub")
	if !allowed(claims[o.cfg.Claim], o.cfg.Allowed) {
		o.log.WarnContext(ctx, "sign-in refused: no allowed group or role", "claim", o.cfg.Claim)
		http.Error(w, "your account is not in a group allowed to see these pages", http.StatusForbidden)
		return
	}
	o.sessions.start(w, user)
	http.Redirect(w, r, s.Next, http.StatusSeeOther)
}

func claimString(claims map[string]any, names ...string) string {
	for _, n := range names {
		if s, ok := claims[n].(string); ok && s != "" {
			return s
		}
	}
	return "unknown"
}

// allowed reports whether a claim (a string or a list) holds an allowed
// value.
func allowed(claim any, values []string) bool {
	switch c := claim.(type) {
	case string:
		return slices.Contains(values, c)
	case []any:
		for _, v := range c {
			if s, ok := v.(string); ok && slices.Contains(values, s) {
				return true
			}
		}
	}
	return false
}

// ProxyAuth trusts a user header set by an authenticating proxy, and only
// on connections from the proxy's addresses.
type ProxyAuth struct {
	Header  string
	Trusted []netip.Prefix
}

// ParsePrefixes parses a comma-separated list of addresses and CIDR
// prefixes.
func ParsePrefixes(s string) ([]netip.Prefix, error) {
	var out []netip.Prefix
	for _, f := range strings.Split(s, ",") {
		f = strings.TrimSpace(f)
		if f == "" {
			continue
		}
		if p, err := netip.ParsePrefix(f); err == nil {
			out = append(out, p.Masked())
			continue
		}
		a, err := netip.ParseAddr(f)
		if err != nil {
			return nil, fmt.Errorf("%q is not an address or CIDR prefix", f)
		}
		out = append(out, netip.PrefixFrom(a, a.BitLen()))
	}
	return out, nil
}

// User implements Authenticator.
func (p ProxyAuth) User(r *http.Request) (string, bool) {
	host, _, err := net.SplitHostPort(r.RemoteAddr)
	if err != nil {
		return "", false
	}
	a, err := netip.ParseAddr(host)
	if err != nil {
		return "", false
	}
	a = a.Unmap()
	if !slices.ContainsFunc(p.Trusted, func(pf netip.Prefix) bool { return pf.Contains(a) }) {
		return "", false
	}
	u := strings.TrimSpace(r.Header.Get(p.Header))
	if u == "" || len(u) > 256 {
		return "", false
	}
	return u, true
}

// Challenge implements Authenticator.
func (p ProxyAuth) Challenge(w http.ResponseWriter, r *http.Request) {
	http.Error(w, "sign in through the authenticating proxy", http.StatusUnauthorized)
}

// Routes implements Authenticator: the proxy signs users in.
func (p ProxyAuth) Routes() map[string]http.Handler { return nil }

// AccessLog records who saw which patient's data, and when, as JSON lines
// of its own: hospitals must keep it, and the operational log must not
// name patients.
type AccessLog struct {
	mu  sync.Mutex
	w   io.Writer
	log *slog.Logger
}

// NewAccessLog writes to w; write failures are reported to log, without
// the entry.
func NewAccessLog(w io.Writer, log *slog.Logger) *AccessLog {
	if log == nil {
		log = slog.New(slog.DiscardHandler)
	}
	return &AccessLog{w: w, log: log}
}

// AccessEntry is one line of the access log.
type AccessEntry struct {
	Time     time.Time `json:"time"`
	User     string    `json:"user"`
	Page     string    `json:"page"`
	Patients []string  `json:"patients"`
}

// Record writes one entry: user saw page, showing these patients. A page
// whose view cannot be recorded is not shown.
func (a *AccessLog) Record(user, page string, patients ...string) error {
	line, err := json.Marshal(AccessEntry{Time: now().UTC(), User: user, Page: page, Patients: patients})
	if err != nil {
		return fmt.Errorf("ui: access log: %w", err)
	}
	a.mu.Lock()
	defer a.mu.Unlock()
	if _, err := a.w.Write(append(line, '\n')); err != nil {
		a.log.Error("access log: write failed; the page is refused", "err", err)
		return fmt.Errorf("ui: access log: %w", err)
	}
	return nil
}
