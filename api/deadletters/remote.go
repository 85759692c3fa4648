package deadletters

import (
	"context"
	"fmt"

	"google.golang.org/grpc"
	"google.golang.org/grpc/codes"
	"google.golang.org/grpc/status"
	"google.golang.org/protobuf/types/known/timestamppb"

	pb "github.com/deadspace-fhir/deadspace/proto/deadspace/v1"
)

// Remote works through a running serve's gRPC API.
func Remote(conn grpc.ClientConnInterface) Operator { return remote{c: pb.NewDeadSpaceClient(conn)} }

type remote struct{ c pb.DeadSpaceClient }

func (r remote) List(ctx context.Context, limit int) ([]View, int, error) {
	if _, err := CheckLimit(limit); err != nil {
		return nil, 0, err
	}
	resp, err := r.c.ListDeadLetters(ctx, &pb.ListDeadLettersRequest{Limit: int32(limit)})
	if err != nil {
		return nil, 0, fmt.Errorf("dead letters: %w", err)
	}
	out := make([]View, 0, len(resp.GetDeadLetters()))
	for _, d := range resp.GetDeadLetters() {
		out = append(out, FromProto(d))
	}
	return out, int(resp.GetTotal()), nil
}

func (r remote) Show(ctx context.Context, id uint64) (View, error) {
	d, err := r.c.GetDeadLetter(ctx, &pb.GetDeadLetterRequest{Id: id})
	if err != nil {
		return View{}, remoteErr(id, err)
	}
	return FromProto(d), nil
}

func (r remote) Retry(ctx context.Context, id uint64) (uint64, error) {
	resp, err := r.c.RetryDeadLetter(ctx, &pb.RetryDeadLetterRequest{Id: id})
	if err != nil {
		return 0, remoteErr(id, err)
	}
	return resp.GetOutboxId(), nil
}

func remoteErr(id uint64, err error) error {
	if status.Code(err) == codes.NotFound {
		return fmt.Errorf("dead letter %d: %w", id, ErrNotFound)
	}
	return fmt.Errorf("dead letter %d: %w", id, err)
}

// ToProto is a view as the gRPC API sends it.
func ToProto(v View) *pb.DeadLetter {
	return &pb.DeadLetter{
		Id: v.ID, BuriedAt: timestamppb.New(v.BuriedAt), QueuedAt: timestamppb.New(v.QueuedAt),
		Attempts: int32(min(v.Attempts, 1<<31-1)), Reason: v.Reason, LastError: v.LastError,
		Series: v.Series, Superseded: v.Superseded,
	}
}

// FromProto is the inverse of ToProto.
func FromProto(d *pb.DeadLetter) View {
	return View{
		ID: d.GetId(), BuriedAt: d.GetBuriedAt().AsTime(), QueuedAt: d.GetQueuedAt().AsTime(),
		Attempts: int(d.GetAttempts()), Reason: d.GetReason(), LastError: d.GetLastError(),
		Series: d.GetSeries(), Superseded: d.GetSuperseded(),
	}
}
