package grpcapi

import (
	"bytes"
	"context"
	"errors"
	"fmt"
	"log/slog"
	"strings"
	"testing"

	"google.golang.org/grpc"
	"google.golang.org/grpc/codes"
	"google.golang.org/grpc/status"

	"github.com/deadspace-fhir/deadspace/api/engine"
	"github.com/deadspace-fhir/deadspace/api/logredact"
	"github.com/deadspace-fhir/deadspace/api/store"
)

func logged(t *testing.T) (*Server, *bytes.Buffer) {
	t.Helper()
	var buf bytes.Buffer
	return &Server{log: slog.New(logredact.NewHandler(slog.NewTextHandler(&buf, nil)))}, &buf
}

func TestStatus(t *testing.T) {
	for _, tc := range []struct {
		name    string
		err     error
		code    codes.Code
		msg     string // the message contains it
		notInIt string // and not this
	}{
		{"bad request", badRequest("page_size must not be negative"), codes.InvalidArgument, "page_size must not be negative", ""},
		{"engine refusal", fmt.Errorf("%w: no resources", engine.ErrInvalid), codes.InvalidArgument, "no resources", ""},
		{"resource error", &engine.ResourceError{Index: 2, Err: errors.New("decode: not JSON")}, codes.InvalidArgument, "resource 2", ""},
		{"not found", fmt.Errorf("engine: derivation: %w", store.ErrNotFound), codes.NotFound, "no record", "engine:"},
		{"cancelled", fmt.Errorf("engine: events: %w", context.Canceled), codes.Canceled, "cancelled", ""},
		{"deadline", context.DeadlineExceeded, codes.DeadlineExceeded, "deadline", ""},
		{"already a status", status.Error(codes.Unavailable, "transport closing"), codes.Unavailable, "transport closing", ""},
		{"anything else is opaque", errors.New("boltstore: Patient/bed1-stable: disk full"), codes.Internal, "request id rid-1", "disk"},
	} {
		t.Run(tc.name, func(t *testing.T) {
			s, _ := logged(t)
			ctx := context.WithValue(context.Background(), keyRequestID, "rid-1")
			st, _ := status.FromError(s.status(ctx, tc.err))
			if st.Code() != tc.code || !strings.Contains(st.Message(), tc.msg) || (tc.notInIt != "" && strings.Contains(st.Message(), tc.notInIt)) {
				t.Errorf("got %v %q, want %v with %q", st.Code(), st.Message(), tc.code, tc.msg)
			}
		})
	}
	if s := (&Server{}); s.status(context.Background(), nil) != nil {
		t.Error("nil error became a status")
	}
}

func TestInternalErrorsAreLoggedWithoutIdentifiers(t *testing.T) {
	s, buf := logged(t)
	ctx, _ := s.withRequestID(context.Background(), "/deadspace.v1.DeadSpace/Explain")
	_ = s.status(ctx, errors.New("engine: evaluate: stored input Observation/bed3-kpa-abg-1/_history/2 of Patient/bed3-kpa: bad payload"))
	out := buf.String()
	if strings.Contains(out, "bed3-kpa") {
		t.Errorf("log carries a patient identifier: %s", out)
	}
	for _, want := range []string{"Observation/[redacted]", "Patient/[redacted]", "bad payload", "request_id=", "method=/deadspace.v1.DeadSpace/Explain"} {
		if !strings.Contains(out, want) {
			t.Errorf("log lacks %q: %s", want, out)
		}
	}
}

func TestPanicRecovery(t *testing.T) {
	boom := func() { panic("nil map in Patient/bed4-percent") }
	t.Run("unary", func(t *testing.T) {
		s, buf := logged(t)
		_, err := s.unaryRecover(context.Background(), nil, &grpc.UnaryServerInfo{FullMethod: "/x/Y"},
			func(context.Context, any) (any, error) { boom(); return nil, nil })
		if status.Code(err) != codes.Internal {
			t.Errorf("got %v, want Internal", err)
		}
		if out := buf.String(); !strings.Contains(out, "panic") || strings.Contains(out, "bed4-percent") {
			t.Errorf("log = %s", out)
		}
	})
	t.Run("stream", func(t *testing.T) {
		s, _ := logged(t)
		err := s.streamRecover(nil, fakeStream{}, &grpc.StreamServerInfo{FullMethod: "/x/Z"},
			func(any, grpc.ServerStream) error { boom(); return nil })
		if status.Code(err) != codes.Internal {
			t.Errorf("got %v, want Internal", err)
		}
	})
}

type fakeStream struct{ grpc.ServerStream }

func (fakeStream) Context() context.Context { return context.Background() }
