package cli

import (
	"context"
	"errors"
	"fmt"
	"io"
	"net/url"
	"os"
	"time"

	"github.com/deadspace-fhir/deadspace/api/replay"
	"github.com/deadspace-fhir/deadspace/api/settings"
	"github.com/deadspace-fhir/deadspace/api/ui"
)

const replayUsage = `usage: deadspace replay [flags] FILE...

Reads NDJSON files of FHIR R4 resources (Observation and Patient, any order),
derives, and writes the derived resources as NDJSON, or a table with --format table.
A line that is a transaction or batch Bundle of DELETE entries (a bulk export's
deleted file) lists deletions, applied as the live service and backfill apply them.
A summary of counts goes to stderr. Exit status 3 means some lines were skipped.
Every flag can also be set by an environment variable, as for serve
(--barometric-pressure is DEADSPACE_BAROMETRIC_PRESSURE).

Flags:`

func replayCommand(ctx context.Context, args []string, getenv func(string) string, version string, stdout, stderr io.Writer) int {
	fs := settings.NewCommand("replay", replayUsage, stderr)
	var derivation settings.Derivation
	derivation.Register(fs)
	outPath := fs.String("out", "", "write the output to this file instead of stdout")
	format := fs.String("format", "ndjson", "output format: ndjson (FHIR resources) or table (a readable summary)")
	issued := fs.String("issued", "", "RFC 3339 time to stamp as issued and recorded (default: now); fix it for reproducible output")
	codeSystemPath := fs.String("codesystem", "", "also write the project's CodeSystem (every derived code with its definition and unit, FHIR R4 JSON) to this file")
	omissionsPath := fs.String("omissions", "", "also write every input left out and every value not emitted to this file, one JSON object a line (reference, reason, detail)")
	fhirBase := fs.String("fhir-base", "", "base URL of the FHIR server the files come from and the output is for: a subject or encounter written as an absolute URL under it is read as the relative reference (one patient); under any other base it stays absolute and is another patient")
	htmlPath := fs.String("html", "", "also write a self-contained HTML report (overview, timelines, explanations) to this file")
	files, help, err := settings.ParseCommand(fs, args)
	if help {
		return settings.ExitOK
	}
	errs := []error{err, settings.ApplyEnv(fs, getenv)}
	resolved, err := derivation.Resolve(version)
	errs = append(errs, err)
	cfg, decOpts, encOpts := resolved.Derive, resolved.Decode, resolved.Encode
	if *fhirBase != "" {
		if u, err := url.Parse(*fhirBase); err != nil || (u.Scheme != "http" && u.Scheme != "https") || u.Host == "" {
			errs = append(errs, fmt.Errorf("--fhir-base must be an http or https URL, got %q", *fhirBase))
		}
		decOpts.Base = *fhirBase
	}
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
	if err := errors.Join(errs...); err != nil {
		fmt.Fprintf(stderr, "deadspace replay: %v\n", err)
		return settings.ExitUsage
	}
	failed := func(what string, err error) int {
		fmt.Fprintf(stderr, "deadspace replay: %s%v\n", what, err)
		return settings.ExitFailed
	}

	opts := replay.Options{Derive: cfg, Decode: decOpts, Encode: encOpts}
	var recorder *ui.Recorder
	if *htmlPath != "" {
		recorder = ui.NewRecorder()
		opts.Observe = recorder.Add
	}
	out, err := replay.Run(ctx, opts, files)
	if err != nil {
		return failed("", err)
	}
	if recorder != nil {
		source := fmt.Sprintf("replay of %d files, %d lines", len(files), out.Lines)
		if err := ui.WriteReportFile(*htmlPath, ui.FromReplay(out, recorder, cfg, encOpts.Issued, source)); err != nil {
			return failed("", err)
		}
	}
	write := func(w io.Writer) error { return replay.WriteNDJSON(w, out) }
	if *format == "table" {
		write = func(w io.Writer) error { return replay.WriteTable(w, out) }
	}
	if *outPath == "" {
		err = write(stdout)
	} else {
		err = writeFile(*outPath, write)
	}
	if err != nil {
		return failed("", err)
	}
	if *codeSystemPath != "" {
		if err := writeFile(*codeSystemPath, func(w io.Writer) error { return replay.WriteCodeSystem(w, encOpts) }); err != nil {
			return failed("--codesystem: ", err)
		}
	}
	if *omissionsPath != "" {
		if err := writeFile(*omissionsPath, func(w io.Writer) error { return replay.WriteOmissions(w, out) }); err != nil {
			return failed("--omissions: ", err)
		}
	}
	_ = replay.WriteSummary(stderr, out)
	if len(out.Skipped) > 0 {
		return settings.ExitSkipped
	}
	return settings.ExitOK
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
