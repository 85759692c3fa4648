package deadletters

import (
	"context"
	"errors"
	"fmt"
	"io"
	"os"
	"path/filepath"
	"strconv"
	"strings"
	"text/tabwriter"
	"time"

	"google.golang.org/grpc"
	"google.golang.org/grpc/credentials"

	"github.com/deadspace-fhir/deadspace/api/settings"
	"github.com/deadspace-fhir/deadspace/api/store/boltstore"
	"github.com/deadspace-fhir/deadspace/api/tlsconf"
)

// Exit codes of [Main], as the other commands use them.
const (
	exitOK     = settings.ExitOK
	exitFailed = settings.ExitFailed
	exitUsage  = settings.ExitUsage
)

// StoreFile is the store's file name inside the data directory.
const StoreFile = "deadspace.db"

const usage = `usage: deadspace deadletters [flags] list | show ID | retry ID

Lists, shows or retries the writes the FHIR server refused for good. Without
--grpc it opens the data directory, which only works while serve is stopped
(the store has one writer); with --grpc it asks the running serve.
A retried write goes back to the outbox as its newest write.
Every flag can also be set by an environment variable (--data-dir is
DEADSPACE_DATA_DIR).

Flags:`

// Main runs `deadspace deadletters`.
func Main(ctx context.Context, args []string, getenv func(string) string, stdout, stderr io.Writer) int {
	fs := settings.NewCommand("deadletters", usage, stderr)
	dataDir := fs.String("data-dir", "deadspace-data", "serve's data directory (serve must be stopped)")
	addr := fs.String("grpc", "", "gRPC address of a running serve, e.g. 127.0.0.1:9090, instead of the data directory")
	ca := fs.String("grpc-ca", "", "PEM CA bundle to verify serve's TLS certificate (TLS is off without it)")
	cert := fs.String("grpc-cert", "", "PEM client certificate, when serve requires mutual TLS (with --grpc-key and --grpc-ca)")
	key := fs.String("grpc-key", "", "PEM private key of --grpc-cert")
	limit := fs.Int("limit", DefaultLimit, fmt.Sprintf("list at most this many (1 to %d)", MaxLimit))
	pos, help, err := settings.ParseCommand(fs, args)
	if help {
		return exitOK
	}
	errs := []error{err, settings.ApplyEnv(fs, getenv)}
	var id uint64
	switch {
	case len(pos) == 1 && pos[0] == "list":
		if _, err := CheckLimit(*limit); err != nil {
			errs = append(errs, fmt.Errorf("--limit: %w", err))
		}
	case len(pos) == 2 && (pos[0] == "show" || pos[0] == "retry"):
		id, err = strconv.ParseUint(pos[1], 10, 64)
		if err != nil || id == 0 {
			errs = append(errs, fmt.Errorf("%s needs a dead letter id (a positive number), got %q", pos[0], pos[1]))
		}
	default:
		errs = append(errs, fmt.Errorf("expected list, show ID or retry ID, got %q", strings.Join(pos, " ")))
	}
	var creds credentials.TransportCredentials
	switch {
	case *addr != "":
		creds, err = tlsconf.GRPCClient(tlsconf.ClientFlags{CA: "--grpc-ca", Cert: "--grpc-cert", Key: "--grpc-key"}, *ca, *cert, *key)
		errs = append(errs, err)
	case *ca != "" || *cert != "" || *key != "":
		errs = append(errs, errors.New("--grpc-ca, --grpc-cert and --grpc-key need --grpc"))
	}
	if err := errors.Join(errs...); err != nil {
		fmt.Fprintf(stderr, "deadspace deadletters: %v\n", err)
		return exitUsage
	}

	op, closeOp, err := open(*dataDir, *addr, creds)
	if err != nil {
		fmt.Fprintf(stderr, "deadspace deadletters: %v\n", err)
		return exitFailed
	}
	defer closeOp()
	ctx, cancel := context.WithTimeout(ctx, time.Minute)
	defer cancel()
	switch pos[0] {
	case "list":
		views, total, err := op.List(ctx, *limit)
		if err != nil {
			fmt.Fprintf(stderr, "deadspace deadletters: %v\n", err)
			return exitFailed
		}
		WriteList(stdout, views, total)
	case "show":
		v, err := op.Show(ctx, id)
		if err != nil {
			fmt.Fprintf(stderr, "deadspace deadletters: %v\n", err)
			return exitFailed
		}
		WriteOne(stdout, v)
	case "retry":
		outboxID, err := op.Retry(ctx, id)
		if err != nil {
			fmt.Fprintf(stderr, "deadspace deadletters: %v\n", err)
			return exitFailed
		}
		fmt.Fprintf(stdout, "dead letter %d is back in the outbox as write %d\n", id, outboxID)
	}
	return exitOK
}

// open returns the operator for the data directory or the gRPC address,
// reached with creds.
func open(dataDir, addr string, creds credentials.TransportCredentials) (Operator, func(), error) {
	if addr != "" {
		conn, err := grpc.NewClient(addr, grpc.WithTransportCredentials(creds))
		if err != nil {
			return nil, nil, fmt.Errorf("--grpc %s: %w", addr, err)
		}
		return Remote(conn), func() { conn.Close() }, nil
	}
	path := filepath.Join(dataDir, StoreFile)
	// Opening would create an empty store; a mistyped directory must say so.
	if _, err := os.Stat(path); err != nil {
		return nil, nil, fmt.Errorf("--data-dir: no store at %s: %w", path, err)
	}
	s, err := boltstore.Open(path, boltstore.Options{Timeout: 2 * time.Second})
	if errors.Is(err, boltstore.ErrLocked) {
		return nil, nil, fmt.Errorf("--data-dir: the store at %s is in use, probably by a running serve: stop it, or use --grpc with its gRPC address", path)
	}
	if err != nil {
		return nil, nil, fmt.Errorf("--data-dir: %w", err)
	}
	return Local(s), func() { s.Close() }, nil
}

// WriteList prints views as a table, oldest first.
func WriteList(w io.Writer, views []View, total int) {
	fmt.Fprintf(w, "%d dead letters", total)
	if len(views) < total {
		fmt.Fprintf(w, " (the oldest %d shown)", len(views))
	}
	fmt.Fprintln(w)
	if len(views) == 0 {
		return
	}
	tw := tabwriter.NewWriter(w, 0, 4, 2, ' ', 0)
	fmt.Fprintln(tw, "ID\tBURIED\tATTEMPTS\tVALUES\tSUPERSEDED\tREASON")
	for _, v := range views {
		fmt.Fprintf(tw, "%d\t%s\t%d\t%d\t%s\t%s\n", v.ID, v.BuriedAt.UTC().Format(time.RFC3339), v.Attempts, len(v.Series), yesNo(v.Superseded), oneLine(v.Reason, 100))
	}
	tw.Flush()
}

// WriteOne prints one view in full.
func WriteOne(w io.Writer, v View) {
	fmt.Fprintf(w, "dead letter %d\n", v.ID)
	fmt.Fprintf(w, "queued:     %s\n", v.QueuedAt.UTC().Format(time.RFC3339))
	fmt.Fprintf(w, "buried:     %s\n", v.BuriedAt.UTC().Format(time.RFC3339))
	fmt.Fprintf(w, "attempts:   %d\n", v.Attempts)
	fmt.Fprintf(w, "superseded: %s\n", yesNo(v.Superseded))
	if v.Superseded {
		fmt.Fprintln(w, "            (the ledger records other values of its series now: a retried revision or withdrawal")
		fmt.Fprintln(w, "            sends only the values still current; a retried create is sent whole, and the later")
		fmt.Fprintln(w, "            letters of its series then revise it)")
	}
	fmt.Fprintf(w, "server's answer (identifiers redacted):\n  %s\n", strings.ReplaceAll(v.Reason, "\n", "\n  "))
	if v.LastError != "" {
		fmt.Fprintf(w, "attempt before:\n  %s\n", strings.ReplaceAll(v.LastError, "\n", "\n  "))
	}
	fmt.Fprintln(w, "series (give one to Explain):")
	for _, s := range v.Series {
		fmt.Fprintf(w, "  %s\n", s)
	}
}

func yesNo(b bool) string {
	if b {
		return "yes"
	}
	return "no"
}

func oneLine(s string, n int) string {
	s = strings.Join(strings.Fields(s), " ")
	if r := []rune(s); len(r) > n {
		return string(r[:n-1]) + "…"
	}
	return s
}
