// Package tlsconf builds the service's TLS configurations from PEM files: the listener's
// (optionally demanding client certificates, i.e. mutual TLS), the outbound client's, for
// the FHIR server and the token endpoint, and the credentials of the commands that call
// serve's gRPC API ([GRPCClient]).
//
// Errors name the files and what went wrong with them, not this package: callers put the
// flag's name in front.
//
// Both refuse anything older than TLS 1.2, which RFC 8996 (Moriarty and Farrell, 2021)
// deprecates TLS 1.0 and 1.1 in favour of; cipher suites are Go's defaults.
//
// # Certificate rotation
//
// The service's own certificate and key are re-read at most every ten seconds, when a handshake
// needs them, and swapped in when either file changed and the new pair loads. A pair that fails
// to load (say the certificate was replaced but the key not yet) is logged and the previous pair
// stays in use. This suits certificates renewed in place, as cert-manager does with Kubernetes
// secrets. CA files are read once, at start.
package tlsconf

import (
	"bytes"
	"crypto/tls"
	"crypto/x509"
	"errors"
	"fmt"
	"log/slog"
	"os"
	"sync"
	"time"

	"google.golang.org/grpc/credentials"
	"google.golang.org/grpc/credentials/insecure"
)

// reloadInterval bounds how often a handshake may re-read the key pair files: often enough that a
// renewed certificate is served within seconds, rarely enough that a burst of handshakes does not
// become a burst of file reads.
const reloadInterval = 10 * time.Second

// ServerConfig returns a listener configuration serving certFile/keyFile. With clientCAFile
// set, every client must present a certificate that chains to one of its CAs
// (tls.RequireAndVerifyClientCert).
func ServerConfig(certFile, keyFile, clientCAFile string) (*tls.Config, error) {
	return serverConfig(certFile, keyFile, clientCAFile, time.Now)
}

// RequireClientCerts returns a copy of the listener configuration cfg (from ServerConfig,
// serving the same certificate and reloading it as cfg does) on which every client must
// present a certificate that chains to one of the CAs in pool (tls.RequireAndVerifyClientCert).
func RequireClientCerts(cfg *tls.Config, pool *x509.CertPool) *tls.Config {
	c := cfg.Clone()
	c.ClientCAs = pool
	c.ClientAuth = tls.RequireAndVerifyClientCert
	return c
}

func serverConfig(certFile, keyFile, clientCAFile string, now func() time.Time) (*tls.Config, error) {
	if certFile == "" || keyFile == "" {
		return nil, errors.New("a certificate file and a key file are both required")
	}
	kp, err := newKeyPair(certFile, keyFile, now)
	if err != nil {
		return nil, err
	}
	cfg := &tls.Config{
		MinVersion: tls.VersionTLS12,
		GetCertificate: func(*tls.ClientHelloInfo) (*tls.Certificate, error) {
			return kp.get(), nil
		},
	}
	if clientCAFile != "" {
		pool, err := LoadPool(clientCAFile)
		if err != nil {
			return nil, err
		}
		cfg = RequireClientCerts(cfg, pool)
	}
	return cfg, nil
}

// ClientConfig returns an outbound configuration. caFile, if set, replaces the system roots
// (for a FHIR server behind a private CA); certFile and keyFile, if set, are the client
// certificate presented to servers that ask for one. Either both or neither must be given.
func ClientConfig(caFile, certFile, keyFile string) (*tls.Config, error) {
	return clientConfig(caFile, certFile, keyFile, time.Now)
}

func clientConfig(caFile, certFile, keyFile string, now func() time.Time) (*tls.Config, error) {
	cfg := &tls.Config{MinVersion: tls.VersionTLS12}
	if caFile != "" {
		pool, err := LoadPool(caFile)
		if err != nil {
			return nil, err
		}
		cfg.RootCAs = pool
	}
	switch {
	case certFile == "" && keyFile == "":
	case certFile == "" || keyFile == "":
		return nil, errors.New("a client certificate needs both a certificate file and a key file")
	default:
		if err := presentClientCert(cfg, certFile, keyFile, now); err != nil {
			return nil, err
		}
	}
	return cfg, nil
}

// presentClientCert makes cfg present the certificate in certFile and keyFile, reloaded as
// the listener's is.
func presentClientCert(cfg *tls.Config, certFile, keyFile string, now func() time.Time) error {
	kp, err := newKeyPair(certFile, keyFile, now)
	if err != nil {
		return err
	}
	// Sent whatever CAs the server lists: a server that asks and gets nothing fails the
	// handshake with a less helpful error than one that gets the wrong certificate.
	cfg.GetClientCertificate = func(*tls.CertificateRequestInfo) (*tls.Certificate, error) {
		return kp.get(), nil
	}
	return nil
}

// ClientFlags are the names a command gives the flags of [GRPCClient]'s three files, as
// its messages should show them ("--grpc-ca" and so on).
type ClientFlags struct{ CA, Cert, Key string }

// GRPCClient returns the transport credentials of a command that calls serve's gRPC API,
// from the files its flags name: plaintext when none is given (a service on a loopback
// address); otherwise TLS, verifying the service against the CA bundle caFile only, and
// presenting certFile and keyFile when given (for a service with --grpc-client-ca).
//
// A certificate without its key, or either without the CA bundle, is refused rather than
// dropped for a plaintext connection; every file is read here, so a missing or unreadable one is a
// configuration error before anything connects. Every problem is reported at once, each
// naming its flag.
func GRPCClient(flags ClientFlags, caFile, certFile, keyFile string) (credentials.TransportCredentials, error) {
	if caFile == "" && certFile == "" && keyFile == "" {
		return insecure.NewCredentials(), nil
	}
	var errs []error
	if (certFile == "") != (keyFile == "") {
		errs = append(errs, fmt.Errorf("%s and %s go together", flags.Cert, flags.Key))
		// The one given is still checked, so a mistyped path shows now.
		for _, f := range [][2]string{{flags.Cert, certFile}, {flags.Key, keyFile}} {
			if f[1] != "" {
				if _, err := os.Stat(f[1]); err != nil {
					errs = append(errs, fmt.Errorf("%s: %w", f[0], err))
				}
			}
		}
	}
	if caFile == "" {
		errs = append(errs, fmt.Errorf("%s and %s need %s, the CA bundle that signed the service's certificate: a client certificate is only sent over TLS", flags.Cert, flags.Key, flags.CA))
	}
	cfg := &tls.Config{MinVersion: tls.VersionTLS12}
	if caFile != "" {
		pool, err := LoadPool(caFile)
		if err != nil {
			errs = append(errs, fmt.Errorf("%s: %w", flags.CA, err))
		}
		cfg.RootCAs = pool
	}
	if certFile != "" && keyFile != "" {
		if err := presentClientCert(cfg, certFile, keyFile, time.Now); err != nil {
			errs = append(errs, fmt.Errorf("%s and %s: %w", flags.Cert, flags.Key, err))
		}
	}
	if err := errors.Join(errs...); err != nil {
		return nil, err
	}
	return credentials.NewTLS(cfg), nil
}

// LoadPool reads a PEM CA bundle; a file without a certificate is an error.
func LoadPool(path string) (*x509.CertPool, error) {
	data, err := os.ReadFile(path)
	if err != nil {
		return nil, fmt.Errorf("reading CA file: %w", err)
	}
	pool, err := parsePool(data)
	if err != nil {
		return nil, fmt.Errorf("CA file %s: %w", path, err)
	}
	return pool, nil
}

func parsePool(data []byte) (*x509.CertPool, error) {
	pool := x509.NewCertPool()
	if !pool.AppendCertsFromPEM(data) {
		return nil, errors.New("no PEM certificates found")
	}
	return pool, nil
}

// keyPair is a certificate and key loaded from files and re-read when they change.
type keyPair struct {
	certFile, keyFile string
	now               func() time.Time

	mu        sync.Mutex
	cert      *tls.Certificate
	certPEM   []byte
	keyPEM    []byte
	checkedAt time.Time
}

func newKeyPair(certFile, keyFile string, now func() time.Time) (*keyPair, error) {
	kp := &keyPair{certFile: certFile, keyFile: keyFile, now: now}
	certPEM, keyPEM, err := kp.read()
	if err != nil {
		return nil, err
	}
	cert, err := tls.X509KeyPair(certPEM, keyPEM)
	if err != nil {
		return nil, fmt.Errorf("key pair %s, %s: %w", certFile, keyFile, err)
	}
	kp.cert, kp.certPEM, kp.keyPEM, kp.checkedAt = &cert, certPEM, keyPEM, now()
	return kp, nil
}

func (kp *keyPair) read() (certPEM, keyPEM []byte, err error) {
	if certPEM, err = os.ReadFile(kp.certFile); err != nil {
		return nil, nil, fmt.Errorf("reading certificate: %w", err)
	}
	if keyPEM, err = os.ReadFile(kp.keyFile); err != nil {
		return nil, nil, fmt.Errorf("reading key: %w", err)
	}
	return certPEM, keyPEM, nil
}

// get returns the current pair, re-reading the files first if the last look was more than
// reloadInterval ago. Contents are compared rather than modification times, which some file
// systems keep to the second and which a symlink swap need not change.
func (kp *keyPair) get() *tls.Certificate {
	kp.mu.Lock()
	defer kp.mu.Unlock()
	now := kp.now()
	if now.Sub(kp.checkedAt) < reloadInterval {
		return kp.cert
	}
	kp.checkedAt = now
	certPEM, keyPEM, err := kp.read()
	if err != nil {
		slog.Warn("tls key pair reload failed; keeping the current certificate", "cert_file", kp.certFile, "err", err)
		return kp.cert
	}
	if bytes.Equal(certPEM, kp.certPEM) && bytes.Equal(keyPEM, kp.keyPEM) {
		return kp.cert
	}
	cert, err := tls.X509KeyPair(certPEM, keyPEM)
	if err != nil {
		// Not remembered as loaded, so the next look tries again: the other half of the pair
		// may simply not have been written yet.
		slog.Warn("tls key pair reload failed; keeping the current certificate", "cert_file", kp.certFile, "err", err)
		return kp.cert
	}
	kp.cert, kp.certPEM, kp.keyPEM = &cert, certPEM, keyPEM
	if cert.Leaf != nil {
		slog.Info("tls key pair reloaded", "cert_file", kp.certFile, "not_after", cert.Leaf.NotAfter)
	}
	return kp.cert
}
