package tlsconf

import (
	"crypto/tls"
	"crypto/x509"
	"fmt"
	"io"
	"log"
	"net"
	"net/http"
	"os"
	"path/filepath"
	"strings"
	"sync"
	"testing"
	"time"

	"github.com/deadspace-fhir/deadspace/api/tlsconf/tlstest"
)

// Sources: RFC 8446 (Rescorla, 2018) §4.3.2 and §4.4.2 for client certificates in TLS 1.3;
// RFC 8996 (Moriarty and Farrell, 2021) for refusing TLS 1.0 and 1.1; RFC 6125 (Saint-Andre and
// Hodges, 2011) for checking the server's name against its certificate. Demanding client
// certificates on a service-to-service listener is common practice.

// serve runs an HTTPS server on 127.0.0.1 with cfg that answers with the client certificate's
// common name (or "-") and the negotiated version.
func serve(t *testing.T, cfg *tls.Config) string {
	t.Helper()
	l, err := net.Listen("tcp", "127.0.0.1:0")
	if err != nil {
		t.Fatal(err)
	}
	srv := &http.Server{
		ReadHeaderTimeout: 10 * time.Second,
		Handler: http.HandlerFunc(func(w http.ResponseWriter, r *http.Request) {
			cn := "-"
			if len(r.TLS.PeerCertificates) > 0 {
				cn = r.TLS.PeerCertificates[0].Subject.CommonName
			}
			fmt.Fprintf(w, "%s %s", cn, tls.VersionName(r.TLS.Version))
		}),
		// Handshake failures are the point of several cases; keep them out of the test log.
		ErrorLog: log.New(io.Discard, "", 0),
	}
	go srv.Serve(tls.NewListener(l, cfg))
	t.Cleanup(func() { srv.Close() })
	return "https://" + l.Addr().String() + "/"
}

func get(url string, cfg *tls.Config) (string, error) {
	tr := &http.Transport{TLSClientConfig: cfg}
	defer tr.CloseIdleConnections()
	resp, err := (&http.Client{Transport: tr, Timeout: 30 * time.Second}).Get(url)
	if err != nil {
		return "", err
	}
	defer resp.Body.Close()
	b, err := io.ReadAll(resp.Body)
	return string(b), err
}

// mustConfig returns a checker so a (config, error) pair can be used inline.
func mustConfig(t *testing.T) func(*tls.Config, error) *tls.Config {
	return func(cfg *tls.Config, err error) *tls.Config {
		t.Helper()
		if err != nil {
			t.Fatal(err)
		}
		return cfg
	}
}

func TestHandshake(t *testing.T) {
	must := mustConfig(t)
	ca := tlstest.NewCA(t)
	other := tlstest.NewCA(t)
	server := ca.Server(t)
	wrongName := ca.Server(t, "127.0.0.2", "fhir.example")
	client := ca.Client(t, "deadspace-worker")
	stranger := other.Client(t, "stranger")

	tlsURL := serve(t, must(ServerConfig(server.CertFile, server.KeyFile, "")))
	mtlsURL := serve(t, must(ServerConfig(server.CertFile, server.KeyFile, ca.CertFile)))
	wrongNameURL := serve(t, must(ServerConfig(wrongName.CertFile, wrongName.KeyFile, "")))

	withVersions := func(cfg *tls.Config, minV, maxV uint16) *tls.Config {
		cfg.MinVersion, cfg.MaxVersion = minV, maxV
		return cfg
	}
	cases := []struct {
		name    string
		url     string
		client  *tls.Config
		want    string // response body when the handshake should succeed
		wantErr string // substring of the client's error otherwise
	}{
		{"TLS, no client certificate", tlsURL, must(ClientConfig(ca.CertFile, "", "")), "- TLS 1.3", ""},
		{"mutual TLS with a client certificate", mtlsURL, must(ClientConfig(ca.CertFile, client.CertFile, client.KeyFile)), "deadspace-worker TLS 1.3", ""},
		{"mutual TLS over TLS 1.2", mtlsURL, withVersions(must(ClientConfig(ca.CertFile, client.CertFile, client.KeyFile)), tls.VersionTLS12, tls.VersionTLS12), "deadspace-worker TLS 1.2", ""},
		{"mutual TLS refuses a client without a certificate", mtlsURL, must(ClientConfig(ca.CertFile, "", "")), "", "certificate required"},
		{"mutual TLS refuses a client without a certificate over TLS 1.2", mtlsURL, withVersions(must(ClientConfig(ca.CertFile, "", "")), tls.VersionTLS12, tls.VersionTLS12), "", "handshake failure"},
		{"mutual TLS refuses a certificate from another CA", mtlsURL, must(ClientConfig(ca.CertFile, stranger.CertFile, stranger.KeyFile)), "", "unknown certificate authority"},
		{"client refuses a server from an unknown CA", tlsURL, must(ClientConfig(other.CertFile, "", "")), "", "certificate signed by unknown authority"},
		{"client refuses a certificate for another host", wrongNameURL, must(ClientConfig(ca.CertFile, "", "")), "", "valid for 127.0.0.2, not 127.0.0.1"},
		{"server refuses TLS 1.1", tlsURL, withVersions(must(ClientConfig(ca.CertFile, "", "")), tls.VersionTLS10, tls.VersionTLS11), "", "protocol version not supported"},
		{"server refuses TLS 1.0", tlsURL, withVersions(must(ClientConfig(ca.CertFile, "", "")), tls.VersionTLS10, tls.VersionTLS10), "", "protocol version not supported"},
	}
	for _, tc := range cases {
		t.Run(tc.name, func(t *testing.T) {
			got, err := get(tc.url, tc.client)
			if tc.wantErr != "" {
				if err == nil || !strings.Contains(err.Error(), tc.wantErr) {
					t.Fatalf("got %q, %v; want an error containing %q", got, err, tc.wantErr)
				}
				return
			}
			if err != nil || got != tc.want {
				t.Fatalf("got %q, %v; want %q", got, err, tc.want)
			}
		})
	}
}

// TestClientRefusesOldServer checks the client side of the TLS 1.2 floor against a server
// that offers at most TLS 1.1.
func TestClientRefusesOldServer(t *testing.T) {
	must := mustConfig(t)
	ca := tlstest.NewCA(t)
	server := ca.Server(t)
	cfg := must(ServerConfig(server.CertFile, server.KeyFile, ""))
	cfg.MinVersion, cfg.MaxVersion = tls.VersionTLS10, tls.VersionTLS11
	url := serve(t, cfg)
	_, err := get(url, must(ClientConfig(ca.CertFile, "", "")))
	if err == nil || !strings.Contains(err.Error(), "protocol version") {
		t.Fatalf("err = %v, want a protocol version failure", err)
	}
}

func TestConfigDefaults(t *testing.T) {
	must := mustConfig(t)
	ca := tlstest.NewCA(t)
	server := ca.Server(t)
	sc := must(ServerConfig(server.CertFile, server.KeyFile, ca.CertFile))
	cc := must(ClientConfig("", "", ""))
	cases := []struct {
		name string
		got  any
		want any
	}{
		{"server minimum version", sc.MinVersion, uint16(tls.VersionTLS12)},
		{"server client auth", sc.ClientAuth, tls.RequireAndVerifyClientCert},
		{"client minimum version", cc.MinVersion, uint16(tls.VersionTLS12)},
		{"client without a CA file uses the system roots", cc.RootCAs == nil, true},
		{"client without a certificate sends none", cc.GetClientCertificate == nil, true},
		{"server without a client CA asks for no certificate", must(ServerConfig(server.CertFile, server.KeyFile, "")).ClientAuth, tls.NoClientCert},
	}
	for _, tc := range cases {
		t.Run(tc.name, func(t *testing.T) {
			if tc.got != tc.want {
				t.Errorf("got %v, want %v", tc.got, tc.want)
			}
		})
	}
}

func TestConfigErrors(t *testing.T) {
	ca := tlstest.NewCA(t)
	server := ca.Server(t)
	otherKey := ca.Server(t).KeyFile
	dir := t.TempDir()
	missing := filepath.Join(dir, "missing.pem")
	notPEM := filepath.Join(dir, "not.pem")
	if err := os.WriteFile(notPEM, []byte("not a certificate\n"), 0o644); err != nil {
		t.Fatal(err)
	}
	cases := []struct {
		name    string
		build   func() (*tls.Config, error)
		wantErr string
	}{
		{"server without files", func() (*tls.Config, error) { return ServerConfig("", "", "") }, "both required"},
		{"server certificate missing", func() (*tls.Config, error) { return ServerConfig(missing, server.KeyFile, "") }, "reading certificate"},
		{"server key missing", func() (*tls.Config, error) { return ServerConfig(server.CertFile, missing, "") }, "reading key"},
		{"server key does not match certificate", func() (*tls.Config, error) { return ServerConfig(server.CertFile, otherKey, "") }, "private key does not match public key"},
		{"client CA file without certificates", func() (*tls.Config, error) { return ServerConfig(server.CertFile, server.KeyFile, notPEM) }, "no PEM certificates"},
		{"client CA file missing", func() (*tls.Config, error) { return ServerConfig(server.CertFile, server.KeyFile, missing) }, "reading CA file"},
		{"client root file without certificates", func() (*tls.Config, error) { return ClientConfig(notPEM, "", "") }, "no PEM certificates"},
		{"client certificate without key", func() (*tls.Config, error) { return ClientConfig("", server.CertFile, "") }, "both a certificate file and a key file"},
		{"client key without certificate", func() (*tls.Config, error) { return ClientConfig("", "", server.KeyFile) }, "both a certificate file and a key file"},
	}
	for _, tc := range cases {
		t.Run(tc.name, func(t *testing.T) {
			cfg, err := tc.build()
			if err == nil || !strings.Contains(err.Error(), tc.wantErr) {
				t.Fatalf("got %v, %v; want an error containing %q", cfg, err, tc.wantErr)
			}
		})
	}
}

type fakeClock struct {
	mu sync.Mutex
	t  time.Time
}

func (c *fakeClock) Now() time.Time {
	c.mu.Lock()
	defer c.mu.Unlock()
	return c.t
}

func (c *fakeClock) Advance(d time.Duration) {
	c.mu.Lock()
	defer c.mu.Unlock()
	c.t = c.t.Add(d)
}

func copyFile(t *testing.T, from, to string) {
	t.Helper()
	b, err := os.ReadFile(from)
	if err != nil {
		t.Fatal(err)
	}
	if err := os.WriteFile(to, b, 0o600); err != nil {
		t.Fatal(err)
	}
}

func TestServerCertificateReload(t *testing.T) {
	must := mustConfig(t)
	ca := tlstest.NewCA(t)
	first, second, third := ca.Server(t), ca.Server(t), ca.Server(t)
	dir := t.TempDir()
	certFile, keyFile := filepath.Join(dir, "tls.crt"), filepath.Join(dir, "tls.key")
	copyFile(t, first.CertFile, certFile)
	copyFile(t, first.KeyFile, keyFile)
	clock := &fakeClock{t: time.Date(2026, 3, 1, 12, 0, 0, 0, time.UTC)}
	cfg, err := serverConfig(certFile, keyFile, "", clock.Now)
	if err != nil {
		t.Fatal(err)
	}
	steps := []struct {
		name    string
		change  func()
		advance time.Duration
		want    *x509.Certificate
	}{
		{"initial pair", nil, 0, first.Cert},
		{"replaced files are not read again within the interval", func() {
			copyFile(t, second.CertFile, certFile)
			copyFile(t, second.KeyFile, keyFile)
		}, 5 * time.Second, first.Cert},
		{"replaced files are served after the interval", nil, 6 * time.Second, second.Cert},
		{"half-written pair keeps the current certificate", func() { copyFile(t, third.CertFile, certFile) }, 11 * time.Second, second.Cert},
		{"completed pair is picked up at the next look", func() { copyFile(t, third.KeyFile, keyFile) }, 11 * time.Second, third.Cert},
		{"vanished files keep the current certificate", func() { os.Remove(certFile) }, 11 * time.Second, third.Cert},
	}
	for _, s := range steps {
		t.Run(s.name, func(t *testing.T) {
			if s.change != nil {
				s.change()
			}
			clock.Advance(s.advance)
			c, err := cfg.GetCertificate(&tls.ClientHelloInfo{})
			if err != nil {
				t.Fatal(err)
			}
			if c.Leaf == nil || c.Leaf.SerialNumber.Cmp(s.want.SerialNumber) != 0 {
				t.Errorf("served serial %v, want %v", c.Leaf.SerialNumber, s.want.SerialNumber)
			}
		})
	}
	// The reloaded certificate also works in a real handshake.
	if got, err := get(serve(t, cfg), must(ClientConfig(ca.CertFile, "", ""))); err != nil || got != "- TLS 1.3" {
		t.Fatalf("handshake after reload: %q, %v", got, err)
	}
}

func TestClientCertificateSentWhateverCAsTheServerNames(t *testing.T) {
	must := mustConfig(t)
	ca := tlstest.NewCA(t)
	client := ca.Client(t, "deadspace-worker")
	cfg := must(ClientConfig("", client.CertFile, client.KeyFile))
	c, err := cfg.GetClientCertificate(&tls.CertificateRequestInfo{AcceptableCAs: [][]byte{[]byte("some other CA")}})
	if err != nil || c == nil || c.Leaf == nil || c.Leaf.Subject.CommonName != "deadspace-worker" {
		t.Fatalf("got %v, %v; want the configured client certificate", c, err)
	}
}

func FuzzParsePool(f *testing.F) {
	ca := tlstest.NewCA(f)
	b, err := os.ReadFile(ca.CertFile)
	if err != nil {
		f.Fatal(err)
	}
	f.Add(b)
	f.Add([]byte("-----BEGIN CERTIFICATE-----\nAAAA\n-----END CERTIFICATE-----\n"))
	f.Add([]byte{})
	f.Fuzz(func(t *testing.T, data []byte) {
		pool, err := parsePool(data)
		if (err == nil) != (pool != nil) {
			t.Fatalf("pool %v with err %v", pool, err)
		}
	})
}

// TestGRPCClient checks the one rule of the commands that call serve's
// gRPC API: no file is plaintext; a CA bundle is TLS; a client certificate
// needs its key and the CA bundle, never silently dropped for plaintext;
// every file is read at once, and every problem named by its flag.
func TestGRPCClient(t *testing.T) {
	ca := tlstest.NewCA(t)
	client := ca.Client(t, "early-warning-score")
	missing := filepath.Join(t.TempDir(), "missing.pem")
	flags := ClientFlags{CA: "--ca", Cert: "--cert", Key: "--key"}
	cases := []struct {
		name          string
		ca, cert, key string
		protocol      string   // when accepted
		wantErr       []string // when refused
	}{
		{"no files: plaintext", "", "", "", "insecure", nil},
		{"a CA bundle: TLS", ca.CertFile, "", "", "tls", nil},
		{"a CA bundle and a client certificate: mutual TLS", ca.CertFile, client.CertFile, client.KeyFile, "tls", nil},
		{"a client certificate without the CA bundle", "", client.CertFile, client.KeyFile, "", []string{"--cert and --key need --ca"}},
		{"a certificate alone", "", client.CertFile, "", "", []string{"--cert and --key go together", "--cert and --key need --ca"}},
		{"a key without its certificate", ca.CertFile, "", client.KeyFile, "", []string{"--cert and --key go together"}},
		{"a missing CA bundle", missing, "", "", "", []string{"--ca: reading CA file"}},
		{"a CA bundle without certificates", client.KeyFile, "", "", "", []string{"--ca: CA file " + client.KeyFile + ": no PEM certificates found"}},
		{"a missing certificate", ca.CertFile, missing, client.KeyFile, "", []string{"--cert and --key: reading certificate"}},
		{"a missing key", ca.CertFile, client.CertFile, missing, "", []string{"--cert and --key: reading key"}},
		{"a certificate with another's key", ca.CertFile, client.CertFile, ca.Client(t, "other").KeyFile, "", []string{"--cert and --key: key pair"}},
		{"everything wrong at once", missing, missing, "", "", []string{"--cert and --key go together", "--cert: stat " + missing, "--ca: reading CA file"}},
	}
	for _, tc := range cases {
		t.Run(tc.name, func(t *testing.T) {
			creds, err := GRPCClient(flags, tc.ca, tc.cert, tc.key)
			if len(tc.wantErr) == 0 {
				if err != nil {
					t.Fatal(err)
				}
				if got := creds.Info().SecurityProtocol; got != tc.protocol {
					t.Errorf("security protocol %q, want %q", got, tc.protocol)
				}
				return
			}
			if err == nil {
				t.Fatalf("accepted, as %s", creds.Info().SecurityProtocol)
			}
			for _, w := range tc.wantErr {
				if !strings.Contains(err.Error(), w) {
					t.Errorf("error %q lacks %q", err, w)
				}
			}
			if n := strings.Count(err.Error(), "\n") + 1; n != len(tc.wantErr) {
				t.Errorf("%d problems, want %d: %q", n, len(tc.wantErr), err)
			}
		})
	}
}
