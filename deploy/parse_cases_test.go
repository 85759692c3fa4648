package deploy

import (
	"reflect"
	"strings"
	"testing"
)

func TestParseDockerfile(t *testing.T) {
	tests := []struct {
		name    string
		src     string
		want    []stage
		wantErr bool
	}{
		{
			name: "two stages with continuation and comments",
			src: "# syntax=docker/dockerfile:1\nARG X=1\nFROM --platform=$BUILDPLATFORM golang:1.26 AS build\n" +
				"RUN a \\\n  # dropped\n  b\nfrom scratch\nUSER 1\n",
			want: []stage{
				{Image: "golang:1.26", Name: "build", Platform: "$BUILDPLATFORM", Body: []instruction{{Line: 4, Cmd: "RUN", Args: "a    b"}}},
				{Image: "scratch", Body: []instruction{{Line: 8, Cmd: "USER", Args: "1"}}},
			},
		},
		{name: "instruction before FROM", src: "RUN x\nFROM scratch\n", wantErr: true},
		{name: "no FROM", src: "# nothing\n", wantErr: true},
		{name: "bad FROM", src: "FROM a b c d\n", wantErr: true},
	}
	for _, tc := range tests {
		t.Run(tc.name, func(t *testing.T) {
			got, err := parseDockerfile(tc.src)
			if (err != nil) != tc.wantErr {
				t.Fatalf("err = %v, want error %v", err, tc.wantErr)
			}
			if !tc.wantErr && !reflect.DeepEqual(got, tc.want) {
				t.Errorf("got %+v\nwant %+v", got, tc.want)
			}
		})
	}
}

func TestParseEnvInstruction(t *testing.T) {
	tests := []struct {
		name    string
		args    string
		want    map[string]string
		wantErr bool
	}{
		{name: "pairs", args: `A=1 B="two words" C='x y'`, want: map[string]string{"A": "1", "B": "two words", "C": "x y"}},
		{name: "legacy form", args: "A one two", want: map[string]string{"A": "one two"}},
		{name: "escaped blank", args: `A=x\ y`, want: map[string]string{"A": "x y"}},
		{name: "unterminated", args: `A="x`, wantErr: true},
		{name: "no key", args: `=x y=1`, wantErr: true},
	}
	for _, tc := range tests {
		t.Run(tc.name, func(t *testing.T) {
			got, err := parseEnvInstruction(tc.args)
			if (err != nil) != tc.wantErr {
				t.Fatalf("err = %v, want error %v", err, tc.wantErr)
			}
			if !tc.wantErr && !reflect.DeepEqual(got, tc.want) {
				t.Errorf("got %v, want %v", got, tc.want)
			}
		})
	}
}

// The cases follow the examples of the .dockerignore section of the
// Dockerfile reference (docs.docker.com).
func TestDockerignore(t *testing.T) {
	m, err := parseDockerignore("# c\n*/temp*\n*/*/temp*\ntemp?\n**/*.go\n!keep.go\n/.git\n")
	if err != nil {
		t.Fatal(err)
	}
	tests := []struct {
		path string
		want bool
	}{
		{"somedir/temporary.txt", true},
		{"somedir/subdir/temporary.txt", true},
		{"tempa", true},
		{"tempab", false},
		{"a/b/c.go", true},
		{"c.go", true},
		{"keep.go", false},
		{".git/HEAD", true},
		{"x/.git", false},
		{"README.md", false},
	}
	for _, tc := range tests {
		t.Run(tc.path, func(t *testing.T) {
			if got := m.Excluded(tc.path); got != tc.want {
				t.Errorf("Excluded(%q) = %v, want %v", tc.path, got, tc.want)
			}
		})
	}
	if _, err := parseDockerignore("a[\n"); err == nil {
		t.Error("a malformed pattern was accepted")
	}
}

func TestParseUnit(t *testing.T) {
	tests := []struct {
		name    string
		src     string
		want    unit
		wantErr bool
	}{
		{
			name: "sections, repeats, comments, continuation",
			src:  "[Unit]\nDescription = x\n; c\n[Service]\nA=1\nA=\nA=2 \\\n  3\n# c\n",
			want: unit{"Unit": {"Description": {"x"}}, "Service": {"A": {"1", "", "2    3"}}},
		},
		{name: "assignment before section", src: "A=1\n", wantErr: true},
		{name: "no equals", src: "[S]\nfoo\n", wantErr: true},
		{name: "bad header", src: "[S\n", wantErr: true},
		{name: "dangling continuation", src: "[S]\nA=1 \\", wantErr: true},
	}
	for _, tc := range tests {
		t.Run(tc.name, func(t *testing.T) {
			got, err := parseUnit(tc.src)
			if (err != nil) != tc.wantErr {
				t.Fatalf("err = %v, want error %v", err, tc.wantErr)
			}
			if !tc.wantErr && !reflect.DeepEqual(got, tc.want) {
				t.Errorf("got %v, want %v", got, tc.want)
			}
		})
	}
}

func TestParseEnvFile(t *testing.T) {
	tests := []struct {
		name    string
		src     string
		want    map[string]string
		wantErr bool
	}{
		{name: "plain and quoted", src: "# c\nA=1\n\nB=\"x y\"\n; c\nC='z'\n", want: map[string]string{"A": "1", "B": "x y", "C": "z"}},
		{name: "bad name", src: "1A=1\n", wantErr: true},
		{name: "no equals", src: "A\n", wantErr: true},
	}
	for _, tc := range tests {
		t.Run(tc.name, func(t *testing.T) {
			got, _, err := parseEnvFile(tc.src)
			if (err != nil) != tc.wantErr {
				t.Fatalf("err = %v, want error %v", err, tc.wantErr)
			}
			if !tc.wantErr && !reflect.DeepEqual(got, tc.want) {
				t.Errorf("got %v, want %v", got, tc.want)
			}
		})
	}
}

func FuzzParseDockerfile(f *testing.F) {
	f.Add("FROM a AS b\nRUN x \\\n y\nFROM c\nUSER 1\n")
	f.Add("ARG A\nFROM --platform=x a\nENV A=1 B=\"2\"\n")
	f.Fuzz(func(t *testing.T, src string) {
		stages, err := parseDockerfile(src)
		if err != nil {
			return
		}
		for _, s := range stages {
			if s.Image == "" {
				t.Fatalf("stage without an image from %q", src)
			}
			for _, in := range s.Body {
				if in.Cmd == "" || in.Cmd != strings.ToUpper(in.Cmd) || in.Cmd == "FROM" {
					t.Fatalf("bad instruction %+v", in)
				}
				if in.Cmd == "ENV" {
					_, _ = parseEnvInstruction(in.Args)
				}
			}
		}
	})
}

func FuzzDockerignore(f *testing.F) {
	f.Add("**/*.go\n!x.go\n", "a/b.go")
	f.Add(".git\ntestdata\n", "testdata/x/y")
	f.Fuzz(func(t *testing.T, patterns, p string) {
		m, err := parseDockerignore(patterns)
		if err != nil {
			return
		}
		// Everything under an excluded directory is excluded too, unless a
		// "!" pattern brings it back.
		if m.Excluded(p) && !strings.Contains(patterns, "!") && !m.Excluded(p+"/child") {
			t.Fatalf("%q excluded but %q not, patterns %q", p, p+"/child", patterns)
		}
	})
}

func FuzzParseUnit(f *testing.F) {
	f.Add("[Service]\nA=1\nA=\n")
	f.Add("[Unit]\nX=a \\\n b\n")
	f.Fuzz(func(t *testing.T, src string) {
		u, err := parseUnit(src)
		if err != nil {
			return
		}
		for sec, kv := range u {
			for k := range kv {
				if k == "" || strings.ContainsAny(k, "=\n") {
					t.Fatalf("bad key %q in [%s]", k, sec)
				}
			}
		}
	})
}

func FuzzParseEnvFile(f *testing.F) {
	f.Add("A=1\nB=\"x\"\n")
	f.Fuzz(func(t *testing.T, src string) {
		env, order, err := parseEnvFile(src)
		if err != nil {
			return
		}
		if len(env) != len(order) {
			t.Fatalf("%d names but %d in order", len(env), len(order))
		}
		for _, k := range order {
			if !validEnvName(k) {
				t.Fatalf("invalid name %q accepted", k)
			}
		}
	})
}
