package serve_test

import (
	"context"
	"net/http"
	"testing"
	"time"

	"google.golang.org/grpc"
	"google.golang.org/grpc/credentials/insecure"
	healthpb "google.golang.org/grpc/health/grpc_health_v1"

	"github.com/deadspace-fhir/deadspace/api/serve"
	"github.com/deadspace-fhir/deadspace/fhir/fhirtest/fakefhir"
)

// The FHIR server's health is tracked once (from every request the client
// makes) and /readyz, gRPC health and deadspace_fhir_server_up all say the
// same about it, as the server fails and recovers.
func TestFHIRServerHealthIsOneView(t *testing.T) {
	f := fakefhir.New()
	t.Cleanup(f.Close)
	s := startOnFake(t, f, func(c *serve.Config) { c.ReadyGrace = 0 })
	conn, err := grpc.NewClient(s.svc.GRPCAddr(), grpc.WithTransportCredentials(insecure.NewCredentials()))
	if err != nil {
		t.Fatal(err)
	}
	t.Cleanup(func() { conn.Close() })
	grpcHealth := func() healthpb.HealthCheckResponse_ServingStatus {
		ctx, cancel := context.WithTimeout(context.Background(), 10*time.Second)
		defer cancel()
		r, err := healthpb.NewHealthClient(conn).Check(ctx, &healthpb.HealthCheckRequest{})
		if err != nil {
			t.Fatalf("gRPC health: %v", err)
		}
		return r.Status
	}
	agree := func(ready bool) {
		t.Helper()
		wantGRPC, wantHTTP, wantUp := healthpb.HealthCheckResponse_SERVING, http.StatusOK, "1"
		if !ready {
			wantGRPC, wantHTTP, wantUp = healthpb.HealthCheckResponse_NOT_SERVING, http.StatusServiceUnavailable, "0"
		}
		// gRPC health follows readiness on its own (without a /readyz
		// request), so it is waited for first.
		waitFor(t, "gRPC health "+wantGRPC.String(), func() bool { return grpcHealth() == wantGRPC })
		if got := readyz(t, s.url, nil); got != wantHTTP {
			t.Errorf("/readyz = %d, want %d", got, wantHTTP)
		}
		if got := metricValue(t, s, "deadspace_fhir_server_up"); got != wantUp {
			t.Errorf("deadspace_fhir_server_up = %s, want %s", got, wantUp)
		}
	}
	if !s.svc.FHIRServerAnswered() {
		t.Fatal("the server answered the start-up catch-up, but the service has not seen it")
	}
	agree(true)

	f.Fail("", "*", http.StatusServiceUnavailable, "", 0)
	post(t, s.url, http.MethodPost, "/notify", nil, secret) // makes the service search the server
	agree(false)

	f.ClearFaults()
	post(t, s.url, http.MethodPost, "/notify", nil, secret)
	agree(true)
}
