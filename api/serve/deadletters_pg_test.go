package serve_test

import (
	"errors"
	"testing"
	"time"

	"google.golang.org/grpc"
	"google.golang.org/grpc/codes"
	"google.golang.org/grpc/credentials/insecure"
	"google.golang.org/grpc/status"

	"github.com/deadspace-fhir/deadspace/api/store"
	"github.com/deadspace-fhir/deadspace/api/store/pgstore"
	"github.com/deadspace-fhir/deadspace/api/store/pgstore/pgtest"
	pb "github.com/deadspace-fhir/deadspace/proto/deadspace/v1"
)

// The dead-letter gRPC calls work on a service whose store is PostgreSQL
// (they answered UNIMPLEMENTED before pgstore had them): a letter buried in
// the database is listed, shown, and retried back into its outbox, and is
// then gone. The service runs standalone, so the retried write stays in the
// outbox to be seen.
func TestDeadLettersOnPostgreSQL(t *testing.T) {
	url := pgtest.NewSchema(t)
	ctx := t.Context()
	db, err := pgstore.Open(ctx, url, pgstore.Options{Holder: "test"})
	if err != nil {
		t.Fatal(err)
	}
	defer db.Close()
	t0 := time.Now().Add(-time.Hour).Truncate(time.Second)
	if err := db.Commit(ctx, store.Change{Subject: "Patient/d", Writes: []store.Write{{
		Subject: "Patient/d", Series: []string{"s1"}, Body: []byte(`{"resourceType":"Bundle"}`),
	}}}, t0); err != nil {
		t.Fatal(err)
	}
	due, err := db.DueWrites(ctx, t0, 10)
	if err != nil || len(due) != 1 {
		t.Fatalf("DueWrites: %v, %v", due, err)
	}
	buried := due[0].ID
	if err := db.Bury(ctx, buried, "HTTP 422: refused", t0); err != nil {
		t.Fatal(err)
	}

	cfg := testConfig("", "")
	cfg.Store = url
	svc := start(t, cfg)
	conn, err := grpc.NewClient(svc.svc.GRPCAddr(), grpc.WithTransportCredentials(insecure.NewCredentials()))
	if err != nil {
		t.Fatal(err)
	}
	defer conn.Close()
	api := pb.NewDeadSpaceClient(conn)

	list, err := api.ListDeadLetters(ctx, &pb.ListDeadLettersRequest{})
	if err != nil {
		t.Fatalf("ListDeadLetters: %v", err)
	}
	if list.GetTotal() != 1 || len(list.GetDeadLetters()) != 1 || list.GetDeadLetters()[0].GetId() != buried {
		t.Fatalf("ListDeadLetters = %v, want write %d only", list, buried)
	}
	if _, err := api.GetDeadLetter(ctx, &pb.GetDeadLetterRequest{Id: buried}); err != nil {
		t.Fatalf("GetDeadLetter(%d): %v", buried, err)
	}
	retried, err := api.RetryDeadLetter(ctx, &pb.RetryDeadLetterRequest{Id: buried})
	if err != nil {
		t.Fatalf("RetryDeadLetter(%d): %v", buried, err)
	}
	if retried.GetOutboxId() <= buried {
		t.Errorf("retried as write %d, want a new id after %d", retried.GetOutboxId(), buried)
	}
	_, err = api.GetDeadLetter(ctx, &pb.GetDeadLetterRequest{Id: buried})
	if status.Code(err) != codes.NotFound {
		t.Errorf("GetDeadLetter after retry: %v, want NotFound", err)
	}
	_, err = api.RetryDeadLetter(ctx, &pb.RetryDeadLetterRequest{Id: buried})
	if status.Code(err) != codes.NotFound {
		t.Errorf("second RetryDeadLetter: %v, want NotFound", err)
	}
	if _, err := db.DeadLetter(ctx, buried); !errors.Is(err, store.ErrNotFound) {
		t.Errorf("dead letter still in the database after retry: %v", err)
	}
	st, err := db.Stats(ctx)
	if err != nil {
		t.Fatal(err)
	}
	if st.OutboxDepth != 1 || st.DeadLetters != 0 {
		t.Errorf("after retry: outbox %d, dead letters %d; want 1 and 0", st.OutboxDepth, st.DeadLetters)
	}
}
