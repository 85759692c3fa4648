package deploy

import (
	"errors"
	"flag"
	"io"
	"os"
	"path/filepath"
	"sort"
	"strings"
	"testing"

	"github.com/deadspace-fhir/deadspace/api/serve"
	"github.com/deadspace-fhir/deadspace/api/settings"
)

// The artefacts configure `deadspace serve` through environment variables
// only. These helpers check such an environment against the service's own
// flag set (api/serve.Config.Bind), so a renamed flag or a value the
// service would refuse fails here rather than at a site's first start.

// envOnly are variables the service reads that are not flags.
var envOnly = map[string]bool{
	"DEADSPACE_FHIR_TOKEN":     true, // api/serve.Config.ApplyEnv: the token is never a flag
	"DEADSPACE_UI_SESSION_KEY": true, // likewise the pages' session key (or --ui-session-key-file)
}

// pendingFlags are flags the artefacts already set that the service is
// gaining in work under way; an environment variable for a flag the binary
// does not know is ignored by ApplyEnv, so setting it early is harmless.
// Delete an entry once the flag exists (TestPendingFlagsStillPending says
// when).
var pendingFlags = map[string]bool{}

// runtimeEnv are variables for the Go runtime, not the service.
var runtimeEnv = map[string]bool{"GOMEMLIMIT": true, "GOMAXPROCS": true, "GOGC": true}

// serveFlags maps each DEADSPACE_ variable to its flag name.
func serveFlags() map[string]string {
	fs := flag.NewFlagSet("serve", flag.ContinueOnError)
	var cfg serve.Config
	cfg.Bind(fs)
	out := map[string]string{}
	fs.VisitAll(func(f *flag.Flag) { out[settings.EnvName(f.Name)] = f.Name })
	return out
}

// unknownEnv returns the variables that the service would silently ignore,
// and those for flags still being added.
func unknownEnv(env map[string]string) (unknown, pending []string) {
	known := serveFlags()
	soon := map[string]bool{}
	for f := range pendingFlags {
		soon[settings.EnvName(f)] = true
	}
	for k := range env {
		switch {
		case known[k] != "", envOnly[k], runtimeEnv[k]:
		case soon[k]:
			pending = append(pending, k)
		default:
			unknown = append(unknown, k)
		}
	}
	sort.Strings(unknown)
	sort.Strings(pending)
	return unknown, pending
}

// checkEnvNames fails the test for every variable the service would ignore.
func checkEnvNames(t *testing.T, where string, env map[string]string) {
	t.Helper()
	unknown, pending := unknownEnv(env)
	for _, k := range unknown {
		t.Errorf("%s: %s is not a setting of deadspace serve (no such flag)", where, k)
	}
	for _, k := range pending {
		t.Logf("%s: %s is for a flag still being added", where, k)
	}
}

func TestUnknownEnv(t *testing.T) {
	unknown, _ := unknownEnv(map[string]string{
		"DEADSPACE_FHIR_BASE": "x", "DEADSPACE_FHIR_TOKEN": "x", "GOMEMLIMIT": "1GiB",
		"DEADSPACE_FHIR_URL": "x", "DEADSPACE_LISTEN_ADDR": "x",
	})
	want := []string{"DEADSPACE_FHIR_URL", "DEADSPACE_LISTEN_ADDR"}
	if strings.Join(unknown, ",") != strings.Join(want, ",") {
		t.Errorf("unknown = %v, want %v", unknown, want)
	}
}

// serveConfig applies env the way the serve command (api/cli) does: flags bound,
// nothing on the command line, ApplyEnv, then Validate.
func serveConfig(env map[string]string) (serve.Config, error) {
	fs := flag.NewFlagSet("serve", flag.ContinueOnError)
	fs.SetOutput(io.Discard)
	var cfg serve.Config
	cfg.Bind(fs)
	if err := fs.Parse(nil); err != nil {
		return cfg, err
	}
	err := cfg.ApplyEnv(fs, func(k string) string { return env[k] })
	return cfg, errors.Join(err, cfg.Validate())
}

func TestPendingFlagsStillPending(t *testing.T) {
	known := serveFlags()
	for f := range pendingFlags {
		if known[settings.EnvName(f)] != "" {
			t.Errorf("--%s now exists: remove it from pendingFlags so its variable is checked like any other", f)
		}
	}
}

func TestServeConfigRejects(t *testing.T) {
	// Shows the helpers can fail: each case is a mistake a site could make
	// in a ConfigMap or env file.
	dir := t.TempDir()
	good := map[string]string{"DEADSPACE_WEBHOOK_SECRET": strings.Repeat("s", 32), "DEADSPACE_DATA_DIR": dir}
	tests := []struct {
		name string
		set  map[string]string
	}{
		{"short webhook secret", map[string]string{"DEADSPACE_WEBHOOK_SECRET": "short"}},
		{"duration without unit", map[string]string{"DEADSPACE_SETTLE": "30"}},
		{"bad listen address", map[string]string{"DEADSPACE_LISTEN": "8080"}},
		{"missing secret file", map[string]string{"DEADSPACE_WEBHOOK_SECRET_FILE": filepath.Join(dir, "absent")}},
	}
	if _, err := serveConfig(good); err != nil {
		t.Fatalf("baseline environment refused: %v", err)
	}
	for _, tc := range tests {
		t.Run(tc.name, func(t *testing.T) {
			env := map[string]string{}
			for k, v := range good {
				env[k] = v
			}
			for k, v := range tc.set {
				env[k] = v
			}
			if _, err := serveConfig(env); err == nil {
				t.Errorf("accepted %v", tc.set)
			}
		})
	}
}

// repoRoot is the module root: tests run in deploy/.
func repoRoot(t *testing.T) string {
	t.Helper()
	root, err := filepath.Abs("..")
	if err != nil {
		t.Fatal(err)
	}
	if _, err := os.Stat(filepath.Join(root, "go.mod")); err != nil {
		t.Fatalf("no go.mod above deploy/: %v", err)
	}
	return root
}

func readFile(t *testing.T, rel string) string {
	t.Helper()
	b, err := os.ReadFile(filepath.Join(repoRoot(t), rel))
	if err != nil {
		t.Fatal(err)
	}
	return string(b)
}
