// Package tlstest makes throwaway certificate authorities for tests: a CA, server certificates
// for 127.0.0.1 or named hosts, and client certificates, each written as PEM files into the
// test's temporary directory so code that loads certificates from paths can be tested as it
// runs in production.
//
// Keys are ECDSA P-256, which is quick to generate; certificates are valid from an hour ago to
// a day from now. Nothing here is fit for anything but tests.
package tlstest

import (
	"crypto/ecdsa"
	"crypto/elliptic"
	"crypto/rand"
	"crypto/x509"
	"crypto/x509/pkix"
	"encoding/pem"
	"math/big"
	"net"
	"os"
	"path/filepath"
	"testing"
	"time"
)

// CA is a test certificate authority.
type CA struct {
	// CertFile is the CA certificate as PEM, for a client's root or a server's client-CA file.
	CertFile string
	// Cert is the parsed CA certificate.
	Cert *x509.Certificate

	key *ecdsa.PrivateKey
}

// KeyPair is a certificate and its private key, as files and parsed.
type KeyPair struct {
	CertFile string
	// KeyFile holds the key as PKCS#8 ("PRIVATE KEY"), mode 0600.
	KeyFile string
	Cert    *x509.Certificate
}

// NewCA makes a CA whose certificate is written into t.TempDir().
func NewCA(t testing.TB) *CA {
	t.Helper()
	key := newKey(t)
	tmpl := &x509.Certificate{
		SerialNumber:          serial(t),
		Subject:               pkix.Name{CommonName: "deadspace test CA"},
		NotBefore:             time.Now().Add(-time.Hour),
		NotAfter:              time.Now().Add(24 * time.Hour),
		IsCA:                  true,
		BasicConstraintsValid: true,
		MaxPathLenZero:        true,
		KeyUsage:              x509.KeyUsageCertSign | x509.KeyUsageCRLSign,
	}
	der, err := x509.CreateCertificate(rand.Reader, tmpl, tmpl, &key.PublicKey, key)
	if err != nil {
		t.Fatalf("tlstest: creating CA certificate: %v", err)
	}
	cert, err := x509.ParseCertificate(der)
	if err != nil {
		t.Fatalf("tlstest: parsing CA certificate: %v", err)
	}
	dir := t.TempDir()
	path := filepath.Join(dir, "ca.pem")
	writePEM(t, path, "CERTIFICATE", der, 0o644)
	return &CA{CertFile: path, Cert: cert, key: key}
}

// Pool returns a pool holding only this CA.
func (ca *CA) Pool() *x509.CertPool {
	p := x509.NewCertPool()
	p.AddCert(ca.Cert)
	return p
}

// Server issues a server certificate for hosts (IP addresses or DNS names; 127.0.0.1 when
// none are given).
func (ca *CA) Server(t testing.TB, hosts ...string) KeyPair {
	t.Helper()
	if len(hosts) == 0 {
		hosts = []string{"127.0.0.1"}
	}
	tmpl := &x509.Certificate{
		Subject:     pkix.Name{CommonName: hosts[0]},
		KeyUsage:    x509.KeyUsageDigitalSignature,
		ExtKeyUsage: []x509.ExtKeyUsage{x509.ExtKeyUsageServerAuth},
	}
	for _, h := range hosts {
		if ip := net.ParseIP(h); ip != nil {
			tmpl.IPAddresses = append(tmpl.IPAddresses, ip)
		} else {
			tmpl.DNSNames = append(tmpl.DNSNames, h)
		}
	}
	return ca.issue(t, tmpl, "server")
}

// Client issues a client certificate whose subject common name is name.
func (ca *CA) Client(t testing.TB, name string) KeyPair {
	t.Helper()
	tmpl := &x509.Certificate{
		Subject:     pkix.Name{CommonName: name},
		KeyUsage:    x509.KeyUsageDigitalSignature,
		ExtKeyUsage: []x509.ExtKeyUsage{x509.ExtKeyUsageClientAuth},
	}
	return ca.issue(t, tmpl, "client")
}

func (ca *CA) issue(t testing.TB, tmpl *x509.Certificate, prefix string) KeyPair {
	t.Helper()
	key := newKey(t)
	tmpl.SerialNumber = serial(t)
	tmpl.NotBefore = time.Now().Add(-time.Hour)
	tmpl.NotAfter = time.Now().Add(24 * time.Hour)
	der, err := x509.CreateCertificate(rand.Reader, tmpl, ca.Cert, &key.PublicKey, ca.key)
	if err != nil {
		t.Fatalf("tlstest: creating %s certificate: %v", prefix, err)
	}
	cert, err := x509.ParseCertificate(der)
	if err != nil {
		t.Fatalf("tlstest: parsing %s certificate: %v", prefix, err)
	}
	keyDER, err := x509.MarshalPKCS8PrivateKey(key)
	if err != nil {
		t.Fatalf("tlstest: encoding %s key: %v", prefix, err)
	}
	dir := t.TempDir()
	kp := KeyPair{
		CertFile: filepath.Join(dir, prefix+".pem"),
		KeyFile:  filepath.Join(dir, prefix+"-key.pem"),
		Cert:     cert,
	}
	writePEM(t, kp.CertFile, "CERTIFICATE", der, 0o644)
	writePEM(t, kp.KeyFile, "PRIVATE KEY", keyDER, 0o600)
	return kp
}

func newKey(t testing.TB) *ecdsa.PrivateKey {
	t.Helper()
	k, err := ecdsa.GenerateKey(elliptic.P256(), rand.Reader)
	if err != nil {
		t.Fatalf("tlstest: generating key: %v", err)
	}
	return k
}

// serial is random because RFC 5280 §4.1.2.2 wants serials unique per issuer, and tests may
// issue many certificates from one CA.
func serial(t testing.TB) *big.Int {
	t.Helper()
	n, err := rand.Int(rand.Reader, new(big.Int).Lsh(big.NewInt(1), 127))
	if err != nil {
		t.Fatalf("tlstest: serial number: %v", err)
	}
	return n.Add(n, big.NewInt(1))
}

func writePEM(t testing.TB, path, typ string, der []byte, mode os.FileMode) {
	t.Helper()
	if err := os.WriteFile(path, pem.EncodeToMemory(&pem.Block{Type: typ, Bytes: der}), mode); err != nil {
		t.Fatalf("tlstest: writing %s: %v", path, err)
	}
}
