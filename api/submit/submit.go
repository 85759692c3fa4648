// Package submit sends NDJSON files of FHIR resources to a running
// `deadspace serve` over gRPC, in chunks, with progress, and reports what
// the service accepted and why anything was not. It is how a newcomer
// loads a night of data: the webhook takes FHIR notifications, not files,
// and a device export is larger than its body limit.
package submit

import (
	"bufio"
	"bytes"
	"context"
	"encoding/json"
	"errors"
	"fmt"
	"io"
	"os"
	"strings"
	"time"

	"google.golang.org/grpc"
	"google.golang.org/grpc/codes"
	"google.golang.org/grpc/credentials"
	"google.golang.org/grpc/credentials/insecure"
	"google.golang.org/grpc/status"

	pb "github.com/deadspace-fhir/deadspace/proto/deadspace/v1"
)

// DefaultChunkBytes keeps each call well under the service's message limit
// and small enough that progress moves.
const DefaultChunkBytes = 1 << 20

// MaxLineBytes bounds one NDJSON line, as replay does.
const MaxLineBytes = 16 << 20

// Options configures a submission.
type Options struct {
	Addr string
	// Credentials secure the connection to the service (TLS, mutual TLS:
	// tlsconf.GRPCClient builds them from the command's flags); nil is
	// plaintext, for a service on a loopback address.
	Credentials credentials.TransportCredentials
	ChunkBytes  int
	// Progress receives one line per chunk; nil discards it.
	Progress io.Writer
	// Timeout bounds each call.
	Timeout time.Duration
}

// Problem is one line not accepted, or one chunk refused whole.
type Problem struct {
	File string
	// Line is the 1-based line; for a refused chunk, its first line.
	Line, LastLine int
	Reason         string
	Detail         string
}

func (p Problem) String() string {
	where := fmt.Sprintf("%s:%d", p.File, p.Line)
	if p.LastLine > p.Line {
		where = fmt.Sprintf("%s:%d-%d", p.File, p.Line, p.LastLine)
	}
	if p.Detail == "" {
		return where + ": " + p.Reason
	}
	return where + ": " + p.Reason + ": " + p.Detail
}

// Summary is what a submission did.
type Summary struct {
	Lines    int
	Accepted int
	// Ignored are resources the service has no use for.
	Ignored  int
	Problems []Problem
	Calls    int
}

// ErrNotAllAccepted is returned, wrapped, when any line was not accepted;
// the rest was still sent.
var ErrNotAllAccepted = errors.New("some lines were not accepted")

// Run sends every file and returns the summary. A line that is not a JSON
// object with a resourceType is reported and not sent; a chunk the
// service refuses whole is reported with its line range and the rest goes
// on. Transport errors (the service unreachable) stop the run.
func Run(ctx context.Context, opts Options, files []string) (Summary, error) {
	if opts.ChunkBytes <= 0 {
		opts.ChunkBytes = DefaultChunkBytes
	}
	if opts.Timeout <= 0 {
		opts.Timeout = 2 * time.Minute
	}
	if opts.Progress == nil {
		opts.Progress = io.Discard
	}
	creds := opts.Credentials
	if creds == nil {
		creds = insecure.NewCredentials()
	}
	conn, err := grpc.NewClient(opts.Addr, grpc.WithTransportCredentials(creds),
		grpc.WithDefaultCallOptions(grpc.MaxCallSendMsgSize(opts.ChunkBytes+MaxLineBytes+1024)))
	if err != nil {
		return Summary{}, fmt.Errorf("submit: %w", err)
	}
	defer conn.Close()
	s := &sender{client: pb.NewDeadSpaceClient(conn), opts: opts}
	for _, name := range files {
		if err := s.file(ctx, name); err != nil {
			return s.sum, err
		}
	}
	if len(s.sum.Problems) > 0 {
		return s.sum, fmt.Errorf("submit: %d problems: %w", len(s.sum.Problems), ErrNotAllAccepted)
	}
	return s.sum, nil
}

type sender struct {
	client pb.DeadSpaceClient
	opts   Options
	sum    Summary
}

// chunk is NDJSON lines ready to send, with the file line of each.
type chunk struct {
	buf   bytes.Buffer
	lines []int
}

func (s *sender) file(ctx context.Context, name string) error {
	f, err := os.Open(name)
	if err != nil {
		return fmt.Errorf("submit: %w", err)
	}
	defer f.Close()
	var size int64
	if st, err := f.Stat(); err == nil {
		size = st.Size()
	}
	r := bufio.NewReaderSize(f, 1<<20)
	var c chunk
	var read int64
	for n := 1; ; n++ {
		line, err := r.ReadBytes('\n')
		read += int64(len(line))
		if len(line) > 0 {
			s.sum.Lines++
			s.line(name, n, bytes.TrimRight(line, "\r\n"), &c)
		}
		if c.buf.Len() >= s.opts.ChunkBytes || (errors.Is(err, io.EOF) && len(c.lines) > 0) {
			if serr := s.send(ctx, name, &c); serr != nil {
				return serr
			}
			fmt.Fprintf(s.opts.Progress, "%s: %d of %d bytes sent, line %d; accepted %d so far, %d problems\n", name, read, size, n, s.sum.Accepted, len(s.sum.Problems))
		}
		if errors.Is(err, io.EOF) {
			return nil
		}
		if err != nil {
			return fmt.Errorf("submit: read %s: %w", name, err)
		}
	}
}

// line checks one line and adds it to the chunk, or reports it.
func (s *sender) line(name string, n int, line []byte, c *chunk) {
	if len(bytes.TrimSpace(line)) == 0 {
		return
	}
	if len(line) > MaxLineBytes {
		s.sum.Problems = append(s.sum.Problems, Problem{File: name, Line: n, Reason: "line-too-long", Detail: fmt.Sprintf("longer than %d bytes", MaxLineBytes)})
		return
	}
	var head struct {
		ResourceType string `json:"resourceType"`
	}
	if err := json.Unmarshal(line, &head); err != nil || head.ResourceType == "" {
		detail := "no resourceType"
		if err != nil {
			detail = err.Error()
		}
		s.sum.Problems = append(s.sum.Problems, Problem{File: name, Line: n, Reason: "not-a-fhir-resource", Detail: detail})
		return
	}
	c.buf.Write(line)
	c.buf.WriteByte('\n')
	c.lines = append(c.lines, n)
}

// send submits one chunk and records the service's answer.
func (s *sender) send(ctx context.Context, name string, c *chunk) error {
	defer func() {
		c.buf.Reset()
		c.lines = c.lines[:0]
	}()
	callCtx, cancel := context.WithTimeout(ctx, s.opts.Timeout)
	defer cancel()
	s.sum.Calls++
	resp, err := s.client.Submit(callCtx, &pb.SubmitRequest{Ndjson: c.buf.Bytes()})
	if err != nil {
		st, _ := status.FromError(err)
		if isRefusal(st.Code()) {
			s.sum.Problems = append(s.sum.Problems, Problem{
				File: name, Line: c.lines[0], LastLine: c.lines[len(c.lines)-1],
				Reason: "chunk-refused", Detail: st.Message(),
			})
			return nil
		}
		return fmt.Errorf("submit: %s lines %d-%d: %w", name, c.lines[0], c.lines[len(c.lines)-1], err)
	}
	s.sum.Accepted += int(resp.GetAccepted())
	s.sum.Ignored += int(resp.GetIgnored())
	for _, rj := range resp.GetRejected() {
		line := 0
		if i := int(rj.GetIndex()); i >= 0 && i < len(c.lines) {
			line = c.lines[i]
		}
		s.sum.Problems = append(s.sum.Problems, Problem{File: name, Line: line, Reason: rj.GetReason(), Detail: rj.GetDetail()})
	}
	return nil
}

// isRefusal reports whether a status code refuses the request's content
// rather than the call: the next chunk may still be taken.
func isRefusal(code codes.Code) bool {
	switch code {
	case codes.InvalidArgument, codes.FailedPrecondition, codes.OutOfRange, codes.ResourceExhausted:
		return true
	}
	return false
}

// WriteSummary prints the result for people.
func WriteSummary(w io.Writer, s Summary) {
	fmt.Fprintf(w, "sent %d lines in %d calls: %d resources accepted, %d of no use to this service, %d problems\n",
		s.Lines, s.Calls, s.Accepted, s.Ignored, len(s.Problems))
	byReason := map[string]int{}
	var order []string
	for _, p := range s.Problems {
		if byReason[p.Reason] == 0 {
			order = append(order, p.Reason)
		}
		byReason[p.Reason]++
	}
	for _, r := range order {
		fmt.Fprintf(w, "  %-28s %d\n", r, byReason[r])
	}
	const shown = 50
	for i, p := range s.Problems {
		if i == shown {
			fmt.Fprintf(w, "  … and %d more\n", len(s.Problems)-shown)
			break
		}
		fmt.Fprintln(w, "  "+strings.TrimSpace(p.String()))
	}
}
