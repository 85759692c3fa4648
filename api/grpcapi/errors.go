package grpcapi

import (
	"context"
	"crypto/rand"
	"encoding/hex"
	"errors"
	"fmt"
	"log/slog"
	"regexp"
	"runtime/debug"
	"time"

	"google.golang.org/grpc"
	"google.golang.org/grpc/codes"
	"google.golang.org/grpc/metadata"
	"google.golang.org/grpc/status"

	"github.com/deadspace-fhir/deadspace/api/engine"
	"github.com/deadspace-fhir/deadspace/api/store"
)

// headerRequestID is the metadata key of the request id, both ways.
const headerRequestID = "x-request-id"

// errBadRequest marks a request this package refuses as sent (a missing
// field, a malformed token); the message after it is the reason.
var errBadRequest = errors.New("invalid request")

func badRequest(format string, args ...any) error {
	return fmt.Errorf("%w: %s", errBadRequest, fmt.Sprintf(format, args...))
}

// status is the one place errors become gRPC statuses:
//
//   - a request refused as sent (errBadRequest, engine.ErrInvalid):
//     InvalidArgument with the reason, which speaks of the request only;
//   - a record that does not exist (store.ErrNotFound): NotFound;
//   - the caller's own cancellation or deadline: Canceled, DeadlineExceeded;
//   - anything else: Internal with an opaque message naming the request id;
//     the detail is logged; the logger redacts identifiers (api/logredact).
func (s *Server) status(ctx context.Context, err error) error {
	if err == nil {
		return nil
	}
	if st, ok := status.FromError(err); ok && st.Code() != codes.Unknown {
		return err // already a status, e.g. from a stream's Send
	}
	switch {
	case errors.Is(err, errBadRequest), errors.Is(err, engine.ErrInvalid):
		return status.Error(codes.InvalidArgument, err.Error())
	case errors.Is(err, store.ErrNotFound):
		return status.Error(codes.NotFound, "no record with that identifier")
	case errors.Is(err, context.Canceled):
		return status.Error(codes.Canceled, "the call was cancelled")
	case errors.Is(err, context.DeadlineExceeded):
		return status.Error(codes.DeadlineExceeded, "the call's deadline passed")
	}
	id := requestIDFrom(ctx)
	// The logger's handler (api/logredact, installed by main) removes any
	// identifier the error text quotes.
	s.logger(ctx).ErrorContext(ctx, "call failed", "err", err)
	return status.Errorf(codes.Internal, "internal error (request id %s)", id)
}

// requestIDs are accepted from clients only in this shape, so a client
// cannot inject log lines or unbounded text.
var requestIDPattern = regexp.MustCompile(`^[A-Za-z0-9._:-]{1,64}$`)

type ctxKey int

const (
	keyRequestID ctxKey = iota
	keyLogger
)

func newRequestID() string {
	var b [12]byte
	_, _ = rand.Read(b[:])
	return hex.EncodeToString(b[:])
}

// withRequestID takes the client's request id or makes one, and returns a
// context that carries it and a logger that names it.
func (s *Server) withRequestID(ctx context.Context, method string) (context.Context, string) {
	id := ""
	if md, ok := metadata.FromIncomingContext(ctx); ok {
		if v := md.Get(headerRequestID); len(v) > 0 && requestIDPattern.MatchString(v[0]) {
			id = v[0]
		}
	}
	if id == "" {
		id = newRequestID()
	}
	ctx = context.WithValue(ctx, keyRequestID, id)
	ctx = context.WithValue(ctx, keyLogger, s.log.With("request_id", id, "method", method))
	return ctx, id
}

func requestIDFrom(ctx context.Context) string {
	id, _ := ctx.Value(keyRequestID).(string)
	return id
}

// logger returns the call's logger, which names its request id.
func (s *Server) logger(ctx context.Context) *slog.Logger {
	if l, ok := ctx.Value(keyLogger).(*slog.Logger); ok {
		return l
	}
	return s.log
}

func (s *Server) logCall(ctx context.Context, start time.Time, err error) {
	code := status.Code(err)
	level := slog.LevelInfo
	if code == codes.Internal || code == codes.Unknown {
		level = slog.LevelError
	}
	s.logger(ctx).Log(ctx, level, "gRPC call", "code", code.String(), "duration_ms", time.Since(start).Milliseconds())
}

func (s *Server) unaryRequestID(ctx context.Context, req any, info *grpc.UnaryServerInfo, handler grpc.UnaryHandler) (any, error) {
	ctx, id := s.withRequestID(ctx, info.FullMethod)
	_ = grpc.SetHeader(ctx, metadata.Pairs(headerRequestID, id))
	start := time.Now()
	resp, err := handler(ctx, req)
	s.logCall(ctx, start, err)
	return resp, err
}

func (s *Server) unaryRecover(ctx context.Context, req any, info *grpc.UnaryServerInfo, handler grpc.UnaryHandler) (resp any, err error) {
	defer func() {
		if r := recover(); r != nil {
			err = s.recovered(ctx, r)
		}
	}()
	return handler(ctx, req)
}

// recovered logs a panic (its value redacted, with the stack) and answers
// the call with Internal.
func (s *Server) recovered(ctx context.Context, r any) error {
	s.logger(ctx).ErrorContext(ctx, "panic in a gRPC handler", "panic", fmt.Sprint(r), "stack", string(debug.Stack()))
	return status.Errorf(codes.Internal, "internal error (request id %s)", requestIDFrom(ctx))
}

// serverStream replaces a stream's context with one that carries the
// request id.
type serverStream struct {
	grpc.ServerStream
	ctx context.Context
}

func (w serverStream) Context() context.Context { return w.ctx }

func (s *Server) streamRequestID(srv any, ss grpc.ServerStream, info *grpc.StreamServerInfo, handler grpc.StreamHandler) error {
	ctx, id := s.withRequestID(ss.Context(), info.FullMethod)
	_ = ss.SetHeader(metadata.Pairs(headerRequestID, id))
	start := time.Now()
	err := handler(srv, serverStream{ss, ctx})
	s.logCall(ctx, start, err)
	return err
}

func (s *Server) streamRecover(srv any, ss grpc.ServerStream, _ *grpc.StreamServerInfo, handler grpc.StreamHandler) (err error) {
	defer func() {
		if r := recover(); r != nil {
			err = s.recovered(ss.Context(), r)
		}
	}()
	return handler(srv, ss)
}
