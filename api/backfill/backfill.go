// Package backfill derives a unit's history and writes it to the FHIR
// server exactly as the live service would have: from a FHIR Bulk Data
// export it kicks off and downloads (package fhir/bulk), or from local
// NDJSON files (the input of replay).
//
// It runs the live engine (api/engine) as a batch: the resources go through
// Engine.Ingest into an embedded store in its own state directory, every
// patient is evaluated with EvaluateNow, and the outbox is drained with
// FlushNow. So the derivation is the same code path as serve and replay,
// and the writes are serve's conditional transactions with the same
// Provenance and software Device: a second run, or a run after serve wrote
// some of the same values, leaves one of each on the server.
//
// The deletions the input lists (an export's deleted files, Bundles of
// DELETE entries among local files) are applied after the resources are
// stored, through Engine.Deleted as serve applies them; deleted.go says
// where in the version order each is placed.
//
// The state directory makes a run resumable. The store keeps what was
// ingested, which patients are still to evaluate and which writes the
// server has not acknowledged; a run interrupted and started again with the
// same arguments skips the input it finished reading, evaluates what is
// left and sends only the writes still in the outbox.
//
// Memory is bounded by the largest patient, not by the export: files stream
// to disk, then into the store in batches, and evaluation loads one
// patient's inputs at a time.
package backfill

import (
	"context"
	"crypto/sha256"
	"encoding/hex"
	"encoding/json"
	"errors"
	"fmt"
	"io"
	"log/slog"
	"os"
	"path/filepath"
	"sort"
	"strings"
	"sync"
	"sync/atomic"
	"time"

	"github.com/deadspace-fhir/deadspace/api/engine"
	"github.com/deadspace-fhir/deadspace/api/replay"
	"github.com/deadspace-fhir/deadspace/api/store/boltstore"
	"github.com/deadspace-fhir/deadspace/derive"
	"github.com/deadspace-fhir/deadspace/fhir/bulk"
	"github.com/deadspace-fhir/deadspace/fhir/client"
	"github.com/deadspace-fhir/deadspace/fhir/codes"
	"github.com/deadspace-fhir/deadspace/fhir/decode"
	"github.com/deadspace-fhir/deadspace/fhir/encode"
)

// Options configure a backfill. Exactly one of Files and Export is set.
type Options struct {
	// Derive, Decode and Encode are the derivation settings: the same flags
	// as replay and serve.
	Derive derive.Config
	Decode decode.Options
	Encode encode.Options

	// Client is the FHIR server the results are written to. It may be nil
	// only with DryRun.
	Client *client.Client
	// MaxTransactionEntries caps one transaction, as in serve.
	MaxTransactionEntries int

	// Files are local NDJSON files to read.
	Files []string
	// Export is the Bulk Data export to run; ExportClient is the server it
	// runs on (nil: Client).
	Export       *bulk.Request
	ExportClient *client.Client
	// TypeFilter sends _typeFilter with the codes this service recognises,
	// so the server exports only the Observations that matter.
	TypeFilter bool

	// StateDir holds the store (the resumable state) and the downloaded
	// files until they are read. A second backfill with the same state
	// directory waits for the first to finish.
	StateDir string
	// DryRun derives and counts without writing anything to the server,
	// in a throwaway state directory.
	DryRun bool

	// Progress receives progress: a redrawn status line when Terminal, or
	// else nothing (the log carries plain progress lines every
	// ProgressEvery).
	Progress      io.Writer
	Terminal      bool
	ProgressEvery time.Duration
	Logger        *slog.Logger

	// BatchSize is how many resources go into the store per call (default
	// 500): it bounds memory while reading.
	BatchSize int
	// StallTimeout ends the write phase when the outbox makes no progress
	// for this long (default 10 minutes); what is left is sent by the next
	// run.
	StallTimeout time.Duration
}

// Summary is what a backfill did.
type Summary struct {
	DryRun bool
	// Resumed is true when the input had been read by an earlier,
	// interrupted run and was not read again.
	Resumed bool
	// Files and Bytes are the input files read (or downloaded).
	Files int
	Bytes int64
	// Resources counts resources read by type; Ignored are resources this
	// service has no use for; Rejected counts left-out inputs by reason.
	Resources map[string]int
	Accepted  int
	Ignored   int
	Rejected  map[derive.Reason]int
	// SkippedLines counts lines that were not resources; Skipped describes
	// the first few (file and line, never the content).
	SkippedLines int
	Skipped      []string
	// Patients evaluated; Derived counts ledger entries decided, by status
	// (final, amended, entered-in-error).
	Patients int
	Derived  map[string]int
	// Writes acknowledged by the server in this run; DeadLetters refused
	// for good (they stay in the state directory's dead letters);
	// Pending are left in the outbox (the run was interrupted or stalled).
	Writes      int
	DeadLetters int
	Pending     int
	// Deletions are the resources the input lists as deleted, and what
	// became of them.
	Deletions Deletions
	// TransactionTime of the export: the _since of the next incremental
	// backfill.
	TransactionTime time.Time
	// ExportIssues are the export's error-file messages.
	ExportIssues []bulk.Issue
}

const (
	// inputMarker, in the state directory, holds the fingerprint of the
	// input that an unfinished run stored completely. It is a file beside
	// the store, not a record in it, so backfill needs nothing of the store
	// but what the engine uses.
	inputMarker = "input-read"
	mode        = "backfill" // the engine's input mode
	retention   = 100 * 365 * 24 * time.Hour
)

// ErrIncomplete: the run ended with writes still pending; run again.
var ErrIncomplete = errors.New("backfill: writes are still pending; run again with the same arguments to send them")

// Run runs a backfill.
func Run(ctx context.Context, opts Options) (Summary, error) {
	if err := opts.check(); err != nil {
		return Summary{}, err
	}
	if opts.Logger == nil {
		opts.Logger = slog.New(slog.DiscardHandler)
	}
	if opts.BatchSize <= 0 {
		opts.BatchSize = 500
	}
	if opts.StallTimeout <= 0 {
		opts.StallTimeout = 10 * time.Minute
	}
	if opts.ProgressEvery <= 0 {
		opts.ProgressEvery = 10 * time.Second
		if opts.Terminal {
			opts.ProgressEvery = 500 * time.Millisecond
		}
	}
	log := opts.Logger
	dir := opts.StateDir
	if opts.DryRun {
		tmp, err := os.MkdirTemp("", "deadspace-dry-run-*")
		if err != nil {
			return Summary{}, fmt.Errorf("backfill: %w", err)
		}
		defer os.RemoveAll(tmp)
		dir = tmp
	}
	st, err := boltstore.Open(filepath.Join(dir, "backfill.db"), boltstore.Options{})
	if err != nil {
		return Summary{}, fmt.Errorf("backfill: state directory: %w", err)
	}
	defer st.Close()

	table := opts.Decode.Table
	if table == nil {
		table = codes.Default()
	}
	enc, err := encode.New(opts.Encode)
	if err != nil {
		return Summary{}, fmt.Errorf("backfill: %w", err)
	}
	sum := Summary{DryRun: opts.DryRun, Resources: map[string]int{}, Rejected: map[derive.Reason]int{}, Derived: map[string]int{}}
	p := newProgress(opts, st.Stats)
	var mu sync.Mutex
	writeClient := opts.Client
	if opts.DryRun {
		writeClient = nil
	}
	eng, err := engine.New(engine.Config{
		Store: st, Decoder: decode.New(opts.Decode), Encoder: enc, Derive: opts.Derive, Client: writeClient,
		// Everything in the export is derived: nothing is too old, and
		// nothing waits for late readings (the export is all there is).
		Settle: 0, Retention: retention, SearchCodes: table.SearchTokens(),
		MaxTransactionEntries: opts.MaxTransactionEntries, Logger: log,
		Hooks: engine.Hooks{
			Emitted: func(_ string, status string) {
				mu.Lock()
				sum.Derived[status]++
				mu.Unlock()
			},
			WriteResult: func(outcome string) {
				switch outcome {
				case "acknowledged":
					p.writes.Add(1)
				case "dead-letter":
					p.dead.Add(1)
				}
			},
		},
	})
	if err != nil {
		return Summary{}, fmt.Errorf("backfill: %w", err)
	}
	stopProgress := p.start(ctx, log)
	defer stopProgress()

	fp := opts.fingerprint()
	marker := filepath.Join(dir, inputMarker)
	done, err := os.ReadFile(marker)
	if err != nil && !errors.Is(err, os.ErrNotExist) {
		return sum, fmt.Errorf("backfill: %w", err)
	}
	if string(done) == fp {
		sum.Resumed = true
		log.InfoContext(ctx, "resuming: the input was read by an earlier run")
	} else {
		if err := readInput(ctx, opts, eng, table, dir, p, &sum, log); err != nil {
			return sum, err
		}
		if err := writeFileSynced(marker, []byte(fp)); err != nil {
			return sum, fmt.Errorf("backfill: %w", err)
		}
	}

	p.setPhase("derive")
	if err := evaluateAll(ctx, eng, st, p); err != nil {
		return sum, err
	}
	sum.Patients = int(p.patients.Load())

	if !opts.DryRun {
		p.setPhase("write")
		if err := flushAll(ctx, eng, st, p, opts.StallTimeout); err != nil {
			sum.Writes, sum.DeadLetters = int(p.writes.Load()), int(p.dead.Load())
			if stats, serr := st.Stats(context.WithoutCancel(ctx)); serr == nil {
				sum.Pending = stats.OutboxDepth
			}
			return sum, err
		}
	}
	sum.Writes, sum.DeadLetters = int(p.writes.Load()), int(p.dead.Load())
	// Finished: the next run with the same arguments reads its input
	// again (there may be new data), and finds everything it derives
	// already recorded.
	if err := os.Remove(marker); err != nil && !errors.Is(err, os.ErrNotExist) {
		return sum, fmt.Errorf("backfill: %w", err)
	}
	p.setPhase("done")
	return sum, nil
}

// writeFileSynced writes a small file durably: a temporary file, fsync,
// rename, fsync of the directory.
func writeFileSynced(path string, data []byte) error {
	tmp := path + ".tmp"
	f, err := os.OpenFile(tmp, os.O_WRONLY|os.O_CREATE|os.O_TRUNC, 0o600)
	if err != nil {
		return err
	}
	if _, err := f.Write(data); err != nil {
		f.Close()
		return err
	}
	if err := f.Sync(); err != nil {
		f.Close()
		return err
	}
	if err := f.Close(); err != nil {
		return err
	}
	if err := os.Rename(tmp, path); err != nil {
		return err
	}
	d, err := os.Open(filepath.Dir(path))
	if err != nil {
		return err
	}
	defer d.Close()
	return d.Sync()
}

func (o Options) check() error {
	var errs []error
	if (len(o.Files) > 0) == (o.Export != nil) {
		errs = append(errs, errors.New("backfill: give either NDJSON files or an export to run, not both or neither"))
	}
	if o.Export != nil {
		if err := o.Export.Validate(); err != nil {
			errs = append(errs, fmt.Errorf("backfill: export: %w", err))
		}
		if o.ExportClient == nil && o.Client == nil {
			errs = append(errs, errors.New("backfill: an export needs a FHIR server"))
		}
	}
	if o.Client == nil && !o.DryRun {
		errs = append(errs, errors.New("backfill: a FHIR server to write to is required (or --dry-run)"))
	}
	if o.StateDir == "" && !o.DryRun {
		errs = append(errs, errors.New("backfill: a state directory is required"))
	}
	if err := o.Derive.Validate(); err != nil {
		errs = append(errs, fmt.Errorf("backfill: %w", err))
	}
	return errors.Join(errs...)
}

// fingerprint names the input, so a resumed run knows whether the stored
// input is the one it was asked to read.
func (o Options) fingerprint() string {
	h := sha256.New()
	if o.Export != nil {
		fmt.Fprintf(h, "export\x00%s\x00%s\x00%s\x00%s\x00%v\x00", o.Export.Level, o.Export.GroupID,
			strings.Join(o.Export.Types, ","), o.Export.Since.UTC().Format(time.RFC3339Nano), o.TypeFilter)
		if c := o.exportClient(); c != nil {
			fmt.Fprintf(h, "%s\x00", c.BaseURL())
		}
	}
	for _, f := range o.Files {
		abs, err := filepath.Abs(f)
		if err != nil {
			abs = f
		}
		fmt.Fprintf(h, "file\x00%s\x00", abs)
	}
	return hex.EncodeToString(h.Sum(nil))
}

func (o Options) exportClient() *client.Client {
	if o.ExportClient != nil {
		return o.ExportClient
	}
	return o.Client
}

// readInput runs the export (or takes the local files), stores every
// resource through the engine, and then applies the deletions the input
// lists (an export's deleted files, Bundles of DELETE entries in local
// files) through the engine.
func readInput(ctx context.Context, opts Options, eng *engine.Engine, table *codes.Table, dir string, p *progress, sum *Summary, log *slog.Logger) error {
	files := opts.Files
	dels := newDeletions()
	if opts.Export != nil {
		p.setPhase("export")
		req := *opts.Export
		if len(req.Types) == 0 {
			req.Types = []string{"Patient", "Observation"}
		}
		if opts.TypeFilter {
			if tokens := table.SearchTokens(); len(tokens) > 0 {
				req.TypeFilters = []string{"Observation?code=" + strings.Join(tokens, ",")}
			}
		}
		downloads := filepath.Join(dir, "export")
		if err := os.RemoveAll(downloads); err != nil {
			return fmt.Errorf("backfill: %w", err)
		}
		x, err := bulk.New(bulk.Config{
			Client: opts.exportClient(), Dir: downloads, Logger: log,
			Hooks: bulk.Hooks{
				KickedOff: func(filtered bool) {
					log.InfoContext(ctx, "export started", "type_filter", filtered)
				},
				Running: func(progress string, wait time.Duration) {
					p.setExport(progress)
				},
				Throttled: func(wait time.Duration) {
					log.InfoContext(ctx, "the server asked to wait", "wait", wait)
				},
				Manifest: func(m bulk.Manifest) {
					p.filesTotal.Store(int64(len(m.Output) + len(m.Deleted)))
					log.InfoContext(ctx, "export complete", "files", len(m.Output), "error_files", len(m.Error), "deleted_files", len(m.Deleted))
				},
				Bytes:    func(n int64) { p.bytes.Add(n) },
				FileDone: func(bulk.LocalFile) { p.files.Add(1) },
			},
		})
		if err != nil {
			return fmt.Errorf("backfill: %w", err)
		}
		res, err := x.Export(ctx, req, []string{"Patient", "Observation"})
		if err != nil {
			return fmt.Errorf("backfill: %w", err)
		}
		defer os.RemoveAll(downloads)
		sum.TransactionTime = res.Manifest.TransactionTime
		sum.ExportIssues = res.Issues
		for _, is := range res.Issues {
			log.WarnContext(ctx, "the export reported a problem", "severity", is.Severity, "code", is.Code)
		}
		files = nil
		for _, f := range res.Files {
			files = append(files, f.Path)
		}
		p.setPhase("read")
		for _, f := range res.Deleted {
			if err := readDeletions(ctx, f.Path, -1, true, dels, sum, log); err != nil {
				return err
			}
			sum.Files++
			sum.Bytes += f.Bytes
			sum.Deletions.Files++
		}
	} else {
		var total int64
		for _, f := range files {
			if fi, err := os.Stat(f); err == nil {
				total += fi.Size()
			}
		}
		p.filesTotal.Store(int64(len(files)))
		p.bytesTotal.Store(total)
		p.setPhase("read")
		// A first pass finds the Bundles of DELETE entries among the
		// lines, so that the second can note the versions the input
		// carries of the resources they name.
		for i, name := range files {
			if err := readDeletions(ctx, name, i, false, dels, sum, log); err != nil {
				return err
			}
		}
	}
	p.setPhase("read")
	for i, name := range files {
		if err := ingestFile(ctx, eng, name, i, opts.BatchSize, opts.Export == nil, dels, p, sum); err != nil {
			return err
		}
		sum.Files++
		if opts.Export == nil {
			p.files.Add(1)
		}
	}
	if dels.Len() > 0 {
		p.setPhase("delete")
		log.InfoContext(ctx, "applying the deletions the input lists", "deletions", dels.Len())
		if err := applyDeletions(ctx, eng, dels, sum.TransactionTime, opts.BatchSize, p, sum); err != nil {
			return err
		}
	}
	return nil
}

// ingestFile stores one NDJSON file's resources through the engine in
// batches, leaving out the lines read as deletions and noting the versions
// of the resources they name.
func ingestFile(ctx context.Context, eng *engine.Engine, name string, index, batchSize int, countBytes bool, dels *deletions, p *progress, sum *Summary) error {
	f, err := os.Open(name)
	if err != nil {
		return fmt.Errorf("backfill: %w", err)
	}
	defer f.Close()
	if fi, err := f.Stat(); err == nil {
		sum.Bytes += fi.Size()
	}
	var r io.Reader = f
	if countBytes {
		// Local files: bytes count as they are read, for the time left.
		r = bulk.CountReader(f, func(n int64) { p.bytes.Add(n) })
	}
	batch := make([]json.RawMessage, 0, batchSize)
	flush := func() error {
		if len(batch) == 0 {
			return nil
		}
		rec, err := eng.Ingest(ctx, mode, batch)
		if err != nil {
			return fmt.Errorf("backfill: %s: %w", filepath.Base(name), err)
		}
		sum.Accepted += rec.Accepted
		sum.Ignored += rec.Ignored
		for _, r := range rec.Rejected {
			if r.Reason == derive.ReasonMalformed {
				sum.skip(fmt.Sprintf("%s: %s", filepath.Base(name), r.Detail))
				continue
			}
			sum.Rejected[r.Reason]++
		}
		p.resources.Add(int64(len(batch)))
		batch = batch[:0]
		return nil
	}
	err = bulk.EachLine(r, func(n int, line []byte, tooLong error) error {
		if err := ctx.Err(); err != nil {
			return err
		}
		if tooLong != nil {
			sum.skip(fmt.Sprintf("%s:%d: %v", filepath.Base(name), n, tooLong))
			return nil
		}
		if dels.lines[[2]int{index, n}] {
			return nil
		}
		var head struct {
			ResourceType string `json:"resourceType"`
			ID           string `json:"id"`
			Meta         struct {
				LastUpdated string `json:"lastUpdated"`
			} `json:"meta"`
		}
		if err := json.Unmarshal(line, &head); err != nil || head.ResourceType == "" {
			sum.skip(fmt.Sprintf("%s:%d: not a FHIR resource", filepath.Base(name), n))
			return nil
		}
		if dels.Wanted(head.ResourceType) {
			dels.carries(head.ResourceType+"/"+head.ID, head.Meta.LastUpdated)
		}
		sum.Resources[head.ResourceType]++
		batch = append(batch, append(json.RawMessage(nil), line...))
		if len(batch) >= batchSize {
			return flush()
		}
		return nil
	})
	if err != nil {
		if ctx.Err() != nil {
			return fmt.Errorf("backfill: reading %s: %w", filepath.Base(name), ctx.Err())
		}
		return fmt.Errorf("backfill: reading %s: %w", filepath.Base(name), err)
	}
	return flush()
}

// evaluateAll evaluates every dirty patient, one at a time, until none is
// left (a commit that raced a change leaves its patient dirty for another
// pass).
func evaluateAll(ctx context.Context, eng *engine.Engine, st *boltstore.Store, p *progress) error {
	stats, err := st.Stats(ctx)
	if err != nil {
		return fmt.Errorf("backfill: %w", err)
	}
	p.patientsTotal.Store(int64(stats.DirtyPatients))
	for pass := 0; stats.DirtyPatients > 0; pass++ {
		if pass == 5 {
			return fmt.Errorf("backfill: %d patients stay pending after %d evaluation passes", stats.DirtyPatients, pass)
		}
		before := stats.DirtyPatients
		if err := eng.EvaluateNow(ctx); err != nil {
			return fmt.Errorf("backfill: %w", err)
		}
		if err := ctx.Err(); err != nil {
			return fmt.Errorf("backfill: %w", err)
		}
		if stats, err = st.Stats(ctx); err != nil {
			return fmt.Errorf("backfill: %w", err)
		}
		p.patients.Add(int64(before - stats.DirtyPatients))
	}
	return nil
}

// flushAll sends the outbox until it is empty, waiting for retries the
// engine scheduled, and gives up when nothing moves for stall.
func flushAll(ctx context.Context, eng *engine.Engine, st *boltstore.Store, p *progress, stall time.Duration) error {
	stats, err := st.Stats(ctx)
	if err != nil {
		return fmt.Errorf("backfill: %w", err)
	}
	p.writesTotal.Store(int64(stats.OutboxDepth))
	lastMove := time.Now()
	last := stats.OutboxDepth
	for stats.OutboxDepth > 0 {
		eng.FlushNow(ctx)
		if err := ctx.Err(); err != nil {
			return fmt.Errorf("backfill: interrupted with writes pending (run again to send them): %w", err)
		}
		if stats, err = st.Stats(ctx); err != nil {
			return fmt.Errorf("backfill: %w", err)
		}
		if stats.OutboxDepth < last {
			last, lastMove = stats.OutboxDepth, time.Now()
			continue
		}
		if stats.OutboxDepth == 0 {
			break
		}
		if time.Since(lastMove) > stall {
			return fmt.Errorf("%w (%d writes; the log says why)", ErrIncomplete, stats.OutboxDepth)
		}
		// The writes left failed and wait for their retry time.
		t := time.NewTimer(time.Second)
		select {
		case <-ctx.Done():
			t.Stop()
			return fmt.Errorf("backfill: interrupted with writes pending (run again to send them): %w", ctx.Err())
		case <-t.C:
		}
	}
	return nil
}

// skip records a line that was not a resource; only the first few are
// described, so a file of garbage cannot fill memory.
func (s *Summary) skip(what string) {
	s.SkippedLines++
	if len(s.Skipped) < 20 {
		s.Skipped = append(s.Skipped, what)
	}
}

// ReasonCounts lists rejected inputs by reason, in the vocabulary's order.
func (s Summary) ReasonCounts() []replay.ReasonCount { return replay.CountsInOrder(s.Rejected) }

// WriteSummary prints the summary for a person.
func WriteSummary(w io.Writer, s Summary) error {
	var b strings.Builder
	types := make([]string, 0, len(s.Resources))
	for t := range s.Resources {
		types = append(types, t)
	}
	sort.Strings(types)
	var parts []string
	for _, t := range types {
		parts = append(parts, fmt.Sprintf("%s %d", t, s.Resources[t]))
	}
	if s.Resumed {
		fmt.Fprintln(&b, "input: read by an earlier run (resumed)")
	} else {
		fmt.Fprintf(&b, "read %d files, %s (%s); %d used, %d not needed, %d lines skipped\n",
			s.Files, humanBytes(s.Bytes), strings.Join(parts, ", "), s.Accepted, s.Ignored, s.SkippedLines)
	}
	if d := s.Deletions; d.Files > 0 || d.Listed > 0 {
		from := "in Bundles of DELETE entries"
		if d.Files > 0 {
			from = fmt.Sprintf("in %d deleted %s of the export", d.Files, plural(d.Files, "file", "files"))
		}
		fmt.Fprintf(&b, "deleted: %d listed %s; %d applied to what was held, %d older than a version read (kept), %d never held (nothing to do)\n",
			d.Listed, from, d.Applied, d.Older, d.NotHeld)
	}
	fmt.Fprintf(&b, "derived: %d patients evaluated; %d new values, %d revised, %d withdrawn\n",
		s.Patients, s.Derived["final"], s.Derived["amended"], s.Derived["entered-in-error"])
	if s.DryRun {
		fmt.Fprintln(&b, "dry run: nothing was written")
	} else {
		fmt.Fprintf(&b, "written: %d transactions acknowledged, %d refused (dead letters), %d pending\n", s.Writes, s.DeadLetters, s.Pending)
	}
	if rc := s.ReasonCounts(); len(rc) > 0 {
		fmt.Fprintln(&b, "inputs left out:")
		for _, r := range rc {
			fmt.Fprintf(&b, "  %-26s %d\n", r.Reason, r.N)
		}
	}
	for _, is := range s.ExportIssues {
		fmt.Fprintf(&b, "export %s: %s\n", is.Severity, is.Text)
	}
	if !s.TransactionTime.IsZero() {
		fmt.Fprintf(&b, "export transaction time %s: use it as --since for the next backfill\n", s.TransactionTime.Format(time.RFC3339))
	}
	_, err := io.WriteString(w, b.String())
	return err
}

func plural(n int, one, many string) string {
	if n == 1 {
		return one
	}
	return many
}

func humanBytes(n int64) string {
	switch {
	case n >= 1<<30:
		return fmt.Sprintf("%.1f GiB", float64(n)/(1<<30))
	case n >= 1<<20:
		return fmt.Sprintf("%.1f MiB", float64(n)/(1<<20))
	case n >= 1<<10:
		return fmt.Sprintf("%.1f KiB", float64(n)/(1<<10))
	}
	return fmt.Sprintf("%d B", n)
}

// atomicString is a string read by the progress goroutine.
type atomicString struct{ v atomic.Value }

func (a *atomicString) Store(s string) { a.v.Store(s) }
func (a *atomicString) Load() string {
	s, _ := a.v.Load().(string)
	return s
}
