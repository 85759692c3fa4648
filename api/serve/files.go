package serve

import (
	"crypto"
	"crypto/tls"
	"crypto/x509"
	"errors"
	"fmt"
	"os"
	"path/filepath"

	"github.com/deadspace-fhir/deadspace/api/tlsconf"
	"github.com/deadspace-fhir/deadspace/fhir/client"
)

// The settings that name files are read by these loaders twice: by
// Validate, so that a missing or unreadable file is reported with every
// other problem (exit status 2) before anything is created, and by New,
// which uses what they return. (The secret files are read by Validate
// alone, into the Config.)

// serverTLS loads --tls-cert and --tls-key, and --grpc-client-ca: the
// configuration of the HTTP listeners and the pages (nil without TLS), and
// that of gRPC, which with --grpc-client-ca requires client certificates.
// It reports every problem, each naming its flag.
func (c *Config) serverTLS() (httpTLS, grpcTLS *tls.Config, errs []error) {
	var clientCAs *x509.CertPool
	if c.GRPCClientCA != "" {
		pool, err := tlsconf.LoadPool(c.GRPCClientCA)
		if err != nil {
			errs = append(errs, fmt.Errorf("--grpc-client-ca: %w", err))
		}
		clientCAs = pool
	}
	if c.TLSCert == "" || c.TLSKey == "" {
		// Validate reports one without the other, and the client CA
		// without them.
		return nil, nil, errs
	}
	httpTLS, err := tlsconf.ServerConfig(c.TLSCert, c.TLSKey, "")
	if err != nil {
		return nil, nil, append(errs, fmt.Errorf("--tls-cert and --tls-key: %w", err))
	}
	grpcTLS = httpTLS
	if clientCAs != nil {
		grpcTLS = tlsconf.RequireClientCerts(httpTLS, clientCAs)
	}
	return httpTLS, grpcTLS, errs
}

// fhirKey loads --fhir-private-key-file, the key that signs the SMART
// Backend Services assertion; nil when it is not set.
func (c *Config) fhirKey() (crypto.Signer, error) {
	if c.FHIRKeyFile == "" {
		return nil, nil
	}
	key, err := client.LoadPrivateKeyPEM(c.FHIRKeyFile)
	if err != nil {
		return nil, fmt.Errorf("--fhir-private-key-file: %w", err)
	}
	return key, nil
}

// oidcCAs loads --ui-oidc-ca, the CAs the pages trust for the OpenID
// Connect provider; nil (the system's) when it is not set.
func (u *UIConfig) oidcCAs() (*x509.CertPool, error) {
	if u.OIDCCA == "" {
		return nil, nil
	}
	pool, err := tlsconf.LoadPool(u.OIDCCA)
	if err != nil {
		return nil, fmt.Errorf("--ui-oidc-ca: %w", err)
	}
	return pool, nil
}

// accessLogPath is the pages' access log: --ui-access-log, or access.log
// in --data-dir.
func (c *Config) accessLogPath() string {
	if c.UI.AccessLog != "" {
		return c.UI.AccessLog
	}
	return filepath.Join(c.DataDir, "access.log")
}

// checkAccessLog checks, without creating anything, that the pages'
// access log can be opened where it is: it is not a directory, and its
// directory exists, unless that is the embedded store's --data-dir, which
// is created at start.
func (c *Config) checkAccessLog() error {
	path := c.accessLogPath()
	if fi, err := os.Stat(path); err == nil {
		if fi.IsDir() {
			return fmt.Errorf("--ui-access-log: %s is a directory", path)
		}
		return nil
	} else if !errors.Is(err, os.ErrNotExist) {
		return fmt.Errorf("--ui-access-log: %w", err)
	}
	dir := filepath.Dir(path)
	if c.Store == "" && filepath.Clean(dir) == filepath.Clean(c.DataDir) {
		return nil
	}
	fi, err := os.Stat(dir)
	if err != nil {
		return fmt.Errorf("--ui-access-log: the directory of %s: %w", path, err)
	}
	if !fi.IsDir() {
		return fmt.Errorf("--ui-access-log: %s is not a directory", dir)
	}
	return nil
}

// checkDataDir checks that --data-dir, when it exists, is a directory (it
// is created at start when it does not).
func (c *Config) checkDataDir() error {
	fi, err := os.Stat(c.DataDir)
	switch {
	case errors.Is(err, os.ErrNotExist):
		return nil
	case err != nil:
		return fmt.Errorf("--data-dir: %w", err)
	case !fi.IsDir():
		return fmt.Errorf("--data-dir: %s is not a directory", c.DataDir)
	}
	return nil
}
