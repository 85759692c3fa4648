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
// Run "deadspace COMMAND -h" for a command's flags. The commands live in
// api/cli; this file only wires the process to them.
package main

import (
	"context"
	"io"
	"os"
	"os/signal"
	"syscall"

	"github.com/deadspace-fhir/deadspace/api/cli"
)

// version is stamped at build time with -ldflags "-X main.version=…".
var version = "dev"

func main() {
	ctx, stop := signal.NotifyContext(context.Background(), os.Interrupt, syscall.SIGTERM)
	defer stop()
	os.Exit(run(ctx, os.Args[1:], os.Stdout, os.Stderr))
}

// run is the process with its environment: the arguments after the
// program name, the DEADSPACE_* variables and the build's version.
func run(ctx context.Context, args []string, stdout, stderr io.Writer) int {
	return cli.Run(ctx, args, os.Getenv, version, stdout, stderr)
}
