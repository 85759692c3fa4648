package ui

import (
	"crypto/aes"
	"crypto/cipher"
	"crypto/hmac"
	"crypto/rand"
	"crypto/sha256"
	"encoding/base64"
	"encoding/json"
	"errors"
	"fmt"
	"net/http"
	"strings"
	"time"
)

// MinSessionKeyBytes is the shortest session key accepted: as long as the
// HMAC-SHA256 output, so the key is not the weak part.
const MinSessionKeyBytes = 32

// sessions keeps nothing on the server: a session is a cookie that names
// the user and when the sign-in happened, signed with HMAC-SHA256, and a
// sign-in in progress is a cookie sealed with AES-GCM (it carries the PKCE
// verifier, which must stay secret). Any process with the same key accepts
// them, so a restart or another replica signs nobody out. A session ends
// at its issue time plus the session lifetime (the current setting),
// however long the browser keeps the cookie. Signing out removes the
// cookie from the browser; a copy taken before stays valid until it
// expires, since no replica keeps a list of sessions to strike it from.
type sessions struct {
	ttl  time.Duration
	mac  []byte      // signs session cookies
	aead cipher.AEAD // seals sign-in cookies
}

// newSessions derives the two keys from key, one per purpose, so a
// sign-in cookie can never pass as a session.
func newSessions(ttl time.Duration, key []byte) (*sessions, error) {
	if len(key) < MinSessionKeyBytes {
		return nil, fmt.Errorf("ui: the session key has %d bytes, fewer than %d", len(key), MinSessionKeyBytes)
	}
	sub := func(purpose string) []byte {
		m := hmac.New(sha256.New, key)
		m.Write([]byte(purpose))
		return m.Sum(nil)
	}
	block, err := aes.NewCipher(sub("deadspace ui sign-in v1"))
	if err != nil {
		return nil, fmt.Errorf("ui: session key: %w", err)
	}
	aead, err := cipher.NewGCM(block)
	if err != nil {
		return nil, fmt.Errorf("ui: session key: %w", err)
	}
	return &sessions{ttl: ttl, mac: sub("deadspace ui session v1"), aead: aead}, nil
}

// RandomSessionKey returns a fresh key, for a process given none.
func RandomSessionKey() []byte {
	b := make([]byte, MinSessionKeyBytes)
	_, _ = rand.Read(b)
	return b
}

// sessionClaims is what a session cookie says.
type sessionClaims struct {
	User   string `json:"u"`
	Issued int64  `json:"i"` // Unix seconds
}

const sessionPrefix = "v1."

func (s *sessions) sign(payload string) string {
	m := hmac.New(sha256.New, s.mac)
	m.Write([]byte(sessionPrefix + payload))
	return base64.RawURLEncoding.EncodeToString(m.Sum(nil))
}

// issue returns the cookie value of a new session for user.
func (s *sessions) issue(user string) string {
	b, _ := json.Marshal(sessionClaims{User: user, Issued: now().Unix()})
	payload := base64.RawURLEncoding.EncodeToString(b)
	return sessionPrefix + payload + "." + s.sign(payload)
}

// check returns the user of a session cookie value, or an error saying why
// it is refused.
func (s *sessions) check(value string) (string, error) {
	rest, ok := strings.CutPrefix(value, sessionPrefix)
	if !ok {
		return "", errors.New("not a session of this version")
	}
	payload, sig, ok := strings.Cut(rest, ".")
	if !ok || !hmac.Equal([]byte(sig), []byte(s.sign(payload))) {
		return "", errors.New("signature does not match")
	}
	b, err := base64.RawURLEncoding.DecodeString(payload)
	if err != nil {
		return "", errors.New("signed but not readable")
	}
	var c sessionClaims
	if err := json.Unmarshal(b, &c); err != nil || c.User == "" {
		return "", errors.New("signed but not readable")
	}
	issued := time.Unix(c.Issued, 0)
	if t := now(); !t.Before(issued.Add(s.ttl)) || issued.After(t.Add(time.Minute)) {
		return "", errors.New("expired")
	}
	return c.User, nil
}

func (s *sessions) start(w http.ResponseWriter, user string) {
	http.SetCookie(w, &http.Cookie{
		Name: sessionCookie, Value: s.issue(user), Path: "/", MaxAge: int(s.ttl.Seconds()),
		Secure: true, HttpOnly: true, SameSite: http.SameSiteLaxMode,
	})
}

func (s *sessions) user(r *http.Request) (string, bool) {
	c, err := r.Cookie(sessionCookie)
	if err != nil {
		return "", false
	}
	u, err := s.check(c.Value)
	return u, err == nil
}

func (s *sessions) signout(w http.ResponseWriter, r *http.Request) {
	http.SetCookie(w, &http.Cookie{Name: sessionCookie, Value: "", Path: "/", MaxAge: -1, Secure: true, HttpOnly: true, SameSite: http.SameSiteLaxMode})
	w.Header().Set("Content-Type", "text/plain; charset=utf-8")
	fmt.Fprintln(w, "Signed out.")
}

// signinState is a sign-in in progress, kept in the browser's sign-in
// cookie between the redirect to the provider and the callback.
type signinState struct {
	State    string `json:"s"`
	Verifier string `json:"v"`
	Nonce    string `json:"n"`
	Next     string `json:"x"`
	Expires  int64  `json:"e"` // Unix seconds
}

var signinAAD = []byte("deadspace ui sign-in")

// seal returns the cookie value holding st, encrypted and authenticated.
func (s *sessions) seal(st signinState) string {
	b, _ := json.Marshal(st)
	nonce := make([]byte, s.aead.NonceSize())
	_, _ = rand.Read(nonce)
	return base64.RawURLEncoding.EncodeToString(s.aead.Seal(nonce, nonce, b, signinAAD))
}

// open reads a sign-in cookie value; an altered, foreign or expired one is
// an error.
func (s *sessions) open(value string) (signinState, error) {
	b, err := base64.RawURLEncoding.DecodeString(value)
	if err != nil || len(b) < s.aead.NonceSize() {
		return signinState{}, errors.New("not a sign-in cookie")
	}
	n := s.aead.NonceSize()
	plain, err := s.aead.Open(nil, b[:n], b[n:], signinAAD)
	if err != nil {
		return signinState{}, errors.New("not a sign-in cookie of this service")
	}
	var st signinState
	if err := json.Unmarshal(plain, &st); err != nil {
		return signinState{}, errors.New("not a sign-in cookie of this service")
	}
	if !now().Before(time.Unix(st.Expires, 0)) {
		return signinState{}, errSigninExpired
	}
	return st, nil
}

var errSigninExpired = errors.New("the sign-in expired")
