package tlstest_test

import (
	"crypto/x509"
	"os"
	"os/exec"
	"strings"
	"testing"

	"github.com/deadspace-fhir/deadspace/api/tlsconf/tlstest"
	"github.com/deadspace-fhir/deadspace/fhir/fhirtest"
)

// TestOpenSSLVerifies has OpenSSL, an implementation independent of Go's crypto/x509, check
// the chains and purposes (RFC 5280 §4.2.1.12 extended key usage): each certificate verifies
// against its CA for its own purpose, and not for the other one or against another CA.
func TestOpenSSLVerifies(t *testing.T) {
	openssl, err := exec.LookPath("openssl")
	if err != nil {
		fhirtest.Missing(t, "openssl not on PATH (Debian package openssl)")
	}
	ca, other := tlstest.NewCA(t), tlstest.NewCA(t)
	server := ca.Server(t, "127.0.0.1", "fhir.test")
	client := ca.Client(t, "deadspace-worker")
	cases := []struct {
		name    string
		args    []string
		wantOK  bool
		wantOut string
	}{
		{"server certificate for sslserver and 127.0.0.1", []string{"-CAfile", ca.CertFile, "-purpose", "sslserver", "-verify_ip", "127.0.0.1", server.CertFile}, true, ": OK"},
		{"server certificate for its DNS name", []string{"-CAfile", ca.CertFile, "-purpose", "sslserver", "-verify_hostname", "fhir.test", server.CertFile}, true, ": OK"},
		{"server certificate not for another IP", []string{"-CAfile", ca.CertFile, "-verify_ip", "127.0.0.2", server.CertFile}, false, ""},
		{"client certificate for sslclient", []string{"-CAfile", ca.CertFile, "-purpose", "sslclient", client.CertFile}, true, ": OK"},
		{"client certificate not for sslserver", []string{"-CAfile", ca.CertFile, "-purpose", "sslserver", client.CertFile}, false, ""},
		{"server certificate not for sslclient", []string{"-CAfile", ca.CertFile, "-purpose", "sslclient", server.CertFile}, false, ""},
		{"not against another CA", []string{"-CAfile", other.CertFile, client.CertFile}, false, ""},
	}
	for _, tc := range cases {
		t.Run(tc.name, func(t *testing.T) {
			out, err := exec.Command(openssl, append([]string{"verify"}, tc.args...)...).CombinedOutput()
			if (err == nil) != tc.wantOK || !strings.Contains(string(out), tc.wantOut) {
				t.Errorf("openssl verify: err %v, output %s; want ok=%v", err, out, tc.wantOK)
			}
		})
	}
	// The key file is PKCS#8 that OpenSSL reads and that matches the certificate.
	pub, err := exec.Command(openssl, "pkey", "-in", client.KeyFile, "-pubout").Output()
	if err != nil {
		t.Fatalf("openssl pkey: %v", err)
	}
	certPub, err := exec.Command(openssl, "x509", "-in", client.CertFile, "-noout", "-pubkey").Output()
	if err != nil {
		t.Fatalf("openssl x509: %v", err)
	}
	if string(pub) != string(certPub) {
		t.Errorf("key file's public key differs from the certificate's:\n%s\n%s", pub, certPub)
	}
}

func TestFiles(t *testing.T) {
	ca := tlstest.NewCA(t)
	server := ca.Server(t)
	client := ca.Client(t, "c")
	cases := []struct {
		name string
		kp   tlstest.KeyPair
		ip   string
		eku  x509.ExtKeyUsage
	}{
		{"server", server, "127.0.0.1", x509.ExtKeyUsageServerAuth},
		{"client", client, "", x509.ExtKeyUsageClientAuth},
	}
	for _, tc := range cases {
		t.Run(tc.name, func(t *testing.T) {
			fi, err := os.Stat(tc.kp.KeyFile)
			if err != nil {
				t.Fatal(err)
			}
			// Common practice: private keys readable by the owner only.
			if fi.Mode().Perm() != 0o600 {
				t.Errorf("key file mode %v, want 0600", fi.Mode().Perm())
			}
			opts := x509.VerifyOptions{Roots: ca.Pool(), DNSName: tc.ip, KeyUsages: []x509.ExtKeyUsage{tc.eku}}
			if _, err := tc.kp.Cert.Verify(opts); err != nil {
				t.Errorf("verify: %v", err)
			}
		})
	}
}
