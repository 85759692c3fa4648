package cli

import (
	"context"
	"errors"
	"fmt"
	"io"
	"log/slog"

	"github.com/deadspace-fhir/deadspace/api/serve"
	"github.com/deadspace-fhir/deadspace/api/settings"
)

const serveUsage = `usage: deadspace serve [flags]

Runs the live service. Every flag can also be set by an environment variable:
DEADSPACE_ and the flag name in upper case, dashes as underscores (--fhir-base is DEADSPACE_FHIR_BASE).
The FHIR bearer token comes only from DEADSPACE_FHIR_TOKEN or --fhir-token-file.

Flags:`

func serveCommand(ctx context.Context, args []string, getenv func(string) string, version string, stderr io.Writer) int {
	fs := settings.NewCommand("serve", serveUsage, stderr)
	var cfg serve.Config
	cfg.Bind(fs)
	rest, help, err := settings.ParseCommand(fs, args)
	if help {
		return settings.ExitOK
	}
	errs := []error{err}
	if len(rest) > 0 {
		errs = append(errs, fmt.Errorf("unexpected arguments %q", rest))
	}
	errs = append(errs, cfg.ApplyEnv(fs, getenv), cfg.Validate())
	if err := errors.Join(errs...); err != nil {
		fmt.Fprintf(stderr, "deadspace serve: configuration:\n%v\n", err)
		return settings.ExitUsage
	}
	log := newLogger(stderr, cfg.LogLevel)
	slog.SetDefault(log)
	svc, err := serve.New(cfg, version, log)
	if err != nil {
		log.Error("start-up failed", "err", err)
		return settings.ExitFailed
	}
	if err := svc.Run(ctx); err != nil {
		log.Error("service failed", "err", err)
		return settings.ExitFailed
	}
	return settings.ExitOK
}
