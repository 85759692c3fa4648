// Package cli is deadspace's command line: it parses each command's flags
// and environment through api/settings and hands the work to the command's
// own package (replay, serve, backfill, submit, deadletters). The root
// main.go only calls [Run].
package cli

import (
	"context"
	"fmt"
	"io"
	"log/slog"
	"os"

	"github.com/deadspace-fhir/deadspace/api/deadletters"
	"github.com/deadspace-fhir/deadspace/api/logredact"
	"github.com/deadspace-fhir/deadspace/api/settings"
	"github.com/deadspace-fhir/deadspace/derive"
)

// Usage lists the commands; each command's -h lists its flags.
const Usage = `usage: deadspace COMMAND [flags]

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

// Run runs the command named by args[0] and returns the process's exit
// status (settings.ExitOK and the rest). getenv reads the DEADSPACE_*
// variables; version is the build's version, stamped into what is written.
func Run(ctx context.Context, args []string, getenv func(string) string, version string, stdout, stderr io.Writer) int {
	if len(args) == 0 {
		fmt.Fprint(stderr, Usage)
		return settings.ExitUsage
	}
	// Every command logs through the one redacting handler; serve and
	// backfill replace it with one at their --log-level.
	slog.SetDefault(newLogger(stderr, "warn"))
	switch args[0] {
	case "replay":
		return replayCommand(ctx, args[1:], getenv, version, stdout, stderr)
	case "serve":
		return serveCommand(ctx, args[1:], getenv, version, stderr)
	case "backfill":
		return backfillCommand(ctx, args[1:], getenv, version, stderr)
	case "submit":
		return submitCommand(ctx, args[1:], getenv, stdout, stderr)
	case "deadletters":
		return deadletters.Main(ctx, args[1:], getenv, stdout, stderr)
	case "version", "-version", "--version":
		fmt.Fprintf(stdout, "deadspace %s (algorithm %s)\n", version, derive.AlgorithmVersion)
		return settings.ExitOK
	case "-h", "-help", "--help", "help":
		fmt.Fprint(stdout, Usage)
		return settings.ExitOK
	}
	fmt.Fprintf(stderr, "deadspace: unknown command %q\n\n%s", args[0], Usage)
	return settings.ExitUsage
}

// newLogger writes JSON lines through the one redacting handler: whatever
// text reaches a log line, patient and resource identifiers and a FHIR
// server's own wording are removed there (api/logredact).
func newLogger(w io.Writer, level string) *slog.Logger {
	var l slog.Level
	_ = l.UnmarshalText([]byte(level))
	return logredact.NewLogger(w, l)
}

// isTerminal reports whether f is a character device (a terminal), without
// a dependency: progress is redrawn in place only there.
func isTerminal(f *os.File) bool {
	fi, err := f.Stat()
	return err == nil && fi.Mode()&os.ModeCharDevice != 0
}
