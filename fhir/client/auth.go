package client

import (
	"errors"
	"fmt"
	"log/slog"
	"net/http"
	"os"
	"strings"
	"sync"
)

// Authorizer adds credentials to an outgoing request. It is called once per attempt, not once
// per operation, so an implementation that refreshes short-lived tokens (OAuth client
// credentials, later) is consulted again before every retry.
type Authorizer interface {
	Authorize(req *http.Request) error
}

// BearerToken is a static bearer token. Its String and LogValue hide the secret, so printing a
// Config by accident does not leak it.
type BearerToken string

// Authorize sets the Authorization header.
func (t BearerToken) Authorize(req *http.Request) error {
	if t == "" {
		return errors.New("client: empty bearer token")
	}
	req.Header.Set("Authorization", "Bearer "+string(t))
	return nil
}

// String hides the token.
func (BearerToken) String() string { return "[redacted]" }

// LogValue hides the token from slog.
func (BearerToken) LogValue() slog.Value { return slog.StringValue("[redacted]") }

// TokenFile is a bearer token kept in a file that whatever renews the token (a mounted secret,
// a token agent) replaces before the old token expires. The file is read when the TokenFile is
// made and again whenever the FHIR server refuses the token (401, through [Invalidator]), so a
// renewed token is used without a restart. An empty file means no token: requests go without
// an Authorization header (a credential laid out for every deployment, filled in for those
// whose server wants one). Its String and LogValue hide the token.
type TokenFile struct {
	path string
	log  *slog.Logger

	mu    sync.Mutex
	token string
}

var _ Invalidator = (*TokenFile)(nil)

// NewTokenFile reads the token in path (trailing line breaks removed). log may be nil.
func NewTokenFile(path string, log *slog.Logger) (*TokenFile, error) {
	if log == nil {
		log = slog.New(slog.DiscardHandler)
	}
	tok, err := readTokenFile(path)
	if err != nil {
		return nil, err
	}
	return &TokenFile{path: path, log: log, token: tok}, nil
}

func readTokenFile(path string) (string, error) {
	b, err := os.ReadFile(path)
	if err != nil {
		return "", fmt.Errorf("client: token file: %w", err)
	}
	return strings.TrimRight(string(b), "\r\n"), nil
}

// Authorize sets the Authorization header with the token read last, none when it is empty.
func (t *TokenFile) Authorize(req *http.Request) error {
	t.mu.Lock()
	tok := t.token
	t.mu.Unlock()
	if tok != "" {
		req.Header.Set("Authorization", "Bearer "+tok)
	}
	return nil
}

// Invalidate reads the file again: the server refused the token it held. A file that cannot be
// read leaves the token as it was (the file may be being replaced).
func (t *TokenFile) Invalidate() {
	tok, err := readTokenFile(t.path)
	if err != nil {
		t.log.Warn("the FHIR server refused the token and the token file could not be read again; the token read before is kept", "err", err)
		return
	}
	t.mu.Lock()
	changed := tok != t.token
	t.token = tok
	t.mu.Unlock()
	if changed {
		t.log.Info("the FHIR server refused the token; the token file holds a new one, which is used from now on")
	} else {
		t.log.Warn("the FHIR server refused the token, and the token file still holds the same one")
	}
}

// String hides the token.
func (*TokenFile) String() string { return "[redacted]" }

// LogValue hides the token from slog.
func (*TokenFile) LogValue() slog.Value { return slog.StringValue("[redacted]") }
