package client

import (
	"errors"
	"log/slog"
	"net/http"
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
