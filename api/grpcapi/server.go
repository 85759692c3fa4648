// Package grpcapi serves the deadspace.v1 gRPC API (proto/deadspace/v1)
// over the live engine: Compute (derive without storing), Submit, Explain,
// ListDerivations and WatchDerivations, plus the standard health service
// and server reflection.
//
// The caller owns transport security: [Server.Serve] and
// [Server.NewGRPCServer] take the credentials to use, so TLS (or mutual
// TLS) is a matter of passing credentials.NewTLS. Every call gets a request
// id (the client's "x-request-id" when it sends a sane one), returned in the
// response header and attached to every log line of the call; a panic in a
// handler becomes INTERNAL for that call only. Logs never carry patient
// identifiers: requests and responses are not logged, and error details are
// redacted before they are (see [Server.status]).
package grpcapi

import (
	"context"
	"errors"
	"fmt"
	"log/slog"
	"net"
	"sync"
	"time"

	"google.golang.org/grpc"
	"google.golang.org/grpc/credentials"
	"google.golang.org/grpc/credentials/insecure"
	"google.golang.org/grpc/health"
	healthpb "google.golang.org/grpc/health/grpc_health_v1"
	"google.golang.org/grpc/keepalive"
	"google.golang.org/grpc/reflection"

	"github.com/deadspace-fhir/deadspace/api/deadletters"
	"github.com/deadspace-fhir/deadspace/api/engine"
	pb "github.com/deadspace-fhir/deadspace/proto/deadspace/v1"
)

// Defaults for [Config].
const (
	// DefaultMaxMessageBytes admits a submission of some 10 000
	// Observations (about 6 MB as NDJSON) in one call, which gRPC's own
	// 4 MiB default would refuse.
	DefaultMaxMessageBytes = 64 << 20
	DefaultWatchPoll       = 200 * time.Millisecond
	DefaultShutdownGrace   = 10 * time.Second
)

// Config configures a [Server].
type Config struct {
	Engine *engine.Engine
	Logger *slog.Logger
	// MaxMessageBytes bounds one request message.
	MaxMessageBytes int
	// WatchPoll is how often a watch stream looks for new feed events.
	WatchPoll time.Duration
	// ShutdownGrace is how long [Server.Serve] waits for calls in flight
	// once its context ends.
	ShutdownGrace time.Duration
	// Watchers, when set, is told +1 when a watch stream starts and -1 when
	// it ends, for the watch-subscribers gauge.
	Watchers func(delta int)
	// DeadLetters, when set, serves the dead-letter calls; without it they
	// answer UNIMPLEMENTED.
	DeadLetters deadletters.Source
}

// Server implements the API. Create it with [New].
type Server struct {
	pb.UnimplementedDeadSpaceServer

	eng    *engine.Engine
	log    *slog.Logger
	cfg    Config
	health *health.Server

	stopOnce sync.Once
	stopping chan struct{} // closed when shutting down: watch streams end
}

// New returns a Server. It panics without an engine, a programming error.
func New(cfg Config) *Server {
	if cfg.Engine == nil {
		panic("grpcapi.New: an engine is required")
	}
	if cfg.Logger == nil {
		cfg.Logger = slog.New(slog.DiscardHandler)
	}
	if cfg.MaxMessageBytes <= 0 {
		cfg.MaxMessageBytes = DefaultMaxMessageBytes
	}
	if cfg.WatchPoll <= 0 {
		cfg.WatchPoll = DefaultWatchPoll
	}
	if cfg.ShutdownGrace <= 0 {
		cfg.ShutdownGrace = DefaultShutdownGrace
	}
	hs := health.NewServer()
	hs.SetServingStatus(pb.DeadSpace_ServiceDesc.ServiceName, healthpb.HealthCheckResponse_SERVING)
	return &Server{eng: cfg.Engine, log: cfg.Logger, cfg: cfg, health: hs, stopping: make(chan struct{})}
}

// Register registers the API, the health service and reflection on g.
// Use it with a grpc.Server built with [Server.ServerOptions], or use
// [Server.NewGRPCServer].
func (s *Server) Register(g *grpc.Server) {
	pb.RegisterDeadSpaceServer(g, s)
	healthpb.RegisterHealthServer(g, s.health)
	reflection.Register(g)
}

// ServerOptions returns the options the API needs: the request id and
// panic recovery interceptors, the message size bound and keepalives
// that keep idle watch streams alive through proxies.
func (s *Server) ServerOptions() []grpc.ServerOption {
	return []grpc.ServerOption{
		grpc.ChainUnaryInterceptor(s.unaryRequestID, s.unaryRecover),
		grpc.ChainStreamInterceptor(s.streamRequestID, s.streamRecover),
		grpc.MaxRecvMsgSize(s.cfg.MaxMessageBytes),
		grpc.KeepaliveParams(keepalive.ServerParameters{Time: 2 * time.Minute, Timeout: 20 * time.Second}),
		grpc.KeepaliveEnforcementPolicy(keepalive.EnforcementPolicy{MinTime: 20 * time.Second, PermitWithoutStream: true}),
	}
}

// NewGRPCServer returns a grpc.Server with everything registered. creds
// nil serves plaintext, for a loopback listener or a mesh that terminates
// TLS in front of the service.
func (s *Server) NewGRPCServer(creds credentials.TransportCredentials, extra ...grpc.ServerOption) *grpc.Server {
	if creds == nil {
		creds = insecure.NewCredentials()
	}
	opts := append(s.ServerOptions(), grpc.Creds(creds))
	g := grpc.NewServer(append(opts, extra...)...)
	s.Register(g)
	return g
}

// SetServing sets what gRPC health answers, for the whole server ("")
// and for the DeadSpace service: serve keeps it in step with /readyz.
// After [Server.Shutdown] it changes nothing (health stays NOT_SERVING).
func (s *Server) SetServing(ok bool) {
	st := healthpb.HealthCheckResponse_NOT_SERVING
	if ok {
		st = healthpb.HealthCheckResponse_SERVING
	}
	s.health.SetServingStatus("", st)
	s.health.SetServingStatus(pb.DeadSpace_ServiceDesc.ServiceName, st)
}

// Shutdown marks the service NOT_SERVING and ends the watch streams, so
// clients move to another replica and resume there with their tokens.
func (s *Server) Shutdown() {
	s.stopOnce.Do(func() {
		s.health.Shutdown()
		close(s.stopping)
	})
}

// Serve serves on lis until ctx ends, then shuts down: NOT_SERVING, watch
// streams ended, calls in flight given ShutdownGrace to finish. It returns
// nil after a shutdown and the error when serving failed.
func (s *Server) Serve(ctx context.Context, lis net.Listener, creds credentials.TransportCredentials) error {
	g := s.NewGRPCServer(creds)
	errc := make(chan error, 1)
	go func() { errc <- g.Serve(lis) }()
	select {
	case err := <-errc:
		return fmt.Errorf("grpcapi: serve: %w", err)
	case <-ctx.Done():
	}
	s.Shutdown()
	done := make(chan struct{})
	go func() {
		g.GracefulStop()
		close(done)
	}()
	t := time.NewTimer(s.cfg.ShutdownGrace)
	defer t.Stop()
	select {
	case <-done:
	case <-t.C:
		s.log.Warn("gRPC calls still running after the shutdown grace; stopping them")
		g.Stop()
		<-done
	}
	if err := <-errc; err != nil && !errors.Is(err, grpc.ErrServerStopped) {
		return fmt.Errorf("grpcapi: serve: %w", err)
	}
	return nil
}

// ListenAndServe binds addr ("127.0.0.1:9090", ":9090") and serves as
// [Server.Serve] does. A bind error is returned at once.
func (s *Server) ListenAndServe(ctx context.Context, addr string, creds credentials.TransportCredentials) error {
	lis, err := net.Listen("tcp", addr)
	if err != nil {
		return fmt.Errorf("grpcapi: listen: %w", err)
	}
	return s.Serve(ctx, lis, creds)
}
