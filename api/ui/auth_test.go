package ui

import (
	"bytes"
	"context"
	"encoding/base64"
	"errors"
	"log/slog"
	"net/http"
	"net/http/cookiejar"
	"net/http/httptest"
	"net/netip"
	"strconv"
	"strings"
	"testing"
	"time"

	"github.com/oauth2-proxy/mockoidc"
)

// signInEnv is the pages over TLS with sign-in through a local OpenID
// provider (mockoidc) that the test starts.
type signInEnv struct {
	srv    *httptest.Server
	oidc   *mockoidc.MockOIDC
	client *http.Client
	access *bytes.Buffer
}

func newSignInEnv(t *testing.T, ttl time.Duration) *signInEnv {
	t.Helper()
	m, err := mockoidc.Run()
	if err != nil {
		t.Fatal(err)
	}
	t.Cleanup(func() { _ = m.Shutdown() })
	env := &signInEnv{oidc: m, access: &bytes.Buffer{}}
	var h http.Handler = http.NotFoundHandler()
	env.srv = httptest.NewTLSServer(http.HandlerFunc(func(w http.ResponseWriter, r *http.Request) { h.ServeHTTP(w, r) }))
	t.Cleanup(env.srv.Close)
	auth, err := NewOIDC(context.Background(), OIDCConfig{
		Issuer: m.Issuer(), ClientID: m.ClientID, ClientSecret: m.ClientSecret,
		RedirectURL: env.srv.URL + "/signin/callback", Scopes: []string{"openid", "profile", "groups"},
		Claim: "groups", Allowed: []string{"icu-audit"}, SessionTTL: ttl,
	})
	if err != nil {
		t.Fatal(err)
	}
	h = testHandler(t, ReportSource{demo(t)}, auth, env.access)
	jar, _ := cookiejar.New(nil)
	env.client = env.srv.Client()
	env.client.Jar = jar
	return env
}

func (e *signInEnv) get(t *testing.T, path string) *http.Response {
	t.Helper()
	req, _ := http.NewRequest(http.MethodGet, e.srv.URL+path, nil)
	req.Header.Set("Accept", "text/html")
	resp, err := e.client.Do(req)
	if err != nil {
		t.Fatal(err)
	}
	resp.Body.Close()
	return resp
}

func TestOIDCSignInWithPKCE(t *testing.T) {
	env := newSignInEnv(t, time.Hour)
	env.oidc.QueueUser(&mockoidc.MockUser{Subject: "s1", PreferredUsername: "c.auditor", Groups: []string{"staff", "icu-audit"}})
	var authorize *http.Request
	env.client.CheckRedirect = func(req *http.Request, via []*http.Request) error {
		if strings.Contains(req.URL.Path, "authorize") {
			authorize = req
		}
		return nil
	}
	resp := env.get(t, "/patient/bed1-stable")
	if resp.StatusCode != http.StatusOK || resp.Request.URL.Path != "/patient/bed1-stable" {
		t.Fatalf("after sign-in: status %d at %s", resp.StatusCode, resp.Request.URL)
	}
	q := authorize.URL.Query()
	if q.Get("code_challenge_method") != "S256" || len(q.Get("code_challenge")) < 43 || q.Get("nonce") == "" || q.Get("state") == "" {
		t.Errorf("the authorization request lacks PKCE S256, a nonce or a state: %v", q)
	}
	if !strings.Contains(env.access.String(), `"user":"c.auditor","page":"timeline","patients":["bed1-stable"]`) {
		t.Errorf("access log = %s", env.access)
	}
}

func TestOIDCSessionCookieAndExpiry(t *testing.T) {
	const ttl = 30 * time.Minute
	env := newSignInEnv(t, ttl)
	env.oidc.QueueUser(&mockoidc.MockUser{Subject: "s1", PreferredUsername: "c.auditor", Groups: []string{"icu-audit"}})
	var setCookie []string
	env.client.CheckRedirect = func(req *http.Request, via []*http.Request) error {
		if resp := req.Response; resp != nil && resp.Request.URL.Path == "/signin/callback" {
			setCookie = resp.Header.Values("Set-Cookie")
		}
		return nil
	}
	if resp := env.get(t, "/"); resp.StatusCode != http.StatusOK {
		t.Fatalf("sign-in: status %d", resp.StatusCode)
	}
	var session string
	for _, c := range setCookie {
		if strings.HasPrefix(c, sessionCookie+"=") && !strings.Contains(c, "Max-Age=0") {
			session = c
		}
	}
	for _, attr := range []string{"Secure", "HttpOnly", "SameSite=Lax", "Path=/", "Max-Age=1800"} {
		if !strings.Contains(session, attr) {
			t.Errorf("session cookie %q lacks %s", session, attr)
		}
	}
	if strings.Contains(session, "Domain=") {
		t.Errorf("session cookie %q must be host-only", session)
	}

	// Past the lifetime the same cookie no longer opens a page.
	clockSkew.Store(int64(ttl + time.Minute))
	t.Cleanup(func() { clockSkew.Store(0) })
	env.client.CheckRedirect = func(*http.Request, []*http.Request) error { return http.ErrUseLastResponse }
	resp := env.get(t, "/patient/bed1-stable")
	if resp.StatusCode != http.StatusSeeOther || !strings.HasPrefix(resp.Header.Get("Location"), "/signin") {
		t.Errorf("an expired session got status %d (Location %q), want a redirect to sign in", resp.StatusCode, resp.Header.Get("Location"))
	}
}

func TestOIDCRefusals(t *testing.T) {
	for _, tc := range []struct {
		name   string
		groups []string
		path   string
		want   int
	}{
		{"no allowed group", []string{"visitors"}, "/", http.StatusForbidden},
		{"no groups at all", nil, "/", http.StatusForbidden},
	} {
		t.Run(tc.name, func(t *testing.T) {
			env := newSignInEnv(t, time.Hour)
			env.oidc.QueueUser(&mockoidc.MockUser{Subject: "s2", PreferredUsername: "v.visitor", Groups: tc.groups})
			if resp := env.get(t, tc.path); resp.StatusCode != tc.want {
				t.Errorf("status %d, want %d", resp.StatusCode, tc.want)
			}
			if env.access.Len() != 0 {
				t.Errorf("a refused user reached a page: %s", env.access)
			}
		})
	}
	t.Run("a callback without the sign-in's state", func(t *testing.T) {
		env := newSignInEnv(t, time.Hour)
		if resp := env.get(t, "/signin/callback?code=x&state=forged"); resp.StatusCode != http.StatusBadRequest {
			t.Errorf("status %d, want 400", resp.StatusCode)
		}
	})
	t.Run("a program without a session", func(t *testing.T) {
		env := newSignInEnv(t, time.Hour)
		req, _ := http.NewRequest(http.MethodGet, env.srv.URL+"/", nil)
		resp, err := env.client.Do(req)
		if err != nil {
			t.Fatal(err)
		}
		resp.Body.Close()
		if resp.StatusCode != http.StatusUnauthorized {
			t.Errorf("status %d, want 401", resp.StatusCode)
		}
	})
}

func TestProxyAuth(t *testing.T) {
	trusted, err := ParsePrefixes("10.1.2.3, 192.168.0.0/16")
	if err != nil {
		t.Fatal(err)
	}
	p := ProxyAuth{Header: "X-Remote-User", Trusted: trusted}
	for _, tc := range []struct {
		name, remote, user string
		ok                 bool
	}{
		{"the proxy", "10.1.2.3:5555", "alice", true},
		{"a proxy in the range", "192.168.7.7:1", "bob", true},
		{"an IPv4-mapped proxy address", "[::ffff:10.1.2.3]:5555", "alice", true},
		{"anyone else", "10.1.2.4:5555", "mallory", false},
		{"the proxy without the header", "10.1.2.3:5555", "", false},
	} {
		t.Run(tc.name, func(t *testing.T) {
			r := httptest.NewRequest(http.MethodGet, "/", nil)
			r.RemoteAddr = tc.remote
			if tc.user != "" {
				r.Header.Set("X-Remote-User", tc.user)
			}
			u, ok := p.User(r)
			if ok != tc.ok || (ok && u != tc.user) {
				t.Errorf("User = %q, %v", u, ok)
			}
		})
	}
	if _, err := ParsePrefixes("10.0.0.0/8, not-an-address"); err == nil {
		t.Error("a bad address was accepted")
	}
	want := []netip.Prefix{netip.MustParsePrefix("10.0.0.0/8")}
	if got, _ := ParsePrefixes("10.9.9.9/8"); len(got) != 1 || got[0] != want[0] {
		t.Errorf("ParsePrefixes masks to %v, want %v", got, want)
	}
}

// FuzzParsePrefixes checks the trusted-proxy parser: it never panics, and
// what it accepts is a list of valid, masked prefixes.
func FuzzParsePrefixes(f *testing.F) {
	for _, s := range []string{"127.0.0.1", "10.0.0.0/8, ::1", "", ",,", "fe80::1%eth0", "1.2.3.4/33", "::ffff:10.0.0.1/104"} {
		f.Add(s)
	}
	f.Fuzz(func(t *testing.T, s string) {
		ps, err := ParsePrefixes(s)
		if err != nil {
			return
		}
		for _, p := range ps {
			if !p.IsValid() || p != p.Masked() {
				t.Fatalf("ParsePrefixes(%q) gave %v", s, p)
			}
		}
	})
}

// Sessions are signed cookies: any instance with the same key accepts
// them (a restart, another replica), none with another key does, and
// neither an expired nor an altered cookie opens a page.
func TestSessionsAcrossInstances(t *testing.T) {
	const ttl = 30 * time.Minute
	key := bytes.Repeat([]byte("k"), MinSessionKeyBytes)
	mk := func(key []byte) *sessions {
		t.Helper()
		s, err := newSessions(ttl, key)
		if err != nil {
			t.Fatal(err)
		}
		return s
	}
	issuer, sameKey, otherKey := mk(key), mk(bytes.Clone(key)), mk(bytes.Repeat([]byte("o"), MinSessionKeyBytes))
	w := httptest.NewRecorder()
	issuer.start(w, "c.auditor")
	cookies := w.Result().Cookies()
	if len(cookies) != 1 || cookies[0].Name != sessionCookie {
		t.Fatalf("cookies %v", cookies)
	}
	value := cookies[0].Value
	ask := func(s *sessions, v string) (string, bool) {
		r := httptest.NewRequest(http.MethodGet, "/", nil)
		r.AddCookie(&http.Cookie{Name: sessionCookie, Value: v})
		return s.user(r)
	}
	if u, ok := ask(sameKey, value); !ok || u != "c.auditor" {
		t.Errorf("another instance with the same key: %q, %v; want c.auditor", u, ok)
	}
	if u, ok := ask(otherKey, value); ok {
		t.Errorf("an instance with another key accepted the session of %q", u)
	}
	// Tampering: another user in the payload, the signature cut or moved,
	// one character flipped anywhere.
	payload, sig, _ := strings.Cut(strings.TrimPrefix(value, sessionPrefix), ".")
	forged := sessionPrefix + base64.RawURLEncoding.EncodeToString([]byte(`{"u":"admin","i":`+strconv.FormatInt(now().Unix(), 10)+`}`)) + "." + sig
	tampered := []string{forged, sessionPrefix + payload, sessionPrefix + payload + ".", sessionPrefix + sig + "." + payload, "v2." + payload + "." + sig}
	for i := range value {
		b := []byte(value)
		b[i] ^= 0x01
		tampered = append(tampered, string(b))
	}
	for _, v := range tampered {
		if u, ok := ask(sameKey, v); ok {
			t.Errorf("a tampered cookie %q was accepted as %q", v, u)
		}
	}
	// Expiry: accepted up to the lifetime, refused at and after it.
	t.Cleanup(func() { clockSkew.Store(0) })
	clockSkew.Store(int64(ttl - time.Minute))
	if _, ok := ask(sameKey, value); !ok {
		t.Error("refused a minute before the end of its lifetime")
	}
	clockSkew.Store(int64(ttl))
	if _, ok := ask(sameKey, value); ok {
		t.Error("accepted at the end of its lifetime")
	}
	if _, err := newSessions(ttl, key[:MinSessionKeyBytes-1]); err == nil {
		t.Error("a short key was accepted")
	}
}

// A sign-in in progress travels sealed in the browser: another instance
// with the key reads it; an altered, foreign or expired one is refused.
func TestSignInStateSealed(t *testing.T) {
	key := bytes.Repeat([]byte("k"), MinSessionKeyBytes)
	a, _ := newSessions(time.Hour, key)
	b, _ := newSessions(time.Hour, bytes.Clone(key))
	other, _ := newSessions(time.Hour, bytes.Repeat([]byte("o"), MinSessionKeyBytes))
	st := signinState{State: "st", Verifier: "secret-verifier", Nonce: "n", Next: "/patient/x", Expires: now().Add(signinTimeout).Unix()}
	sealed := a.seal(st)
	if strings.Contains(sealed, "secret-verifier") || strings.Contains(sealed, base64.RawURLEncoding.EncodeToString([]byte("secret-verifier"))) {
		t.Error("the PKCE verifier is readable in the cookie")
	}
	if got, err := b.open(sealed); err != nil || got != st {
		t.Errorf("another instance read %+v, %v; want %+v", got, err, st)
	}
	if _, err := other.open(sealed); err == nil {
		t.Error("an instance with another key read the sign-in")
	}
	raw, _ := base64.RawURLEncoding.DecodeString(sealed)
	raw[len(raw)-1] ^= 1
	if _, err := b.open(base64.RawURLEncoding.EncodeToString(raw)); err == nil {
		t.Error("an altered sign-in was read")
	}
	// A session cookie is not a sign-in, nor the other way round.
	w := httptest.NewRecorder()
	a.start(w, "c.auditor")
	if _, err := b.open(w.Result().Cookies()[0].Value); err == nil {
		t.Error("a session cookie was read as a sign-in")
	}
	if _, err := b.check(sealed); err == nil {
		t.Error("a sign-in cookie was accepted as a session")
	}
	t.Cleanup(func() { clockSkew.Store(0) })
	clockSkew.Store(int64(signinTimeout))
	if _, err := b.open(sealed); !errors.Is(err, errSigninExpired) {
		t.Errorf("an expired sign-in: %v, want errSigninExpired", err)
	}
}

// Two replicas behind one name share a session key: a sign-in that starts
// on one and returns to the other completes, and the session then opens
// pages on both. A third instance with another key (a replica left with
// its own random key) refuses the session.
func TestSignInAcrossReplicas(t *testing.T) {
	m, err := mockoidc.Run()
	if err != nil {
		t.Fatal(err)
	}
	t.Cleanup(func() { _ = m.Shutdown() })
	key := bytes.Repeat([]byte("r"), MinSessionKeyBytes)
	var access bytes.Buffer
	var handlers [3]http.Handler
	var servers [3]*httptest.Server
	for i := range servers {
		servers[i] = httptest.NewTLSServer(http.HandlerFunc(func(w http.ResponseWriter, r *http.Request) { handlers[i].ServeHTTP(w, r) }))
		t.Cleanup(servers[i].Close)
	}
	for i := range servers {
		k := key
		if i == 2 {
			k = bytes.Repeat([]byte("x"), MinSessionKeyBytes)
		}
		auth, err := NewOIDC(context.Background(), OIDCConfig{
			Issuer: m.Issuer(), ClientID: m.ClientID, ClientSecret: m.ClientSecret,
			// The provider sends every browser back to replica 1.
			RedirectURL: servers[1].URL + "/signin/callback", Scopes: []string{"openid", "profile", "groups"},
			Claim: "groups", Allowed: []string{"icu-audit"}, SessionTTL: time.Hour, SessionKey: k,
		})
		if err != nil {
			t.Fatal(err)
		}
		handlers[i] = testHandler(t, ReportSource{demo(t)}, auth, &access)
	}
	m.QueueUser(&mockoidc.MockUser{Subject: "s1", PreferredUsername: "c.auditor", Groups: []string{"icu-audit"}})
	jar, _ := cookiejar.New(nil) // cookies are per host, not per port: the replicas share them
	client := servers[0].Client()
	client.Jar = jar
	get := func(base, path string) *http.Response {
		t.Helper()
		req, _ := http.NewRequest(http.MethodGet, base+path, nil)
		req.Header.Set("Accept", "text/html")
		resp, err := client.Do(req)
		if err != nil {
			t.Fatal(err)
		}
		resp.Body.Close()
		return resp
	}
	resp := get(servers[0].URL, "/patient/bed1-stable")
	if resp.StatusCode != http.StatusOK || resp.Request.URL.String() != servers[1].URL+"/patient/bed1-stable" {
		t.Fatalf("a sign-in started on replica 0, returned to replica 1: status %d at %s", resp.StatusCode, resp.Request.URL)
	}
	client.CheckRedirect = func(*http.Request, []*http.Request) error { return http.ErrUseLastResponse }
	for i, want := range []int{http.StatusOK, http.StatusOK, http.StatusSeeOther} {
		if got := get(servers[i].URL, "/patient/bed1-stable").StatusCode; got != want {
			t.Errorf("replica %d answered the session with %d, want %d", i, got, want)
		}
	}
}

// Without a key the process makes its own and says in the log that
// sessions will not outlive it.
func TestNoSessionKeyIsLogged(t *testing.T) {
	m, err := mockoidc.Run()
	if err != nil {
		t.Fatal(err)
	}
	t.Cleanup(func() { _ = m.Shutdown() })
	var logs bytes.Buffer
	_, err = NewOIDC(context.Background(), OIDCConfig{
		Issuer: m.Issuer(), ClientID: m.ClientID, ClientSecret: m.ClientSecret, RedirectURL: "https://h/signin/callback",
		Claim: "groups", Allowed: []string{"icu-audit"}, SessionTTL: time.Hour, Logger: slog.New(slog.NewTextHandler(&logs, nil)),
	})
	if err != nil {
		t.Fatal(err)
	}
	if !strings.Contains(logs.String(), "will not survive a restart") {
		t.Errorf("no warning that sessions end with the process: %q", logs.String())
	}
	logs.Reset()
	if _, err := NewOIDC(context.Background(), OIDCConfig{
		Issuer: m.Issuer(), ClientID: m.ClientID, RedirectURL: "https://h/signin/callback",
		Claim: "groups", Allowed: []string{"icu-audit"}, SessionTTL: time.Hour, SessionKey: []byte("short"),
	}); err == nil || !strings.Contains(err.Error(), "session key") {
		t.Errorf("a short key: %v, want an error naming the session key", err)
	}
}
