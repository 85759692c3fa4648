package deadspacev1_test

import (
	"bytes"
	"os"
	"os/exec"
	"path/filepath"
	"regexp"
	"testing"

	"github.com/deadspace-fhir/deadspace/fhir/fhirtest"
)

// protocVersionLine matches the header line naming the protoc version, the
// one part of the output the pinned plugins do not fix: a Debian point
// release of protobuf-compiler must not make the committed code "stale".
var protocVersionLine = regexp.MustCompile(`(?m)^//\s+(-\s+)?protoc\s+v\S+\n`)

// TestGeneratedCodeIsCurrent regenerates the Go code into a temporary
// directory with .ci/gen-proto and requires it to equal the committed files,
// so a change to deadspace.proto cannot land without its generated code.
func TestGeneratedCodeIsCurrent(t *testing.T) {
	if _, err := exec.LookPath("protoc"); err != nil {
		fhirtest.Missing(t, "protoc is missing: install Debian's protobuf-compiler (apt-get install protobuf-compiler) to check the generated code")
	}
	if _, err := exec.LookPath("bash"); err != nil {
		fhirtest.Missing(t, "bash is missing; .ci/gen-proto needs it")
	}
	root, err := filepath.Abs("../../..")
	if err != nil {
		t.Fatal(err)
	}
	out := t.TempDir()
	cmd := exec.Command("bash", filepath.Join(root, ".ci", "gen-proto"), out)
	cmd.Dir = root
	if b, err := cmd.CombinedOutput(); err != nil {
		t.Fatalf(".ci/gen-proto failed: %v\n%s", err, b)
	}
	for _, name := range []string{"deadspace.pb.go", "deadspace_grpc.pb.go"} {
		t.Run(name, func(t *testing.T) {
			want, err := os.ReadFile(name)
			if err != nil {
				t.Fatal(err)
			}
			got, err := os.ReadFile(filepath.Join(out, "proto", "deadspace", "v1", name))
			if err != nil {
				t.Fatal(err)
			}
			want = protocVersionLine.ReplaceAll(want, nil)
			got = protocVersionLine.ReplaceAll(got, nil)
			if !bytes.Equal(got, want) {
				t.Errorf("%s is stale: run .ci/gen-proto and commit the result", name)
			}
		})
	}
}

// TestVersionLineIsStripped checks the pattern against the two header
// forms the pinned plugins write, so the comparison above cannot silently
// keep the protoc version (and fail on another protoc) or strip more.
func TestVersionLineIsStripped(t *testing.T) {
	for _, tc := range []struct{ name, in, want string }{
		{"protoc-gen-go", "// versions:\n// \tprotoc-gen-go v1.36.12\n// \tprotoc        v3.21.12\n// source: x\n",
			"// versions:\n// \tprotoc-gen-go v1.36.12\n// source: x\n"},
		{"protoc-gen-go-grpc", "// versions:\n// - protoc-gen-go-grpc v1.6.2\n// - protoc             v3.21.12\n// source: x\n",
			"// versions:\n// - protoc-gen-go-grpc v1.6.2\n// source: x\n"},
		{"unknown protoc version", "// \tprotoc        (unknown)\n", "// \tprotoc        (unknown)\n"},
	} {
		t.Run(tc.name, func(t *testing.T) {
			if got := protocVersionLine.ReplaceAllString(tc.in, ""); got != tc.want {
				t.Errorf("got %q, want %q", got, tc.want)
			}
		})
	}
}
