package grpcapi_test

import (
	"context"
	"crypto/ecdsa"
	"crypto/elliptic"
	"crypto/rand"
	"crypto/tls"
	"crypto/x509"
	"crypto/x509/pkix"
	"errors"
	"io"
	"math/big"
	"net"
	"testing"
	"time"

	"google.golang.org/grpc"
	"google.golang.org/grpc/codes"
	"google.golang.org/grpc/credentials"
	healthpb "google.golang.org/grpc/health/grpc_health_v1"
	"google.golang.org/grpc/status"

	"github.com/deadspace-fhir/deadspace/api/grpcapi"
	pb "github.com/deadspace-fhir/deadspace/proto/deadspace/v1"
)

// selfSigned makes an ECDSA P-256 certificate for 127.0.0.1, valid for an
// hour, and returns it with a pool that trusts it.
func selfSigned(t *testing.T) (tls.Certificate, *x509.CertPool) {
	t.Helper()
	key, err := ecdsa.GenerateKey(elliptic.P256(), rand.Reader)
	if err != nil {
		t.Fatal(err)
	}
	tmpl := &x509.Certificate{
		SerialNumber: big.NewInt(1),
		Subject:      pkix.Name{CommonName: "deadspace test"},
		NotBefore:    time.Now().Add(-time.Minute),
		NotAfter:     time.Now().Add(time.Hour),
		KeyUsage:     x509.KeyUsageDigitalSignature | x509.KeyUsageCertSign,
		ExtKeyUsage:  []x509.ExtKeyUsage{x509.ExtKeyUsageServerAuth},
		IPAddresses:  []net.IP{net.IPv4(127, 0, 0, 1)},
		IsCA:         true, BasicConstraintsValid: true,
	}
	der, err := x509.CreateCertificate(rand.Reader, tmpl, tmpl, &key.PublicKey, key)
	if err != nil {
		t.Fatal(err)
	}
	cert, err := x509.ParseCertificate(der)
	if err != nil {
		t.Fatal(err)
	}
	pool := x509.NewCertPool()
	pool.AddCert(cert)
	return tls.Certificate{Certificate: [][]byte{der}, PrivateKey: key, Leaf: cert}, pool
}

func TestServeTLS(t *testing.T) {
	cert, pool := selfSigned(t)
	lis, err := net.Listen("tcp", "127.0.0.1:0")
	if err != nil {
		t.Fatal(err)
	}
	srv := grpcapi.New(grpcapi.Config{Engine: newEngine(t)})
	ctx, stop := context.WithCancel(t.Context())
	done := make(chan error, 1)
	go func() {
		done <- srv.Serve(ctx, lis, credentials.NewTLS(&tls.Config{Certificates: []tls.Certificate{cert}, MinVersion: tls.VersionTLS12}))
	}()
	addr := lis.Addr().String()

	connect := func(t *testing.T, cfg *tls.Config) *grpc.ClientConn {
		t.Helper()
		conn, err := grpc.NewClient(addr, grpc.WithTransportCredentials(credentials.NewTLS(cfg)))
		if err != nil {
			t.Fatal(err)
		}
		t.Cleanup(func() { _ = conn.Close() })
		return conn
	}
	t.Run("verified client", func(t *testing.T) {
		conn := connect(t, &tls.Config{RootCAs: pool, MinVersion: tls.VersionTLS12})
		resp, err := healthpb.NewHealthClient(conn).Check(t.Context(), &healthpb.HealthCheckRequest{})
		if err != nil || resp.Status != healthpb.HealthCheckResponse_SERVING {
			t.Fatalf("health = %v, %v", resp, err)
		}
		// An empty Compute is refused by the service itself, which shows
		// the call went through TLS to the handler.
		_, err = pb.NewDeadSpaceClient(conn).Compute(t.Context(), &pb.ComputeRequest{})
		if status.Code(err) != codes.InvalidArgument {
			t.Errorf("compute = %v, want InvalidArgument from the handler", err)
		}
	})
	t.Run("client that does not trust the certificate", func(t *testing.T) {
		conn := connect(t, &tls.Config{RootCAs: x509.NewCertPool(), MinVersion: tls.VersionTLS12})
		_, err := healthpb.NewHealthClient(conn).Check(t.Context(), &healthpb.HealthCheckRequest{})
		if status.Code(err) != codes.Unavailable {
			t.Errorf("got %v, want Unavailable (certificate not verified)", err)
		}
	})
	t.Run("shutdown ends watch streams", func(t *testing.T) {
		conn := connect(t, &tls.Config{RootCAs: pool, MinVersion: tls.VersionTLS12})
		stream, err := pb.NewDeadSpaceClient(conn).WatchDerivations(t.Context(), &pb.WatchDerivationsRequest{})
		if err != nil {
			t.Fatal(err)
		}
		if _, err := stream.Recv(); err != nil {
			t.Fatal(err)
		}
		stop()
		// The stream ends cleanly (the client resumes elsewhere with its
		// token) rather than holding the graceful stop open.
		if _, err := stream.Recv(); !errors.Is(err, io.EOF) {
			t.Errorf("after shutdown: %v, want the end of the stream", err)
		}
		if err := <-done; err != nil {
			t.Errorf("Serve after shutdown: %v", err)
		}
	})
}
