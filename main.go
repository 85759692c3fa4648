// Command deadspace derives the dead-space picture of ventilated patients
// from FHIR Observations: arterial blood gases paired with ventilator and
// capnography readings, written back as derived Observations that cite their
// inputs.
//
// Usage:
//
//	deadspace replay [flags] FILE...   derive from NDJSON files, offline
//	deadspace serve [flags]            the live service
//	deadspace backfill [flags] [FILE...] derive history (a Bulk Data export
//	                                   or NDJSON files) and write it back
//	deadspace submit [flags] FILE...   send NDJSON files to a running serve
//	deadspace deadletters [flags] list | show ID | retry ID
//	                                   writes the FHIR server refused for good
//	deadspace version                  print the version (also --version)
//
// Run "deadspace replay -h", "deadspace serve -h" or "deadspace backfill -h"
// for the flags.
package main

import (
	"context"
	"errors"
	"flag"
	"fmt"
	"io"
	"log/slog"
	"os"
	"os/signal"
	"syscall"
	"time"

	"github.com/deadspace-fhir/deadspace/api/backfill"
	"github.com/deadspace-fhir/deadspace/api/deadletters"
	"github.com/deadspace-fhir/deadspace/api/logredact"
	"github.com/deadspace-fhir/deadspace/api/replay"
	"github.com/deadspace-fhir/deadspace/api/serve"
	"github.com/deadspace-fhir/deadspace/api/settings"
	"github.com/deadspace-fhir/deadspace/api/submit"
	"github.com/deadspace-fhir/deadspace/api/ui"
	"github.com/deadspace-fhir/deadspace/derive"
	"github.com/deadspace-fhir/deadspace/fhir/bulk"
)

// version is stamped at build time with -ldflags "-X main.version=…".
var version = "dev"

// Exit codes: 0 all well, 1 the run failed, 2 bad usage, 3 the run finished
// but skipped input lines.
const (
	exitOK      = 0
	exitFailed  = 1
	exitUsage   = 2
	exitSkipped = 3
)

func main() {
	ctx, stop := signal.NotifyContext(context.Background(), os.Interrupt, syscall.SIGTERM)
	defer stop()
	os.Exit(run(ctx, os.Args[1:], os.Stdout, os.Stderr))
}

// usage lists the commands; each command's -h lists its flags.
const usage = `usage: deadspace COMMAND [flags]

deadspace derives the dead-space picture of ventilated patients from FHIR R4
Observations and writes it back as derived Observations citing their inputs.

Commands:
  replay [flags] FILE...   derive from NDJSON files of FHIR resources, offline
  serve [flags]            run the live service beside a FHIR server
  backfill [flags] [FILE...]
                           derive history (a Bulk Data export or NDJSON files)
                           and write it back to the FHIR server
  submit [flags] FILE...   send NDJSON files to a running serve over gRPC
  deadletters [flags] list | show ID | retry ID
                           the writes the FHIR server refused for good
  version                  print the version and the algorithm version

Run "deadspace COMMAND -h" for a command's flags; "deadspace --version" also
prints the version.
`

func run(ctx context.Context, args []string, stdout, stderr io.Writer) int {
	if len(args) == 0 {
		fmt.Fprint(stderr, usage)
		return exitUsage
	}
	// Every command logs through the one redacting handler; serve replaces
	// it with one at its --log-level.
	slog.SetDefault(newLogger(stderr, "warn"))
	switch args[0] {
	case "replay":
		return runReplay(ctx, args[1:], os.Getenv, stdout, stderr)
	case "serve":
		return runServe(ctx, args[1:], os.Getenv, stderr)
	case "backfill":
		return runBackfill(ctx, args[1:], os.Getenv, stderr)
	case "submit":
		return runSubmit(ctx, args[1:], stdout, stderr)
	case "deadletters":
		return deadletters.Main(ctx, args[1:], os.Getenv, stdout, stderr)
	case "version", "-version", "--version":
		fmt.Fprintf(stdout, "deadspace %s (algorithm %s)\n", version, derive.AlgorithmVersion)
		return exitOK
	case "-h", "-help", "--help", "help":
		fmt.Fprint(stdout, usage)
		return exitOK
	}
	fmt.Fprintf(stderr, "deadspace: unknown command %q\n\n%s", args[0], usage)
	return exitUsage
}

func runReplay(ctx context.Context, args []string, getenv func(string) string, stdout, stderr io.Writer) int {
	fs := flag.NewFlagSet("replay", flag.ContinueOnError)
	fs.SetOutput(stderr)
	fs.Usage = func() {
		fmt.Fprintln(stderr, "usage: deadspace replay [flags] FILE...\n\nReads NDJSON files of FHIR R4 resources (Observation and Patient, any order),\nderives, and writes the derived resources as NDJSON, or a table with --format table.\nA summary of counts goes to stderr. Exit status 3 means some lines were skipped.\nEvery flag can also be set by an environment variable, as for serve\n(--barometric-pressure is DEADSPACE_BAROMETRIC_PRESSURE).\n\nFlags:")
		fs.PrintDefaults()
	}
	var derivation settings.Derivation
	derivation.Register(fs)
	outPath := fs.String("out", "", "write the output to this file instead of stdout")
	format := fs.String("format", "ndjson", "output format: ndjson (FHIR resources) or table (a readable summary)")
	issued := fs.String("issued", "", "RFC 3339 time to stamp as issued and recorded (default: now); fix it for reproducible output")
	codeSystemPath := fs.String("codesystem", "", "also write the project's CodeSystem (every derived code with its definition and unit, FHIR R4 JSON) to this file")
	omissionsPath := fs.String("omissions", "", "also write every input left out and every value not emitted to this file, one JSON object a line (reference, reason, detail)")
	htmlPath := fs.String("html", "", "also write a self-contained HTML report (overview, timelines, explanations) to this file")
	files, err := settings.ParseInterspersed(fs, args)
	if err != nil {
		if errors.Is(err, flag.ErrHelp) {
			return exitOK
		}
		return exitUsage
	}
	var errs []error
	if err := settings.ApplyEnv(fs, getenv); err != nil {
		errs = append(errs, err)
	}
	resolved, err := derivation.Resolve(version)
	if err != nil {
		errs = append(errs, err)
	}
	cfg, decOpts, encOpts := resolved.Derive, resolved.Decode, resolved.Encode
	if *format != "ndjson" && *format != "table" {
		errs = append(errs, fmt.Errorf("--format must be ndjson or table, got %q", *format))
	}
	encOpts.Issued = time.Now().UTC().Truncate(time.Second)
	if *issued != "" {
		t, err := time.Parse(time.RFC3339, *issued)
		if err != nil {
			errs = append(errs, fmt.Errorf("--issued: %w", err))
		}
		encOpts.Issued = t.UTC()
	}
	if len(files) == 0 {
		errs = append(errs, errors.New("no input files"))
	}
	if len(errs) > 0 {
		fmt.Fprintf(stderr, "deadspace replay: %v\n", errors.Join(errs...))
		return exitUsage
	}

	opts := replay.Options{Derive: cfg, Decode: decOpts, Encode: encOpts}
	var recorder *ui.Recorder
	if *htmlPath != "" {
		recorder = ui.NewRecorder()
		opts.Observe = recorder.Add
	}
	out, err := replay.Run(ctx, opts, files)
	if err != nil {
		fmt.Fprintf(stderr, "deadspace replay: %v\n", err)
		return exitFailed
	}
	if recorder != nil {
		source := fmt.Sprintf("replay of %d files, %d lines", len(files), out.Lines)
		if err := ui.WriteReportFile(*htmlPath, ui.FromReplay(out, recorder, cfg.Window, encOpts.Issued, source)); err != nil {
			fmt.Fprintf(stderr, "deadspace replay: %v\n", err)
			return exitFailed
		}
	}
	w := stdout
	var file *os.File
	if *outPath != "" {
		file, err = os.Create(*outPath)
		if err != nil {
			fmt.Fprintf(stderr, "deadspace replay: %v\n", err)
			return exitFailed
		}
		w = file
	}
	if *format == "table" {
		err = replay.WriteTable(w, out)
	} else {
		err = replay.WriteNDJSON(w, out)
	}
	if file != nil {
		if cerr := file.Close(); err == nil {
			err = cerr
		}
	}
	if err != nil {
		fmt.Fprintf(stderr, "deadspace replay: %v\n", err)
		return exitFailed
	}
	if *codeSystemPath != "" {
		if err := writeFile(*codeSystemPath, func(w io.Writer) error { return replay.WriteCodeSystem(w, encOpts) }); err != nil {
			fmt.Fprintf(stderr, "deadspace replay: --codesystem: %v\n", err)
			return exitFailed
		}
	}
	if *omissionsPath != "" {
		if err := writeFile(*omissionsPath, func(w io.Writer) error { return replay.WriteOmissions(w, out) }); err != nil {
			fmt.Fprintf(stderr, "deadspace replay: --omissions: %v\n", err)
			return exitFailed
		}
	}
	_ = replay.WriteSummary(stderr, out)
	if len(out.Skipped) > 0 {
		return exitSkipped
	}
	return exitOK
}

// writeFile creates path and writes it with write, reporting the first
// error of writing or closing.
func writeFile(path string, write func(io.Writer) error) error {
	f, err := os.Create(path)
	if err != nil {
		return err
	}
	err = write(f)
	if cerr := f.Close(); err == nil {
		err = cerr
	}
	return err
}

func runServe(ctx context.Context, args []string, getenv func(string) string, stderr io.Writer) int {
	fs := flag.NewFlagSet("serve", flag.ContinueOnError)
	fs.SetOutput(stderr)
	var cfg serve.Config
	cfg.Bind(fs)
	fs.Usage = func() {
		fmt.Fprintln(stderr, "usage: deadspace serve [flags]\n\nRuns the live service. Every flag can also be set by an environment variable:\nDEADSPACE_ and the flag name in upper case, dashes as underscores (--fhir-base is DEADSPACE_FHIR_BASE).\nThe FHIR bearer token comes only from DEADSPACE_FHIR_TOKEN or --fhir-token-file.\n\nFlags:")
		fs.PrintDefaults()
	}
	if err := fs.Parse(args); err != nil {
		if errors.Is(err, flag.ErrHelp) {
			return exitOK
		}
		return exitUsage
	}
	if fs.NArg() > 0 {
		fmt.Fprintf(stderr, "deadspace serve: unexpected arguments %q\n", fs.Args())
		return exitUsage
	}
	err := cfg.ApplyEnv(fs, getenv)
	if verr := cfg.Validate(); verr != nil {
		err = errors.Join(err, verr)
	}
	if err != nil {
		fmt.Fprintf(stderr, "deadspace serve: configuration:\n%v\n", err)
		return exitUsage
	}
	log := newLogger(stderr, cfg.LogLevel)
	slog.SetDefault(log)
	svc, err := serve.New(cfg, version, log)
	if err != nil {
		log.Error("start-up failed", "err", err)
		return exitFailed
	}
	if err := svc.Run(ctx); err != nil {
		log.Error("service failed", "err", err)
		return exitFailed
	}
	return exitOK
}

// newLogger writes JSON lines through the one redacting handler: whatever
// text reaches a log line, patient and resource identifiers and a FHIR
// server's own wording are removed there (api/logredact).
func newLogger(w io.Writer, level string) *slog.Logger {
	var l slog.Level
	_ = l.UnmarshalText([]byte(level))
	return logredact.NewLogger(w, l)
}

func runBackfill(ctx context.Context, args []string, getenv func(string) string, stderr io.Writer) int {
	fs := flag.NewFlagSet("backfill", flag.ContinueOnError)
	fs.SetOutput(stderr)
	fs.Usage = func() {
		fmt.Fprintln(stderr, "usage: deadspace backfill [flags] [FILE...]\n\nDerives a unit's history and writes it to the FHIR server as serve would, exactly once.\nWithout files it runs a Bulk Data export on the server (--export system, patient or\ngroup with --group); with files it reads NDJSON as replay does. Interrupted, it resumes\nwhen run again with the same arguments and --state-dir. Every flag can also be set by\nan environment variable, as for serve (DEADSPACE_STATE_DIR, DEADSPACE_FHIR_TOKEN, ...).\n\nFlags:")
		fs.PrintDefaults()
	}
	var derivation settings.Derivation
	derivation.Register(fs)
	var conn serve.Config
	conn.BindFHIR(fs)
	exportBase := fs.String("export-base", "", "base URL of the Bulk Data server when it is not --fhir-base (same credentials)")
	level := fs.String("export", "system", "export level when no files are given: system, patient or group")
	group := fs.String("group", "", "Group id for --export group (setting it implies --export group)")
	since := fs.String("since", "", "RFC 3339 instant: export only resources changed after it (_since)")
	typeFilter := fs.Bool("type-filter", true, "ask the server for only the Observation codes this service recognises (_typeFilter; dropped if the server refuses it)")
	stateDir := fs.String("state-dir", "deadspace-backfill", "directory of the resumable state (an embedded store) and the downloads")
	dryRun := fs.Bool("dry-run", false, "derive and report counts without writing to the FHIR server")
	logLevel := fs.String("log-level", "info", "debug, info, warn or error")
	files, err := settings.ParseInterspersed(fs, args)
	if err != nil {
		if errors.Is(err, flag.ErrHelp) {
			return exitOK
		}
		return exitUsage
	}
	errs := []error{conn.ApplyEnv(fs, getenv), conn.ValidateFHIR()}
	resolved, err := derivation.Resolve(version)
	errs = append(errs, err)
	cfg, decOpts, encOpts := resolved.Derive, resolved.Decode, resolved.Encode
	opts := backfill.Options{
		Derive: cfg, Decode: decOpts, Encode: encOpts, Files: files, TypeFilter: *typeFilter,
		StateDir: *stateDir, DryRun: *dryRun, MaxTransactionEntries: conn.MaxTxEntries,
	}
	if len(files) > 0 {
		fs.Visit(func(f *flag.Flag) {
			switch f.Name {
			case "export", "group", "since", "type-filter", "export-base":
				errs = append(errs, fmt.Errorf("--%s applies to an export, not to NDJSON files", f.Name))
			}
		})
	} else {
		req := bulk.Request{Level: bulk.Level(*level), GroupID: *group}
		if *group != "" {
			req.Level = bulk.Group
		}
		if *since != "" {
			t, err := time.Parse(time.RFC3339Nano, *since)
			errs = append(errs, err)
			req.Since = t
		}
		errs = append(errs, req.Validate())
		opts.Export = &req
		if conn.FHIRBase == "" && *exportBase == "" {
			errs = append(errs, errors.New("give NDJSON files, or --fhir-base (or --export-base) to run an export"))
		}
	}
	if conn.FHIRBase == "" && !*dryRun {
		errs = append(errs, errors.New("--fhir-base is required to write (or use --dry-run)"))
	}
	if err := errors.Join(errs...); err != nil {
		fmt.Fprintf(stderr, "deadspace backfill: configuration:\n%v\n", err)
		return exitUsage
	}
	terminal := stderr == io.Writer(os.Stderr) && isTerminal(os.Stderr)
	log := newLogger(stderr, *logLevel)
	if conn.FHIRBase != "" {
		if opts.Client, err = serve.FHIRClient(conn, version, log, nil); err != nil {
			log.Error("start-up failed", "err", err)
			return exitFailed
		}
	}
	if *exportBase != "" {
		exp := conn
		exp.FHIRBase = *exportBase
		if opts.ExportClient, err = serve.FHIRClient(exp, version, log, nil); err != nil {
			log.Error("start-up failed", "err", err)
			return exitFailed
		}
	}
	opts.Logger, opts.Progress, opts.Terminal = log, stderr, terminal
	sum, err := backfill.Run(ctx, opts)
	_ = backfill.WriteSummary(stderr, sum)
	if err != nil {
		fmt.Fprintf(stderr, "deadspace backfill: %v\n", err)
		return exitFailed
	}
	if sum.SkippedLines > 0 {
		return exitSkipped
	}
	return exitOK
}

// isTerminal reports whether f is a character device (a terminal), without
// a dependency: progress is redrawn in place only there.
func isTerminal(f *os.File) bool {
	fi, err := f.Stat()
	return err == nil && fi.Mode()&os.ModeCharDevice != 0
}

func runSubmit(ctx context.Context, args []string, stdout, stderr io.Writer) int {
	fs := flag.NewFlagSet("submit", flag.ContinueOnError)
	fs.SetOutput(stderr)
	fs.Usage = func() {
		fmt.Fprintln(stderr, "usage: deadspace submit [flags] FILE...\n\nSends NDJSON files of FHIR R4 resources to a running deadspace serve over gRPC\n(the Submit call), in chunks, with progress on stderr, and reports what was\naccepted and why anything was not. Exit status 3 means some lines were not accepted.\n\nFlags:")
		fs.PrintDefaults()
	}
	var opts submit.Options
	fs.StringVar(&opts.Addr, "addr", "127.0.0.1:9090", "gRPC address of the running service (its --grpc-listen)")
	fs.StringVar(&opts.CAFile, "ca", "", "PEM CA bundle that signed the service's certificate (TLS); without it, plaintext")
	fs.StringVar(&opts.CertFile, "cert", "", "PEM client certificate, for a service with --grpc-client-ca")
	fs.StringVar(&opts.KeyFile, "key", "", "PEM private key of --cert")
	fs.IntVar(&opts.ChunkBytes, "chunk-bytes", submit.DefaultChunkBytes, "NDJSON bytes sent per call")
	quiet := fs.Bool("quiet", false, "no progress lines")
	files, err := settings.ParseInterspersed(fs, args)
	if err != nil {
		if errors.Is(err, flag.ErrHelp) {
			return exitOK
		}
		return exitUsage
	}
	if len(files) == 0 {
		fmt.Fprintln(stderr, "deadspace submit: no input files")
		return exitUsage
	}
	if !*quiet {
		opts.Progress = stderr
	}
	sum, err := submit.Run(ctx, opts, files)
	submit.WriteSummary(stdout, sum)
	switch {
	case errors.Is(err, submit.ErrNotAllAccepted):
		return exitSkipped
	case err != nil:
		fmt.Fprintf(stderr, "deadspace submit: %v\n", err)
		return exitFailed
	}
	return exitOK
}
