package deploy

import (
	"os"
	"os/exec"
	"path/filepath"
	"strings"
	"testing"

	"github.com/deadspace-fhir/deadspace/fhir/fhirtest"
)

// The unit's meaning is systemd's: systemd.exec(5) and systemd.service(5)
// for the settings, systemd.unit(5) for the %d (credentials directory) and
// %S (state root) specifiers. Where systemd-analyze is installed (it is on
// Debian 12 with systemd 252, the CI image), it checks the unit too.

const (
	unitFile   = "systemd/deadspace.service"
	envFile    = "systemd/deadspace.env"
	sysusers   = "systemd/deadspace.sysusers"
	unitBinary = "/usr/local/bin/deadspace"
)

func loadUnit(t *testing.T) unit {
	t.Helper()
	b, err := os.ReadFile(filepath.FromSlash(unitFile))
	if err != nil {
		t.Fatal(err)
	}
	u, err := parseUnit(string(b))
	if err != nil {
		t.Fatalf("%s: %v", unitFile, err)
	}
	return u
}

// unitEnvironment is the service's environment as systemd builds it:
// Environment= lines, then EnvironmentFile= over them (systemd.exec(5):
// "Settings from these files override settings made with Environment=").
// Specifiers are replaced by the given directories.
func unitEnvironment(t *testing.T, u unit, stateRoot, credDir string) map[string]string {
	t.Helper()
	env := map[string]string{}
	for _, line := range u["Service"]["Environment"] {
		words, err := shellWords(line)
		if err != nil {
			t.Fatalf("Environment=%s: %v", line, err)
		}
		for _, w := range words {
			k, v, ok := strings.Cut(w, "=")
			if !ok || !validEnvName(k) {
				t.Fatalf("Environment=%s: want NAME=VALUE", line)
			}
			env[k] = strings.NewReplacer("%S", stateRoot, "%d", credDir).Replace(v)
		}
	}
	b, err := os.ReadFile(filepath.FromSlash(envFile))
	if err != nil {
		t.Fatal(err)
	}
	fileEnv, _, err := parseEnvFile(string(b))
	if err != nil {
		t.Fatalf("%s: %v", envFile, err)
	}
	for k, v := range fileEnv {
		env[k] = v
	}
	return env
}

func TestUnitSettings(t *testing.T) {
	u := loadUnit(t)
	want := []struct{ key, value string }{
		{"Type", "exec"},
		{"User", "deadspace"},
		{"Group", "deadspace"},
		{"StateDirectory", "deadspace"},
		{"EnvironmentFile", "/etc/deadspace/deadspace.env"},
		{"ExecStart", unitBinary + " serve"},
		{"NoNewPrivileges", "yes"},
		{"ProtectSystem", "strict"},
		{"ProtectHome", "yes"},
		{"PrivateTmp", "yes"},
		{"PrivateDevices", "yes"},
		{"CapabilityBoundingSet", ""},
		{"RestrictSUIDSGID", "yes"},
		{"MemoryDenyWriteExecute", "yes"},
		{"SystemCallArchitectures", "native"},
		{"UMask", "0077"},
		{"Restart", "on-failure"},
		// settings.ExitUsage: a configuration error, which a restart
		// cannot fix.
		{"RestartPreventExitStatus", "2"},
	}
	for _, w := range want {
		t.Run(w.key, func(t *testing.T) {
			got, ok := u.one("Service", w.key)
			if !ok || got != w.value {
				t.Errorf("%s=%q (set %v), want %q", w.key, got, ok, w.value)
			}
		})
	}
	if got, _ := u.one("Install", "WantedBy"); got != "multi-user.target" {
		t.Errorf("WantedBy=%q", got)
	}
	if v, _ := u.one("Service", "DynamicUser"); v == "yes" {
		t.Error("DynamicUser=yes: the store's files must keep one owner across restarts and upgrades")
	}
}

func TestUnitSecretsComeFromCredentials(t *testing.T) {
	u := loadUnit(t)
	creds := map[string]string{}
	for _, lc := range u["Service"]["LoadCredential"] {
		id, src, ok := strings.Cut(lc, ":")
		if !ok || !strings.HasPrefix(src, "/etc/deadspace/") {
			t.Errorf("LoadCredential=%s: want ID:/etc/deadspace/FILE", lc)
		}
		creds[id] = src
	}
	env := unitEnvironment(t, u, "/var/lib", "/run/credentials/deadspace.service")
	for flagEnv, id := range map[string]string{
		"DEADSPACE_WEBHOOK_SECRET_FILE": "webhook-secret",
		"DEADSPACE_FHIR_TOKEN_FILE":     "fhir-token",
	} {
		if creds[id] == "" {
			t.Errorf("no LoadCredential=%s:...", id)
		}
		if got, want := env[flagEnv], "/run/credentials/deadspace.service/"+id; got != want {
			t.Errorf("%s=%q, want %q (%%d/%s)", flagEnv, got, want, id)
		}
	}
	b, err := os.ReadFile(filepath.FromSlash(envFile))
	if err != nil {
		t.Fatal(err)
	}
	fileEnv, _, _ := parseEnvFile(string(b))
	for _, k := range []string{"DEADSPACE_WEBHOOK_SECRET", "DEADSPACE_FHIR_TOKEN"} {
		if _, ok := fileEnv[k]; ok {
			t.Errorf("%s sets %s: secrets come through LoadCredential=", envFile, k)
		}
	}
}

// TestUnitEnvironmentIsAValidServeConfig gives the service the unit's
// environment, with credentials laid out as systemd lays them out, and
// checks it would start: every name a flag, every value accepted, the
// secrets read from the credentials directory, an empty token file meaning
// no token.
func TestUnitEnvironmentIsAValidServeConfig(t *testing.T) {
	u := loadUnit(t)
	root := t.TempDir()
	state, creds := filepath.Join(root, "lib"), filepath.Join(root, "credentials")
	for _, d := range []string{filepath.Join(state, "deadspace"), creds} {
		if err := os.MkdirAll(d, 0o700); err != nil {
			t.Fatal(err)
		}
	}
	secret := strings.Repeat("k", 32)
	if err := os.WriteFile(filepath.Join(creds, "webhook-secret"), []byte(secret+"\n"), 0o400); err != nil {
		t.Fatal(err)
	}
	if err := os.WriteFile(filepath.Join(creds, "fhir-token"), nil, 0o400); err != nil {
		t.Fatal(err)
	}
	env := unitEnvironment(t, u, state, creds)
	checkEnvNames(t, unitFile+" + "+envFile, env)
	cfg, err := serveConfig(env)
	if err != nil {
		t.Fatalf("deadspace serve would refuse the unit's environment:\n%v", err)
	}
	if cfg.DataDir != filepath.Join(state, "deadspace") {
		t.Errorf("data dir %s is not the StateDirectory", cfg.DataDir)
	}
	if cfg.WebhookSecret != secret {
		t.Error("webhook secret not read from the credential")
	}
	if cfg.FHIRToken != "" {
		t.Errorf("an empty fhir-token credential gave token %q", cfg.FHIRToken)
	}
}

func TestSysusers(t *testing.T) {
	b, err := os.ReadFile(filepath.FromSlash(sysusers))
	if err != nil {
		t.Fatal(err)
	}
	u := loadUnit(t)
	user, _ := u.one("Service", "User")
	// sysusers.d(5): "u NAME ID GECOS HOME".
	for _, line := range strings.Split(string(b), "\n") {
		f, err := shellWords(strings.TrimSpace(line))
		if err != nil || len(f) == 0 || strings.HasPrefix(f[0], "#") {
			continue
		}
		if f[0] == "u" && len(f) >= 2 && f[1] == user {
			return
		}
	}
	t.Errorf("%s creates no user %q", sysusers, user)
}

// TestSystemdAnalyze runs systemd's own checks: `verify` loads the unit as
// PID 1 would, and `security --offline` scores its sandboxing (0 is fully
// locked down, 10 is none; systemd-analyze(1)). The unit scored 1.1 with
// systemd 252; the threshold leaves room for versions that add checks.
func TestSystemdAnalyze(t *testing.T) {
	sa, err := exec.LookPath("systemd-analyze")
	if err != nil {
		fhirtest.Missing(t, "systemd-analyze not installed (Debian package systemd)")
	}
	b, err := os.ReadFile(filepath.FromSlash(unitFile))
	if err != nil {
		t.Fatal(err)
	}
	// verify insists the ExecStart binary exists; stand in the shell's true.
	truePath, err := exec.LookPath("true")
	if err != nil {
		fhirtest.Missing(t, "no true(1)")
	}
	if !strings.Contains(string(b), "ExecStart="+unitBinary+" ") {
		t.Fatalf("ExecStart is not %s", unitBinary)
	}
	dir := t.TempDir()
	p := filepath.Join(dir, "deadspace.service")
	src := strings.Replace(string(b), "ExecStart="+unitBinary+" ", "ExecStart="+truePath+" ", 1)
	if err := os.WriteFile(p, []byte(src), 0o644); err != nil {
		t.Fatal(err)
	}
	t.Run("verify", func(t *testing.T) {
		out, err := exec.Command(sa, "verify", p).CombinedOutput()
		if err != nil || len(strings.TrimSpace(string(out))) > 0 {
			t.Errorf("systemd-analyze verify: %v\n%s", err, out)
		}
	})
	t.Run("security", func(t *testing.T) {
		out, err := exec.Command(sa, "security", "--offline=yes", "--threshold=20", p).CombinedOutput()
		if err != nil {
			t.Errorf("exposure above 2.0 or analysis failed: %v\n%s", err, lastLines(string(out), 3))
		}
		t.Log(lastLines(string(out), 1))
	})
}

func lastLines(s string, n int) string {
	lines := strings.Split(strings.TrimRight(s, "\n"), "\n")
	if len(lines) > n {
		lines = lines[len(lines)-n:]
	}
	return strings.Join(lines, "\n")
}
