package cli

import (
	"context"
	"errors"
	"flag"
	"fmt"
	"io"
	"os"
	"time"

	"github.com/deadspace-fhir/deadspace/api/backfill"
	"github.com/deadspace-fhir/deadspace/api/serve"
	"github.com/deadspace-fhir/deadspace/api/settings"
	"github.com/deadspace-fhir/deadspace/fhir/bulk"
)

const backfillUsage = `usage: deadspace backfill [flags] [FILE...]

Derives a unit's history and writes it to the FHIR server as serve would, exactly once.
Without files it runs a Bulk Data export on the server (--export system, patient or
group with --group); with files it reads NDJSON as replay does. Interrupted, it resumes
when run again with the same arguments and --state-dir. Every flag can also be set by
an environment variable, as for serve (DEADSPACE_STATE_DIR, DEADSPACE_FHIR_TOKEN, ...).

Flags:`

// exportOnlyFlags apply to a Bulk Data export and make no sense with files.
var exportOnlyFlags = map[string]bool{"export": true, "group": true, "since": true, "type-filter": true, "export-base": true}

func backfillCommand(ctx context.Context, args []string, getenv func(string) string, version string, stderr io.Writer) int {
	fs := settings.NewCommand("backfill", backfillUsage, stderr)
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
	files, help, err := settings.ParseCommand(fs, args)
	if help {
		return settings.ExitOK
	}
	errs := []error{err, conn.ApplyEnv(fs, getenv), conn.ValidateFHIR()}
	resolved, err := derivation.Resolve(version)
	errs = append(errs, err)
	opts := backfill.Options{
		Derive: resolved.Derive, Decode: resolved.Decode, Encode: resolved.Encode, Files: files,
		TypeFilter: *typeFilter, StateDir: *stateDir, DryRun: *dryRun, MaxTransactionEntries: conn.MaxTxEntries,
	}
	// The server written to is the service's own: an absolute reference to
	// it is the same resource as the relative one (fhir/ref's Key).
	opts.Decode.Base = conn.FHIRBase
	if len(files) > 0 {
		fs.Visit(func(f *flag.Flag) {
			if exportOnlyFlags[f.Name] {
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
		return settings.ExitUsage
	}
	terminal := stderr == io.Writer(os.Stderr) && isTerminal(os.Stderr)
	log := newLogger(stderr, *logLevel)
	if conn.FHIRBase != "" {
		if opts.Client, err = serve.FHIRClient(conn, version, log, nil); err != nil {
			log.Error("start-up failed", "err", err)
			return settings.ExitFailed
		}
	}
	if *exportBase != "" {
		exp := conn
		exp.FHIRBase = *exportBase
		if opts.ExportClient, err = serve.FHIRClient(exp, version, log, nil); err != nil {
			log.Error("start-up failed", "err", err)
			return settings.ExitFailed
		}
	}
	opts.Logger, opts.Progress, opts.Terminal = log, stderr, terminal
	sum, err := backfill.Run(ctx, opts)
	_ = backfill.WriteSummary(stderr, sum)
	if err != nil {
		fmt.Fprintf(stderr, "deadspace backfill: %v\n", err)
		return settings.ExitFailed
	}
	if sum.SkippedLines > 0 {
		return settings.ExitSkipped
	}
	return settings.ExitOK
}
