package cli_test

import (
	"bytes"
	"context"
	"net"
	"os"
	"path/filepath"
	"strings"
	"testing"

	"github.com/deadspace-fhir/deadspace/api/cli"
	"github.com/deadspace-fhir/deadspace/api/settings"
)

const secret = "0123456789abcdef0"

// configCase is a command run that must stop at its configuration: the
// exit status, what stderr must say, each once, and what it must not.
type configCase struct {
	name string
	args []string
	env  map[string]string
	code int
	want []string
	not  []string
}

func (tc configCase) run(t *testing.T) string {
	t.Helper()
	var out, errOut bytes.Buffer
	code := cli.Run(context.Background(), tc.args, func(k string) string { return tc.env[k] }, "test", &out, &errOut)
	msg := errOut.String()
	if code != tc.code {
		t.Fatalf("exit %d, want %d; stderr:\n%s", code, tc.code, msg)
	}
	for _, w := range tc.want {
		if n := strings.Count(msg, w); n != 1 {
			t.Errorf("stderr has %q %d times, want once:\n%s", w, n, msg)
		}
	}
	for _, w := range tc.not {
		if strings.Contains(msg, w) {
			t.Errorf("stderr has %q:\n%s", w, msg)
		}
	}
	return msg
}

// TestServeReportsEveryProblemOnce checks that serve reports every bad
// flag, variable and setting together, before anything runs, and reports
// a value that does not parse once, as such.
func TestServeReportsEveryProblemOnce(t *testing.T) {
	cases := []configCase{
		{name: "bad variables are parse errors only",
			args: []string{"serve", "--webhook-secret", secret},
			env:  map[string]string{"DEADSPACE_BAROMETRIC_PRESSURE": "abc", "DEADSPACE_WINDOW": "zz", "DEADSPACE_FETCH_BUDGET": "soon"},
			code: settings.ExitUsage,
			want: []string{`DEADSPACE_BAROMETRIC_PRESSURE (--barometric-pressure) = "abc": not a number`, `DEADSPACE_WINDOW (--window) = "zz": not a duration`,
				`DEADSPACE_FETCH_BUDGET (--fetch-budget) = "soon": not a duration`},
			not: []string{"--window must", "--barometric-pressure must", "--fetch-budget must", "got 0"}},
		{name: "every bad flag and every range problem together",
			args: []string{"serve", "--window", "5x", "--barometric-pressure", "0", "--retention", "-1h", "--device-pace", "2m", "--fetch-budget", "1m"},
			code: settings.ExitUsage,
			want: []string{`--window "5x": not a duration`, "--barometric-pressure must be 250 to 2300 mm[Hg], got 0",
				"--device-pace must be between 0s and 1m0s, got 2m0s", "--fetch-budget must be between 100ms and 30s",
				"--retention must be at least 2h, got -1h0m0s", "a webhook secret is required"},
			not: []string{"--window must", "Usage", "-fhir-base"}},
		{name: "unknown flags and bad values of every kind",
			args: []string{"serve", "--webhook-secret", secret, "--nope", "--register-subscription=sometimes", "--max-body-bytes", "big", "--poll-interval"},
			code: settings.ExitUsage,
			want: []string{"unknown flag --nope", `--register-subscription "sometimes": not true or false`,
				`--max-body-bytes "big": not a whole number`, "--poll-interval needs a value"},
			not: []string{"--max-body-bytes must"}},
		{name: "missing files with the other problems",
			args: []string{"serve", "--webhook-secret", secret, "--tls-cert", "/nonexistent/tls.crt", "--tls-key", "/nonexistent/tls.key",
				"--grpc-client-ca", "/nonexistent/ca.pem", "--fhir-base", "https://fhir.example/r4", "--fhir-token-url", "https://fhir.example/token",
				"--fhir-client-id", "deadspace", "--fhir-private-key-file", "/nonexistent/key.pem", "--retention", "1h"},
			code: settings.ExitUsage,
			want: []string{"--tls-cert and --tls-key: reading certificate: open /nonexistent/tls.crt", "--grpc-client-ca: reading CA file: open /nonexistent/ca.pem",
				"--fhir-private-key-file: ", "--retention must be at least 2h"}},
		{name: "help despite bad flags", args: []string{"serve", "--window", "5x", "-h"}, code: settings.ExitOK,
			want: []string{"usage: deadspace serve"}, not: []string{`"5x"`}},
	}
	for _, tc := range cases {
		t.Run(tc.name, func(t *testing.T) {
			dir := filepath.Join(t.TempDir(), "data")
			tc.args = append([]string{tc.args[0], "--data-dir", dir}, tc.args[1:]...)
			tc.run(t)
			if _, err := os.Stat(dir); err == nil {
				t.Errorf("--data-dir was created by a run that stopped at its configuration")
			}
		})
	}
}

// TestCommandsReportEveryBadFlag checks the same of the other commands:
// every bad flag together with the command's other problems, exit 2.
func TestCommandsReportEveryBadFlag(t *testing.T) {
	cases := []configCase{
		{name: "replay", args: []string{"replay", "--window", "5x", "--format", "xml", "--fall-drop", "lots"}, code: settings.ExitUsage,
			want: []string{`--window "5x"`, `--fall-drop "lots": not a number`, "--format must be ndjson or table", "no input files"},
			not:  []string{"--window must", "--fall-drop must"}},
		{name: "backfill", args: []string{"backfill", "--dry-run=perhaps", "--fhir-max-transaction-entries", "many", "--bogus", "x.ndjson"}, code: settings.ExitUsage,
			want: []string{`--dry-run "perhaps": not true or false`, `--fhir-max-transaction-entries "many": not a whole number`, "unknown flag --bogus"},
			not:  []string{"--fhir-max-transaction-entries must"}},
		{name: "submit", args: []string{"submit", "--chunk-bytes", "1MB", "--quiet=loud"}, code: settings.ExitUsage,
			want: []string{`--chunk-bytes "1MB": not a whole number`, `--quiet "loud": not true or false`, "no input files"}},
		{name: "deadletters", args: []string{"deadletters", "--limit", "ten", "--data-dir"}, code: settings.ExitUsage,
			want: []string{`--limit "ten": not a whole number`, "--data-dir needs a value", "expected list, show ID or retry ID"},
			not:  []string{"--limit: limit must"}},
	}
	for _, tc := range cases {
		t.Run(tc.name, func(t *testing.T) { tc.run(t) })
	}
}

// TestGRPCCommandsShareOneTLSRule checks that the commands that call
// serve's gRPC API follow one rule: a client certificate needs its key and
// the CA bundle (it is never dropped for plaintext), and a missing file is
// a configuration error, exit 2, before anything connects.
func TestGRPCCommandsShareOneTLSRule(t *testing.T) {
	cases := []configCase{
		{name: "deadletters: a certificate without the CA bundle",
			args: []string{"deadletters", "--grpc", "127.0.0.1:19090", "--grpc-cert", "/nonexistent/a", "--grpc-key", "/nonexistent/b", "list"},
			code: settings.ExitUsage,
			want: []string{"--grpc-cert and --grpc-key need --grpc-ca", "--grpc-cert and --grpc-key: reading certificate: open /nonexistent/a"}},
		{name: "submit: a certificate without the CA bundle",
			args: []string{"submit", "--cert", "/nonexistent/a", "--key", "/nonexistent/b", "x.ndjson"},
			code: settings.ExitUsage,
			want: []string{"--cert and --key need --ca", "--cert and --key: reading certificate: open /nonexistent/a"}},
		{name: "deadletters: a certificate without its key",
			args: []string{"deadletters", "--grpc", "127.0.0.1:19090", "--grpc-ca", "/nonexistent/ca", "--grpc-cert", "/nonexistent/a", "list"},
			code: settings.ExitUsage,
			want: []string{"--grpc-cert and --grpc-key go together", "--grpc-cert: stat /nonexistent/a", "--grpc-ca: reading CA file"}},
		{name: "submit: a certificate without its key",
			args: []string{"submit", "--ca", "/nonexistent/ca", "--cert", "/nonexistent/a", "x.ndjson"},
			code: settings.ExitUsage,
			want: []string{"--cert and --key go together", "--cert: stat /nonexistent/a", "--ca: reading CA file"}},
		{name: "submit: a missing CA bundle with the other problems",
			args: []string{"submit", "--ca", "/nonexistent/ca", "--chunk-bytes", "x"},
			code: settings.ExitUsage,
			want: []string{"--ca: reading CA file: open /nonexistent/ca", `--chunk-bytes "x"`, "no input files"}},
	}
	for _, tc := range cases {
		t.Run(tc.name, func(t *testing.T) { tc.run(t) })
	}
}

// TestSubmitReadsTheEnvironment checks that submit reads its DEADSPACE_*
// variables as the other commands do: a flag given wins over its variable,
// a bad variable is reported with every other problem (exit 2), and TLS
// files named by variables follow the one TLS rule.
func TestSubmitReadsTheEnvironment(t *testing.T) {
	file := filepath.Join(t.TempDir(), "x.ndjson")
	if err := os.WriteFile(file, []byte(`{"resourceType":"Patient","id":"p1"}`+"\n"), 0o600); err != nil {
		t.Fatal(err)
	}
	envAddr, flagAddr := closedAddr(t), closedAddr(t)
	cases := []configCase{
		{name: "bad variables with the other problems",
			args: []string{"submit", "--cert", "/nonexistent/a"},
			env:  map[string]string{"DEADSPACE_CHUNK_BYTES": "1MB", "DEADSPACE_QUIET": "loud"},
			code: settings.ExitUsage,
			want: []string{`DEADSPACE_CHUNK_BYTES (--chunk-bytes) = "1MB": not a whole number`, `DEADSPACE_QUIET (--quiet) = "loud": not true or false`,
				"no input files", "--cert and --key go together"}},
		{name: "a bad flag and a bad variable together",
			args: []string{"submit", "--chunk-bytes", "x", file},
			env:  map[string]string{"DEADSPACE_QUIET": "loud"},
			code: settings.ExitUsage,
			want: []string{`--chunk-bytes "x": not a whole number`, `DEADSPACE_QUIET (--quiet) = "loud"`}},
		{name: "a flag wins over its bad variable",
			args: []string{"submit", "--chunk-bytes", "100"},
			env:  map[string]string{"DEADSPACE_CHUNK_BYTES": "lots"},
			code: settings.ExitUsage,
			want: []string{"no input files"},
			not:  []string{"DEADSPACE_CHUNK_BYTES", "lots"}},
		{name: "TLS files from variables follow the one rule",
			args: []string{"submit", file},
			env:  map[string]string{"DEADSPACE_CERT": "/nonexistent/a", "DEADSPACE_KEY": "/nonexistent/b"},
			code: settings.ExitUsage,
			want: []string{"--cert and --key need --ca", "--cert and --key: reading certificate: open /nonexistent/a"}},
		{name: "a CA flag wins over its variable",
			args: []string{"submit", "--ca", "/nonexistent/flag-ca", file},
			env:  map[string]string{"DEADSPACE_CA": "/nonexistent/env-ca"},
			code: settings.ExitUsage,
			want: []string{"--ca: reading CA file: open /nonexistent/flag-ca"},
			not:  []string{"env-ca"}},
		{name: "the address from its variable",
			args: []string{"submit", "--quiet", file},
			env:  map[string]string{"DEADSPACE_ADDR": envAddr},
			code: settings.ExitFailed,
			want: []string{envAddr}},
		{name: "an address flag wins over its variable",
			args: []string{"submit", "--addr", flagAddr, file},
			env:  map[string]string{"DEADSPACE_ADDR": envAddr},
			code: settings.ExitFailed,
			want: []string{flagAddr},
			not:  []string{envAddr}},
	}
	for _, tc := range cases {
		t.Run(tc.name, func(t *testing.T) { tc.run(t) })
	}
}

// closedAddr is a loopback address nothing listens on: a port the system
// gave and took back.
func closedAddr(t *testing.T) string {
	t.Helper()
	ln, err := net.Listen("tcp", "127.0.0.1:0")
	if err != nil {
		t.Fatal(err)
	}
	addr := ln.Addr().String()
	if err := ln.Close(); err != nil {
		t.Fatal(err)
	}
	return addr
}
