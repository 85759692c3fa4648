package cli

import (
	"context"
	"errors"
	"fmt"
	"io"

	"github.com/deadspace-fhir/deadspace/api/settings"
	"github.com/deadspace-fhir/deadspace/api/submit"
	"github.com/deadspace-fhir/deadspace/api/tlsconf"
)

const submitUsage = `usage: deadspace submit [flags] FILE...

Sends NDJSON files of FHIR R4 resources to a running deadspace serve over gRPC
(the Submit call), in chunks, with progress on stderr, and reports what was
accepted and why anything was not. Exit status 3 means some lines were not accepted.
Every flag can also be set by an environment variable (--addr is
DEADSPACE_ADDR); a flag given wins over its variable.

Flags:`

func submitCommand(ctx context.Context, args []string, getenv func(string) string, stdout, stderr io.Writer) int {
	fs := settings.NewCommand("submit", submitUsage, stderr)
	var opts submit.Options
	fs.StringVar(&opts.Addr, "addr", "127.0.0.1:9090", "gRPC address of the running service (its --grpc-listen)")
	ca := fs.String("ca", "", "PEM CA bundle that signed the service's certificate (TLS); without it, plaintext")
	cert := fs.String("cert", "", "PEM client certificate, for a service with --grpc-client-ca (with --key and --ca)")
	key := fs.String("key", "", "PEM private key of --cert")
	fs.IntVar(&opts.ChunkBytes, "chunk-bytes", submit.DefaultChunkBytes, "NDJSON bytes sent per call")
	quiet := fs.Bool("quiet", false, "no progress lines")
	files, help, err := settings.ParseCommand(fs, args)
	if help {
		return settings.ExitOK
	}
	errs := []error{err, settings.ApplyEnv(fs, getenv)}
	if len(files) == 0 {
		errs = append(errs, errors.New("no input files"))
	}
	opts.Credentials, err = tlsconf.GRPCClient(tlsconf.ClientFlags{CA: "--ca", Cert: "--cert", Key: "--key"}, *ca, *cert, *key)
	errs = append(errs, err)
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
