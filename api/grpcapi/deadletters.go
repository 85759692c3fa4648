package grpcapi

import (
	"context"
	"errors"

	"google.golang.org/grpc/codes"
	"google.golang.org/grpc/status"

	"github.com/deadspace-fhir/deadspace/api/deadletters"
	pb "github.com/deadspace-fhir/deadspace/proto/deadspace/v1"
)

// operator is the dead-letter view over the configured store, or an
// UNIMPLEMENTED status without one.
func (s *Server) operator() (deadletters.Operator, error) {
	if s.cfg.DeadLetters == nil {
		return nil, status.Error(codes.Unimplemented, "this server keeps no dead letters")
	}
	return deadletters.Local(s.cfg.DeadLetters), nil
}

// deadLetterStatus maps the operator's errors; the rest go through
// [Server.status].
func (s *Server) deadLetterStatus(ctx context.Context, err error) error {
	if errors.Is(err, deadletters.ErrNotFound) {
		return status.Error(codes.NotFound, "no dead letter with that id")
	}
	return s.status(ctx, err)
}

// ListDeadLetters implements pb.DeadSpaceServer.
func (s *Server) ListDeadLetters(ctx context.Context, req *pb.ListDeadLettersRequest) (*pb.ListDeadLettersResponse, error) {
	op, err := s.operator()
	if err != nil {
		return nil, err
	}
	if _, err := deadletters.CheckLimit(int(req.GetLimit())); err != nil {
		return nil, s.status(ctx, badRequest("%v", err))
	}
	views, total, err := op.List(ctx, int(req.GetLimit()))
	if err != nil {
		return nil, s.deadLetterStatus(ctx, err)
	}
	out := &pb.ListDeadLettersResponse{Total: int64(total)}
	for _, v := range views {
		out.DeadLetters = append(out.DeadLetters, deadletters.ToProto(v))
	}
	return out, nil
}

// GetDeadLetter implements pb.DeadSpaceServer.
func (s *Server) GetDeadLetter(ctx context.Context, req *pb.GetDeadLetterRequest) (*pb.DeadLetter, error) {
	op, err := s.operator()
	if err != nil {
		return nil, err
	}
	v, err := op.Show(ctx, req.GetId())
	if err != nil {
		return nil, s.deadLetterStatus(ctx, err)
	}
	return deadletters.ToProto(v), nil
}

// RetryDeadLetter implements pb.DeadSpaceServer.
func (s *Server) RetryDeadLetter(ctx context.Context, req *pb.RetryDeadLetterRequest) (*pb.RetryDeadLetterResponse, error) {
	op, err := s.operator()
	if err != nil {
		return nil, err
	}
	id, err := op.Retry(ctx, req.GetId())
	if err != nil {
		return nil, s.deadLetterStatus(ctx, err)
	}
	s.eng.WakeWriter()
	s.logger(ctx).InfoContext(ctx, "dead letter moved back to the outbox by an operator", "dead_letter", req.GetId(), "write", id)
	return &pb.RetryDeadLetterResponse{OutboxId: id}, nil
}
