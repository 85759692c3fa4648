package submit

import (
	"bytes"
	"context"
	"errors"
	"fmt"
	"net"
	"os"
	"path/filepath"
	"strings"
	"sync"
	"testing"

	"google.golang.org/grpc"
	"google.golang.org/grpc/codes"
	"google.golang.org/grpc/status"

	pb "github.com/deadspace-fhir/deadspace/proto/deadspace/v1"
)

// fakeService answers Submit as the service does: it rejects resources
// whose id starts with "bad" (by their line in the chunk) and refuses a
// whole chunk that holds "refuse-me".
type fakeService struct {
	pb.UnimplementedDeadSpaceServer
	mu     sync.Mutex
	chunks [][]byte
}

func (f *fakeService) Submit(_ context.Context, req *pb.SubmitRequest) (*pb.SubmitResponse, error) {
	f.mu.Lock()
	f.chunks = append(f.chunks, append([]byte(nil), req.GetNdjson()...))
	f.mu.Unlock()
	if bytes.Contains(req.GetNdjson(), []byte("refuse-me")) {
		return nil, status.Error(codes.InvalidArgument, "ndjson line 1: not a FHIR resource")
	}
	out := &pb.SubmitResponse{}
	for i, line := range strings.Split(strings.TrimSuffix(string(req.GetNdjson()), "\n"), "\n") {
		switch {
		case strings.Contains(line, `"id":"bad`):
			out.Rejected = append(out.Rejected, &pb.Rejection{Index: int32(i), Reason: "value-absent", Detail: "no valueQuantity"})
		case strings.Contains(line, `"Encounter"`):
			out.Ignored++
		default:
			out.Accepted++
		}
	}
	return out, nil
}

func startFake(t *testing.T) (*fakeService, string) {
	t.Helper()
	ln, err := net.Listen("tcp", "127.0.0.1:0")
	if err != nil {
		t.Fatal(err)
	}
	f := &fakeService{}
	g := grpc.NewServer()
	pb.RegisterDeadSpaceServer(g, f)
	go func() { _ = g.Serve(ln) }()
	t.Cleanup(g.Stop)
	return f, ln.Addr().String()
}

func writeFile(t *testing.T, lines ...string) string {
	t.Helper()
	p := filepath.Join(t.TempDir(), "in.ndjson")
	if err := os.WriteFile(p, []byte(strings.Join(lines, "\n")), 0o644); err != nil {
		t.Fatal(err)
	}
	return p
}

func obs(id string) string {
	return fmt.Sprintf(`{"resourceType":"Observation","id":"%s","status":"final"}`, id)
}

func TestRunReportsEveryLineNotAccepted(t *testing.T) {
	f, addr := startFake(t)
	var lines []string
	for i := range 40 {
		lines = append(lines, obs(fmt.Sprintf("o%d", i)))
	}
	lines[3] = obs("bad-3")                                       // line 4: rejected by the service
	lines[7] = "not json"                                         // line 8: refused here, never sent
	lines[9] = ""                                                 // line 10: blank, skipped
	lines[11] = `{"resourceType":"Encounter","id":"e"}`           // line 12: of no use to the service
	lines[30] = `{"resourceType":"Observation","id":"refuse-me"}` // line 31: its chunk is refused whole
	file := writeFile(t, lines...)
	var progress bytes.Buffer
	sum, err := Run(context.Background(), Options{Addr: addr, ChunkBytes: 400, Progress: &progress}, []string{file})
	if !errors.Is(err, ErrNotAllAccepted) {
		t.Fatalf("err = %v, want ErrNotAllAccepted", err)
	}
	byReason := map[string]Problem{}
	for _, p := range sum.Problems {
		byReason[p.Reason] = p
	}
	refused := byReason["chunk-refused"]
	if len(sum.Problems) != 3 || byReason["not-a-fhir-resource"].Line != 8 || byReason["value-absent"].Line != 4 ||
		refused.Line > 31 || refused.LastLine < 31 {
		t.Fatalf("problems = %+v", sum.Problems)
	}
	// Every line but the refused chunk's was accepted or accounted for.
	inRefused := refused.LastLine - refused.Line + 1
	if want := 40 - 1 /*blank*/ - 1 /*not json*/ - 1 /*bad*/ - 1 /*encounter*/ - inRefused; sum.Accepted != want || sum.Ignored != 1 {
		t.Errorf("accepted %d ignored %d, want %d and 1", sum.Accepted, sum.Ignored, want)
	}
	if sum.Calls != len(f.chunks) || sum.Calls < 3 {
		t.Errorf("%d calls for %d chunks; 400-byte chunks should need several", sum.Calls, len(f.chunks))
	}
	for _, c := range f.chunks {
		if bytes.Contains(c, []byte("not json")) {
			t.Error("a line that is not a FHIR resource was sent")
		}
	}
	if n := strings.Count(progress.String(), "\n"); n != sum.Calls {
		t.Errorf("%d progress lines for %d calls", n, sum.Calls)
	}
	var out bytes.Buffer
	WriteSummary(&out, sum)
	if !strings.Contains(out.String(), file+":4: value-absent: no valueQuantity") {
		t.Errorf("summary does not name the rejected line:\n%s", out.String())
	}
}

func TestRunStopsWhenTheServiceIsUnreachable(t *testing.T) {
	ln, _ := net.Listen("tcp", "127.0.0.1:0")
	addr := ln.Addr().String()
	ln.Close()
	_, err := Run(context.Background(), Options{Addr: addr}, []string{writeFile(t, obs("a"))})
	if err == nil || errors.Is(err, ErrNotAllAccepted) {
		t.Errorf("err = %v, want a transport error", err)
	}
}

// FuzzLine checks the line check: whatever a line holds, it is either
// queued for sending or reported, never both, never lost.
func FuzzLine(f *testing.F) {
	for _, s := range []string{obs("a"), "", " ", "{}", `{"resourceType":1}`, "[", `{"resourceType":"Patient"}` + "\x00"} {
		f.Add([]byte(s))
	}
	f.Fuzz(func(t *testing.T, line []byte) {
		s := &sender{}
		var c chunk
		s.line("f", 1, line, &c)
		queued, reported := len(c.lines), len(s.sum.Problems)
		blank := len(bytes.TrimSpace(line)) == 0
		if queued+reported > 1 || (!blank && queued+reported != 1) || (blank && queued+reported != 0) {
			t.Fatalf("line %q: queued %d, reported %d", line, queued, reported)
		}
	})
}
