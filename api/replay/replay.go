// Package replay runs the whole derivation over NDJSON files of FHIR R4
// resources, as a bulk export writes them, with nothing else running: no
// server, no store. It is the offline form of the service's job, used to try
// a site's data before going live and to audit the live service afterwards.
package replay

import (
	"bufio"
	"bytes"
	"context"
	"errors"
	"fmt"
	"io"
	"os"
	"sort"

	"github.com/deadspace-fhir/deadspace/api/pipeline"
	"github.com/deadspace-fhir/deadspace/derive"
	"github.com/deadspace-fhir/deadspace/fhir/bulk"
	"github.com/deadspace-fhir/deadspace/fhir/decode"
	"github.com/deadspace-fhir/deadspace/fhir/encode"
)

// MaxLineBytes bounds one NDJSON line. A longer line is reported and
// skipped rather than read into memory whole.
const MaxLineBytes = bulk.MaxLineBytes

// Options configures a replay.
type Options struct {
	Derive derive.Config
	Decode decode.Options
	Encode encode.Options
	// Observe, when set, is given every decoded resource as it is read,
	// for reports that show inputs as their sources wrote them.
	Observe func(decode.Item)
}

// Skipped is a line that was not a FHIR resource.
type Skipped struct {
	File string
	Line int
	Err  error
}

func (s Skipped) String() string { return fmt.Sprintf("%s:%d: %v", s.File, s.Line, s.Err) }

// Outcome is what a replay read and produced.
type Outcome struct {
	Report  pipeline.Report
	Device  any
	Lines   int
	Skipped []Skipped
	// Resources counts the resources read, by resourceType.
	Resources map[string]int
}

// ErrSkipped is returned, wrapped, when any line was skipped; the rest of
// the run still completed.
var ErrSkipped = errors.New("some lines were skipped")

// Run reads every file, derives, and returns the outcome. A line that is
// not a FHIR resource is recorded in Outcome.Skipped and the run goes on.
//
// A line that is a transaction or batch Bundle of DELETE entries lists
// resources deleted on the server, wherever it is among the files: they
// are applied after every file is read, by the rules backfill and the
// live service apply them by (pipeline.Collector.AddDeletions), and
// counted in Outcome.Report.Deletions. An entry that cannot be applied is
// recorded in Outcome.Skipped with its line and position; the line's other
// entries are still applied.
func Run(ctx context.Context, opts Options, files []string) (Outcome, error) {
	if err := opts.Derive.Validate(); err != nil {
		return Outcome{}, fmt.Errorf("replay: %w", err)
	}
	enc, err := encode.New(opts.Encode)
	if err != nil {
		return Outcome{}, fmt.Errorf("replay: %w", err)
	}
	if err := opts.Decode.Units.Validate(); err != nil {
		return Outcome{}, fmt.Errorf("replay: %w", err)
	}
	dec := decode.New(opts.Decode)
	out := Outcome{Resources: make(map[string]int), Device: enc.Device()}
	col := pipeline.NewCollector()
	for _, name := range files {
		if err := ctx.Err(); err != nil {
			return Outcome{}, err
		}
		if err := readFile(name, dec, col, opts.Observe, &out); err != nil {
			return Outcome{}, err
		}
	}
	out.Report, err = col.Finish(opts.Derive, enc)
	if err != nil {
		return Outcome{}, fmt.Errorf("replay: %w", err)
	}
	return out, nil
}

func readFile(name string, dec *decode.Decoder, col *pipeline.Collector, observe func(decode.Item), out *Outcome) error {
	f, err := os.Open(name)
	if err != nil {
		return fmt.Errorf("replay: %w", err)
	}
	defer f.Close()
	r := bufio.NewReaderSize(f, 1<<20)
	for n := 1; ; n++ {
		line, tooLong, err := readLine(r)
		if errors.Is(err, io.EOF) && len(line) == 0 && !tooLong {
			return nil
		}
		if err != nil && !errors.Is(err, io.EOF) {
			return fmt.Errorf("replay: read %s: %w", name, err)
		}
		out.Lines++
		switch {
		case tooLong:
			out.Skipped = append(out.Skipped, Skipped{name, n, fmt.Errorf("line longer than %d bytes", MaxLineBytes)})
		case len(bytes.TrimSpace(line)) == 0:
			out.Lines-- // blank lines are not resources, nor errors
		default:
			it, derr := col.AddLine(dec, line)
			if derr != nil {
				out.Skipped = append(out.Skipped, Skipped{name, n, derr})
				break
			}
			out.Resources[it.ResourceType]++
			if observe != nil {
				observe(it)
			}
		}
		if errors.Is(err, io.EOF) {
			return nil
		}
	}
}

// readLine returns the next line without its newline; a line over
// MaxLineBytes is consumed and reported as too long.
func readLine(r *bufio.Reader) (line []byte, tooLong bool, err error) {
	return bulk.ReadLine(r, MaxLineBytes)
}

// ReasonCounts counts omissions by reason, in the vocabulary's order.
func ReasonCounts(om []derive.Omission) []ReasonCount {
	counts := make(map[derive.Reason]int)
	for _, o := range om {
		counts[o.Reason]++
	}
	return CountsInOrder(counts)
}

// CountsInOrder lists counts by reason in the vocabulary's order, then any
// reason outside it alphabetically; zero counts are left out.
func CountsInOrder(counts map[derive.Reason]int) []ReasonCount {
	var out []ReasonCount
	seen := make(map[derive.Reason]bool)
	for _, r := range derive.AllReasons() {
		if counts[r] > 0 {
			out = append(out, ReasonCount{r, counts[r]})
		}
		seen[r] = true
	}
	rest := make([]string, 0, len(counts))
	for r, n := range counts {
		if !seen[r] && n > 0 {
			rest = append(rest, string(r))
		}
	}
	sort.Strings(rest)
	for _, r := range rest {
		out = append(out, ReasonCount{derive.Reason(r), counts[derive.Reason(r)]})
	}
	return out
}

// ReasonCount is one reason and how often it was given.
type ReasonCount struct {
	Reason derive.Reason
	N      int
}
