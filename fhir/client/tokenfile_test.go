package client_test

import (
	"bytes"
	"fmt"
	"io"
	"log/slog"
	"net/http"
	"net/http/httptest"
	"os"
	"path/filepath"
	"strings"
	"sync"
	"testing"

	"github.com/deadspace-fhir/deadspace/fhir/client"
)

// A token file renewed while the service runs is read again when the
// server refuses the token it holds (401), and the request is retried at
// once with the new token; a file that cannot be read then keeps the old
// token. Neither token is ever logged or printed.
func TestTokenFileIsReadAgainAfter401(t *testing.T) {
	path := filepath.Join(t.TempDir(), "token")
	write := func(s string) {
		t.Helper()
		if err := os.WriteFile(path, []byte(s), 0o600); err != nil {
			t.Fatal(err)
		}
	}
	write("old-token-0001\n")
	var mu sync.Mutex
	accept := "old-token-0001"
	var seen []string
	srv := httptest.NewServer(http.HandlerFunc(func(w http.ResponseWriter, r *http.Request) {
		mu.Lock()
		ok := r.Header.Get("Authorization") == "Bearer "+accept
		seen = append(seen, strings.TrimPrefix(r.Header.Get("Authorization"), "Bearer "))
		mu.Unlock()
		w.Header().Set("Content-Type", "application/fhir+json")
		if !ok {
			w.WriteHeader(http.StatusUnauthorized)
			_, _ = io.WriteString(w, `{"resourceType":"OperationOutcome","issue":[{"severity":"error","code":"login"}]}`)
			return
		}
		_, _ = io.WriteString(w, obsBody)
	}))
	defer srv.Close()
	var logs bytes.Buffer
	tf, err := client.NewTokenFile(path, slog.New(slog.NewTextHandler(&logs, &slog.HandlerOptions{Level: slog.LevelDebug})))
	if err != nil {
		t.Fatal(err)
	}
	c, _ := newClient(t, srv.URL+"/fhir", func(cfg *client.Config) { cfg.Auth = tf })
	read := func() error {
		_, _, err := c.Read(t.Context(), "Observation", "o1")
		return err
	}
	if err := read(); err != nil {
		t.Fatalf("with the first token: %v", err)
	}

	// Renewed: the server takes only the new token from now on.
	write("new-token-0002\r\n")
	mu.Lock()
	accept = "new-token-0002"
	seen = nil
	mu.Unlock()
	if err := read(); err != nil {
		t.Fatalf("after the file was renewed: %v", err)
	}
	mu.Lock()
	if want := []string{"old-token-0001", "new-token-0002"}; fmt.Sprint(seen) != fmt.Sprint(want) {
		t.Errorf("tokens sent %v, want %v", seen, want)
	}
	mu.Unlock()

	// The file gone (being replaced): the token read before is kept.
	if err := os.Remove(path); err != nil {
		t.Fatal(err)
	}
	if err := read(); err != nil {
		t.Fatalf("with the file gone and the token still good: %v", err)
	}
	mu.Lock()
	accept = "third-token-0003"
	mu.Unlock()
	if err := read(); err == nil {
		t.Fatal("a refused token with no file to read again passed")
	}
	mu.Lock()
	accept = "new-token-0002"
	mu.Unlock()
	if err := read(); err != nil {
		t.Fatalf("the token read before was not kept: %v", err)
	}

	if s := fmt.Sprintf("%v %s %+v", tf, tf, client.Config{Auth: tf}) + logs.String(); strings.Contains(s, "token-000") {
		t.Errorf("a token was printed or logged: %s", s)
	}
	if _, err := client.NewTokenFile(filepath.Join(t.TempDir(), "none"), nil); err == nil {
		t.Error("a missing token file was taken")
	}
}

// An empty token file means no token: no Authorization header, until the
// file holds one and the server refused a request without it.
func TestEmptyTokenFileSendsNoToken(t *testing.T) {
	path := filepath.Join(t.TempDir(), "token")
	if err := os.WriteFile(path, []byte("\n"), 0o600); err != nil {
		t.Fatal(err)
	}
	tf, err := client.NewTokenFile(path, nil)
	if err != nil {
		t.Fatal(err)
	}
	req := httptest.NewRequest(http.MethodGet, "http://fhir.example/fhir/Observation", nil)
	if err := tf.Authorize(req); err != nil || req.Header.Get("Authorization") != "" {
		t.Fatalf("empty file: Authorization %q, %v; want none", req.Header.Get("Authorization"), err)
	}
	if err := os.WriteFile(path, []byte("later-token-0004"), 0o600); err != nil {
		t.Fatal(err)
	}
	tf.Invalidate()
	if err := tf.Authorize(req); err != nil || req.Header.Get("Authorization") != "Bearer later-token-0004" {
		t.Fatalf("after the file was filled in: Authorization %q, %v", req.Header.Get("Authorization"), err)
	}
}
