package cli

import (
	"context"
	"errors"
	"fmt"
	"io"

	"github.com/deadspace-fhir/deadspace/api/settings"
	"github.com/deadspace-fhir/deadspace/api/submit"
)

const submitUsage = `usage: deadspace submit [flags] FILE...

Sends NDJSON files of FHIR R4 resources to a running deadspace serve over gRPC
(the Submit call), in chunks, with progress on stderr, and reports what was
accepted and why anything was not. Exit status 3 means some lines were not accepted.

Flags:`

func submitCommand(ctx context.Context, args []string, stdout, stderr io.Writer) int {
	fs := settings.NewCommand("submit", submitUsage, stderr)
	var opts submit.Options
	fs.StringVar(&opts.Addr, "addr", "127.0.0.1:9090", "gRPC address of the running service (its --grpc-listen)")
	fs.StringVar(&opts.CAFile, "ca", "", "PEM CA bundle that signed the service's certificate (TLS); without it, plaintext")
	fs.StringVar(&opts.CertFile, "cert", "", "PEM client certificate, for a service with --grpc-client-ca")
	fs.StringVar(&opts.KeyFile, "key", "", "PEM private key of --cert")
	fs.IntVar(&opts.ChunkBytes, "chunk-bytes", submit.DefaultChunkBytes, "NDJSON bytes sent per call")
	quiet := fs.Bool("quiet", false, "no progress lines")
	files, help, err := settings.ParseCommand(fs, args)
	if help {
		return settings.ExitOK
	}
	errs := []error{err}
	if len(files) == 0 {
		errs = append(errs, errors.New("no input files"))
	}
	if err := errors.Join(errs...); err != nil {
		fmt.Fprintf(stderr, "deadspace submit: %v\n", err)
		return settings.ExitUsage
	}
	if !*quiet {
		opts.Progress = stderr
	}
	sum, err := submit.Run(ctx, opts, files)
	submit.WriteSummary(stdout, sum)
	switch {
	case errors.Is(err, submit.ErrNotAllAccepted):
		return settings.ExitSkipped
	case err != nil:
		fmt.Fprintf(stderr, "deadspace submit: %v\n", err)
		return settings.ExitFailed
	}
	return settings.ExitOK
}
