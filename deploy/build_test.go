package deploy

import (
	"bytes"
	"debug/elf"
	"errors"
	"os"
	"os/exec"
	"path/filepath"
	"sort"
	"strings"
	"testing"
)

// dockerfile is what the tests need from the Dockerfile.
type dockerfile struct {
	stages     []stage
	env        map[string]string // the final stage's ENV
	uid        string            // the final stage's USER, as a number
	expose     []string
	volumes    []string
	entrypoint []string
}

// distrolessNonroot is the uid of the nonroot user in the distroless images
// (GoogleContainerTools/distroless, base/README: "nonroot" is 65532).
const distrolessNonroot = "65532"

func loadDockerfile(t *testing.T) dockerfile {
	t.Helper()
	stages, err := parseDockerfile(readFile(t, "Dockerfile"))
	if err != nil {
		t.Fatalf("Dockerfile: %v", err)
	}
	d := dockerfile{stages: stages, env: map[string]string{}}
	final := stages[len(stages)-1]
	for _, in := range final.all("ENV") {
		kv, err := parseEnvInstruction(in.Args)
		if err != nil {
			t.Fatalf("Dockerfile line %d: %v", in.Line, err)
		}
		for k, v := range kv {
			d.env[k] = v
		}
	}
	if u, ok := final.last("USER"); ok {
		user, _, _ := strings.Cut(u.Args, ":")
		if user == "nonroot" {
			user = distrolessNonroot
		}
		d.uid = user
	}
	for _, in := range final.all("EXPOSE") {
		for _, p := range strings.Fields(in.Args) {
			d.expose = append(d.expose, strings.TrimSuffix(p, "/tcp"))
		}
	}
	sort.Strings(d.expose)
	for _, in := range final.all("VOLUME") {
		if strings.HasPrefix(in.Args, "[") {
			v, err := execForm(in.Args)
			if err != nil {
				t.Fatalf("VOLUME: %v", err)
			}
			d.volumes = append(d.volumes, v...)
		} else {
			d.volumes = append(d.volumes, strings.Fields(in.Args)...)
		}
	}
	if in, ok := final.last("ENTRYPOINT"); ok {
		d.entrypoint, err = execForm(in.Args)
		if err != nil {
			t.Fatalf("ENTRYPOINT line %d: %v (the shell form would run under /bin/sh, which the image lacks)", in.Line, err)
		}
	}
	return d
}

func TestDockerfile(t *testing.T) {
	d := loadDockerfile(t)
	if len(d.stages) < 2 {
		t.Fatalf("%d stages: want a build stage and a minimal final stage", len(d.stages))
	}
	build, final := d.stages[0], d.stages[len(d.stages)-1]

	t.Run("build stage uses .ci/build", func(t *testing.T) {
		if !strings.HasPrefix(build.Image, "golang:1.26") {
			t.Errorf("build stage from %s, want golang:1.26 (go.mod's Go)", build.Image)
		}
		var calls []instruction
		for _, in := range build.all("RUN") {
			if strings.Contains(in.Args, ".ci/build") {
				calls = append(calls, in)
			}
		}
		if len(calls) != 1 {
			t.Fatalf("%d RUN lines call .ci/build, want 1", len(calls))
		}
		if strings.Contains(calls[0].Args, "go build") {
			t.Error("the build stage runs go build itself; .ci/build is the one recipe")
		}
	})

	t.Run("final stage copies the built binary", func(t *testing.T) {
		want := "--from=" + build.Name + " /out/deadspace /deadspace"
		found := false
		for _, in := range final.all("COPY") {
			found = found || strings.Contains(in.Args, want)
		}
		if build.Name == "" || !found {
			t.Errorf("no COPY %s in the final stage", want)
		}
	})

	t.Run("minimal non-root base", func(t *testing.T) {
		switch {
		case strings.HasPrefix(final.Image, "gcr.io/distroless/static"):
			if !strings.Contains(final.Image, "nonroot") {
				t.Errorf("%s: use the :nonroot variant", final.Image)
			}
		case final.Image == "scratch":
		default:
			t.Errorf("final stage from %s, want distroless static or scratch", final.Image)
		}
		if d.uid == "" || d.uid == "0" || d.uid == "root" {
			t.Errorf("final stage runs as %q, want a non-root user", d.uid)
		}
		for _, in := range final.all("RUN") {
			t.Errorf("line %d: RUN in the final stage needs a shell the base does not have", in.Line)
		}
	})

	t.Run("entrypoint, ports, volume", func(t *testing.T) {
		if strings.Join(d.entrypoint, " ") != "/deadspace serve" {
			t.Errorf("ENTRYPOINT %q, want [\"/deadspace\", \"serve\"]", d.entrypoint)
		}
		if strings.Join(d.expose, " ") != "8080 9090" {
			t.Errorf("EXPOSE %v, want 8080 9090", d.expose)
		}
		for k, port := range map[string]string{"DEADSPACE_LISTEN": "8080", "DEADSPACE_GRPC_LISTEN": "9090"} {
			if d.env[k] != "0.0.0.0:"+port {
				t.Errorf("%s=%q, want 0.0.0.0:%s", k, d.env[k], port)
			}
		}
		if len(d.volumes) != 1 || d.volumes[0] != d.env["DEADSPACE_DATA_DIR"] {
			t.Errorf("VOLUME %v, DEADSPACE_DATA_DIR %q: the store must live on the volume", d.volumes, d.env["DEADSPACE_DATA_DIR"])
		}
	})

	t.Run("image environment is valid", func(t *testing.T) {
		checkEnvNames(t, "Dockerfile ENV", d.env)
		env := map[string]string{"DEADSPACE_WEBHOOK_SECRET": strings.Repeat("x", 32)}
		for k, v := range d.env {
			env[k] = v
		}
		if _, err := serveConfig(env); err != nil {
			t.Errorf("deadspace serve would refuse the image's environment plus a secret:\n%v", err)
		}
	})
}

// TestDockerignoreKeepsTheBuildInputs lists, with the go command, every
// file the binary is built from and checks .dockerignore leaves each in the
// context, and checks it leaves out what it is there to leave out.
func TestDockerignoreKeepsTheBuildInputs(t *testing.T) {
	m, err := parseDockerignore(readFile(t, ".dockerignore"))
	if err != nil {
		t.Fatal(err)
	}
	root := repoRoot(t)
	cmd := exec.Command("go", "list", "-deps", "-f",
		`{{if .Module}}{{if .Module.Main}}{{.Dir}}{{range .GoFiles}} {{.}}{{end}}{{range .EmbedFiles}} {{.}}{{end}}{{end}}{{end}}`, ".")
	cmd.Dir = root
	cmd.Env = append(os.Environ(), "CGO_ENABLED=0")
	out, err := cmd.Output()
	if err != nil {
		t.Fatalf("go list: %v", errStderr(err))
	}
	needed := []string{"go.mod", "go.sum", ".ci/build"}
	for _, line := range strings.Split(strings.TrimSpace(string(out)), "\n") {
		f := strings.Fields(line)
		if len(f) == 0 {
			continue
		}
		rel, err := filepath.Rel(root, f[0])
		if err != nil {
			t.Fatal(err)
		}
		for _, name := range f[1:] {
			needed = append(needed, filepath.ToSlash(filepath.Join(rel, name)))
		}
	}
	if len(needed) < 10 {
		t.Fatalf("go list found only %v", needed)
	}
	for _, p := range needed {
		if m.Excluded(p) {
			t.Errorf(".dockerignore leaves out %s, which the binary is built from", p)
		}
	}
	for _, p := range []string{".git/HEAD", "testdata/node/node_modules/x/package.json", "main_test.go", "derive/compute_test.go", "deploy/kubernetes/deployment.yaml"} {
		if !m.Excluded(p) {
			t.Errorf(".dockerignore keeps %s in the context", p)
		}
	}
}

func errStderr(err error) error {
	var ee *exec.ExitError
	if errors.As(err, &ee) && len(ee.Stderr) > 0 {
		return errors.New(err.Error() + ": " + strings.TrimSpace(string(ee.Stderr)))
	}
	return err
}

// buildScript runs .ci/build with extra environment and returns its stdout.
func buildScript(t *testing.T, dir string, env ...string) (string, error) {
	t.Helper()
	cmd := exec.Command("bash", filepath.Join(repoRoot(t), ".ci", "build"))
	cmd.Dir = dir
	cmd.Env = append(withoutEnv(os.Environ(), "VERSION", "OUT"), env...)
	var stderr bytes.Buffer
	cmd.Stderr = &stderr
	out, err := cmd.Output()
	if err != nil {
		return string(out), errors.New(err.Error() + ": " + stderr.String())
	}
	return string(out), nil
}

func withoutEnv(env []string, names ...string) []string {
	var out []string
	for _, kv := range env {
		k, _, _ := strings.Cut(kv, "=")
		drop := false
		for _, n := range names {
			drop = drop || k == n
		}
		if !drop {
			out = append(out, kv)
		}
	}
	return out
}

func TestBuildScript(t *testing.T) {
	if testing.Short() {
		t.Skip("builds the binary")
	}
	dir := t.TempDir()

	t.Run("refuses a version with a space", func(t *testing.T) {
		// It would split -ldflags; the script stops before building.
		if _, err := buildScript(t, dir, "VERSION=1 2", "OUT="+filepath.Join(dir, "never")); err == nil {
			t.Error("accepted")
		}
		if _, err := os.Stat(filepath.Join(dir, "never")); err == nil {
			t.Error("built anyway")
		}
	})

	out := filepath.Join(dir, "bin", "deadspace")
	stdout, err := buildScript(t, dir, "VERSION=deploytest-1", "OUT="+out)
	if err != nil {
		t.Fatalf(".ci/build: %v", err)
	}

	t.Run("prints the binary's path", func(t *testing.T) {
		if strings.TrimSpace(stdout) != out {
			t.Errorf("stdout %q, want %q", stdout, out)
		}
	})

	t.Run("version is stamped", func(t *testing.T) {
		got, err := exec.Command(out, "version").Output()
		if err != nil {
			t.Fatal(errStderr(err))
		}
		if !strings.HasPrefix(string(got), "deadspace deploytest-1 ") {
			t.Errorf("version prints %q", got)
		}
	})

	t.Run("static, stripped, no local paths", func(t *testing.T) {
		f, err := elf.Open(out)
		if err != nil {
			t.Fatal(err)
		}
		defer f.Close()
		// A dynamically linked executable names its loader in a PT_INTERP
		// program header and its libraries in DT_NEEDED entries (System V
		// ABI, "Program Header" and "Dynamic Section"); a static one has
		// neither, so it runs on distroless/static and scratch.
		for _, p := range f.Progs {
			if p.Type == elf.PT_INTERP {
				t.Error("PT_INTERP present: the binary needs a dynamic loader")
			}
		}
		if libs, err := f.ImportedLibraries(); err != nil || len(libs) > 0 {
			t.Errorf("imported libraries %v (%v)", libs, err)
		}
		// -s drops the symbol table.
		if f.Section(".symtab") != nil {
			t.Error(".symtab present: not stripped")
		}
		b, err := os.ReadFile(out)
		if err != nil {
			t.Fatal(err)
		}
		// -trimpath removes the build machine's paths.
		if bytes.Contains(b, []byte(repoRoot(t))) {
			t.Errorf("the binary contains the checkout path %s", repoRoot(t))
		}
	})

	t.Run("relative OUT and the default version", func(t *testing.T) {
		// A relative OUT is the caller's, not the repository's; without
		// VERSION the script asks git, and says "dev" outside a checkout.
		want := "dev"
		if v, err := exec.Command("git", "-C", repoRoot(t), "describe", "--always", "--dirty").Output(); err == nil {
			want = strings.TrimSpace(string(v))
		}
		if _, err := buildScript(t, dir, "OUT=rel/deadspace"); err != nil {
			t.Fatalf(".ci/build: %v", err)
		}
		got, err := exec.Command(filepath.Join(dir, "rel", "deadspace"), "version").Output()
		if err != nil {
			t.Fatal(errStderr(err))
		}
		if !strings.HasPrefix(string(got), "deadspace "+want+" ") {
			t.Errorf("version prints %q, want version %q", got, want)
		}
	})
}
