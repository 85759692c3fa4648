package serve_test

import (
	"log/slog"
	"os"
	"path/filepath"
	"strings"
	"testing"
	"time"

	"github.com/deadspace-fhir/deadspace/api/serve"
	"github.com/deadspace-fhir/deadspace/api/tlsconf/tlstest"
)

// TestValidateReadsEveryFile checks that every file a setting names is
// read by Validate, so that a missing or unreadable one is reported with
// every other problem, each naming its flag, before anything is created.
func TestValidateReadsEveryFile(t *testing.T) {
	ca := tlstest.NewCA(t)
	server := ca.Server(t, "127.0.0.1")
	other := ca.Server(t, "127.0.0.1")
	dir := t.TempDir()
	missing := filepath.Join(dir, "missing.pem")
	notPEM := filepath.Join(dir, "not.pem")
	if err := os.WriteFile(notPEM, []byte("not PEM\n"), 0o600); err != nil {
		t.Fatal(err)
	}
	withTLS := func(c *serve.Config) { c.TLSCert, c.TLSKey = server.CertFile, server.KeyFile }
	smart := func(key string) func(c *serve.Config) {
		return func(c *serve.Config) {
			c.FHIRBase, c.FHIRTokenURL, c.FHIRClientID, c.FHIRKeyFile = "https://fhir.example/r4", "https://fhir.example/token", "deadspace", key
		}
	}
	pages := func(edit func(u *serve.UIConfig)) func(c *serve.Config) {
		return func(c *serve.Config) {
			c.UI = serve.UIConfig{Listen: "127.0.0.1:0", UserHeader: "X-Remote-User", TrustedProxies: "127.0.0.1", SessionTTL: time.Hour}
			edit(&c.UI)
		}
	}
	cases := []struct {
		name string
		edit func(c *serve.Config)
		want []string // nil: valid
	}{
		{"TLS and mutual TLS", func(c *serve.Config) { withTLS(c); c.GRPCClientCA = ca.CertFile }, nil},
		{"a missing certificate", func(c *serve.Config) { withTLS(c); c.TLSCert = missing },
			[]string{"--tls-cert and --tls-key: reading certificate: open " + missing}},
		{"a missing key", func(c *serve.Config) { withTLS(c); c.TLSKey = missing },
			[]string{"--tls-cert and --tls-key: reading key: open " + missing}},
		{"a key of another certificate", func(c *serve.Config) { withTLS(c); c.TLSKey = other.KeyFile },
			[]string{"--tls-cert and --tls-key: key pair"}},
		{"a missing client CA", func(c *serve.Config) { withTLS(c); c.GRPCClientCA = missing },
			[]string{"--grpc-client-ca: reading CA file: open " + missing}},
		{"a client CA without certificates", func(c *serve.Config) { withTLS(c); c.GRPCClientCA = notPEM },
			[]string{"--grpc-client-ca: CA file " + notPEM + ": no PEM certificates found"}},
		{"a client CA without TLS, and missing", func(c *serve.Config) { c.GRPCClientCA = missing },
			[]string{"--grpc-client-ca needs --tls-cert and --tls-key", "--grpc-client-ca: reading CA file"}},
		{"a private key for the FHIR server", smart(server.KeyFile), nil},
		{"a missing private key for the FHIR server", smart(missing), []string{"--fhir-private-key-file: ", "open " + missing}},
		{"a private key file without a key", smart(notPEM), []string{"--fhir-private-key-file: "}},
		{"the pages' CA for the provider", pages(func(u *serve.UIConfig) { u.OIDCCA = ca.CertFile }), nil},
		{"a missing CA for the provider", pages(func(u *serve.UIConfig) { u.OIDCCA = missing }),
			[]string{"--ui-oidc-ca: reading CA file: open " + missing}},
		{"an access log to be created", pages(func(u *serve.UIConfig) { u.AccessLog = filepath.Join(dir, "new-access.log") }), nil},
		{"an access log in a missing directory", pages(func(u *serve.UIConfig) { u.AccessLog = filepath.Join(dir, "no-such-dir", "access.log") }),
			[]string{"--ui-access-log: the directory of"}},
		{"an access log that is a directory", pages(func(u *serve.UIConfig) { u.AccessLog = dir }), []string{"--ui-access-log: " + dir + " is a directory"}},
		{"the default access log in a data directory still to be created", func(c *serve.Config) {
			pages(func(*serve.UIConfig) {})(c)
			c.DataDir = filepath.Join(dir, "created-at-start")
		}, nil},
		{"a data directory that is a file", func(c *serve.Config) { c.DataDir = notPEM }, []string{"--data-dir: " + notPEM + " is not a directory"}},
		{"every file missing at once", func(c *serve.Config) {
			withTLS(c)
			c.TLSKey, c.GRPCClientCA = missing, missing
			smart(missing)(c)
			pages(func(u *serve.UIConfig) { u.OIDCCA = missing })(c)
		}, []string{"--tls-cert and --tls-key: reading key", "--grpc-client-ca: reading CA file", "--fhir-private-key-file: ", "--ui-oidc-ca: reading CA file"}},
	}
	for _, tc := range cases {
		t.Run(tc.name, func(t *testing.T) {
			c := testConfig("", dir)
			tc.edit(&c)
			err := c.Validate()
			if tc.want == nil {
				if err != nil {
					t.Fatalf("refused: %v", err)
				}
				return
			}
			if err == nil {
				t.Fatal("accepted")
			}
			for _, w := range tc.want {
				if n := strings.Count(err.Error(), w); n != 1 {
					t.Errorf("error has %q %d times, want once: %q", w, n, err)
				}
			}
		})
	}
}

// TestNewCreatesNothingWithABadFile checks that New, given settings that
// did not pass Validate, reads the TLS files before it creates the store.
func TestNewCreatesNothingWithABadFile(t *testing.T) {
	dir := filepath.Join(t.TempDir(), "data")
	c := testConfig("", dir)
	c.TLSCert, c.TLSKey = filepath.Join(dir, "..", "cert.pem"), filepath.Join(dir, "..", "key.pem")
	svc, err := serve.New(c, "test", slog.New(slog.DiscardHandler))
	if err == nil {
		t.Fatalf("started with missing TLS files: %v", svc.Addr())
	}
	if !strings.Contains(err.Error(), "--tls-cert and --tls-key") {
		t.Errorf("error %q does not name the flags", err)
	}
	if _, err := os.Stat(dir); err == nil {
		t.Error("the data directory was created")
	}
}
