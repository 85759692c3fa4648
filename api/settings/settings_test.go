package settings_test

import (
	"errors"
	"flag"
	"fmt"
	"io"
	"math"
	"os"
	"path/filepath"
	"reflect"
	"strings"
	"testing"
	"time"

	"github.com/deadspace-fhir/deadspace/api/serve"
	"github.com/deadspace-fhir/deadspace/api/settings"
	"github.com/deadspace-fhir/deadspace/derive"
)

// goFields are the Go names of the settings and of derive.Config; no
// message may show them, since operators know flags, not fields.
var goFields = []string{"Window", "CodesFile", "Barometric", "CO2Basis", "CodeSystem", "FallDrop", "FallSustain", "FallBaseline",
	"Fall.Drop", "Fall.Sustain", "Fall.Baseline", "BarometricPressure", "PercentBasis"}

func TestResolveNamesTheFlagAndTheValue(t *testing.T) {
	cases := []struct {
		name   string
		change func(*settings.Derivation)
		want   string
	}{
		{"barometric pressure of 0", func(d *settings.Derivation) { d.Barometric = 0 }, "--barometric-pressure must be 250 to 2300 mm[Hg], got 0"},
		{"barometric pressure in kPa", func(d *settings.Derivation) { d.Barometric = 101.3 }, "--barometric-pressure must be 250 to 2300 mm[Hg], got 101.3"},
		{"barometric pressure NaN", func(d *settings.Derivation) { d.Barometric = math.NaN() }, "--barometric-pressure must be 250 to 2300 mm[Hg], got NaN"},
		{"negative window", func(d *settings.Derivation) { d.Window = -time.Minute }, "--window must be between 1m0s and 6h0m0s, got -1m0s"},
		{"window in seconds by mistake", func(d *settings.Derivation) { d.Window = 5 * time.Second }, "--window must be between 1m0s and 6h0m0s, got 5s"},
		{"zero fall drop", func(d *settings.Derivation) { d.FallDrop = 0 }, "--fall-drop must be more than 0 and at most 50 mm[Hg], got 0"},
		{"fall drop infinite", func(d *settings.Derivation) { d.FallDrop = math.Inf(1) }, "--fall-drop must be more than 0 and at most 50 mm[Hg], got +Inf"},
		{"fall sustain 0", func(d *settings.Derivation) { d.FallSustain = 0 }, "--fall-sustain must be between 10s and 2h0m0s, got 0s"},
		{"fall baseline a week", func(d *settings.Derivation) { d.FallBaseline = 7 * 24 * time.Hour }, "--fall-baseline must be between 1m0s and 24h0m0s, got 168h0m0s"},
		{"unknown CO2 basis", func(d *settings.Derivation) { d.CO2Basis = "damp" }, `--co2-basis must be dry or wet, got "damp"`},
		{"relative code system", func(d *settings.Derivation) { d.CodeSystem = "dead-space" }, `--code-system must be an absolute http, https or urn URI, got "dead-space"`},
		{"code system with a bar", func(d *settings.Derivation) { d.CodeSystem = "https://x.example/cs|1" }, `--code-system must be an absolute http, https or urn URI, got "https://x.example/cs|1"`},
		{"missing code table", func(d *settings.Derivation) { d.CodesFile = "/nonexistent/codes.json" }, `--codes "/nonexistent/codes.json": `},
	}
	for _, tc := range cases {
		t.Run(tc.name, func(t *testing.T) {
			d := settings.Defaults()
			tc.change(&d)
			_, err := d.Resolve("test")
			if err == nil {
				t.Fatal("accepted")
			}
			if !strings.Contains(err.Error(), tc.want) {
				t.Errorf("got %q\nwant it to contain %q", err, tc.want)
			}
			checkNoGoFields(t, err.Error())
		})
	}
}

func checkNoGoFields(t *testing.T, msg string) {
	t.Helper()
	for _, f := range goFields {
		for _, w := range strings.FieldsFunc(msg, func(r rune) bool { return r == ' ' || r == ':' || r == '\n' || r == ',' }) {
			if w == f {
				t.Errorf("message names the Go field %q: %q", f, msg)
			}
		}
	}
}

func TestResolveReportsEveryProblemAtOnce(t *testing.T) {
	d := settings.Defaults()
	d.Barometric, d.Window, d.FallDrop, d.CO2Basis = 0, 0, -1, "wet-ish"
	_, err := d.Resolve("test")
	if err == nil {
		t.Fatal("accepted")
	}
	for _, f := range []string{"--barometric-pressure", "--window", "--fall-drop", "--co2-basis"} {
		if !strings.Contains(err.Error(), f) {
			t.Errorf("%s missing from %q", f, err)
		}
	}
}

func TestDefaultsResolveToThePackagesDefaults(t *testing.T) {
	r, err := settings.Defaults().Resolve("1.2.3")
	if err != nil {
		t.Fatal(err)
	}
	if !reflect.DeepEqual(r.Derive, derive.DefaultConfig()) {
		t.Errorf("derive config %+v, want derive.DefaultConfig() %+v", r.Derive, derive.DefaultConfig())
	}
	if r.Decode.Units.BarometricPressure != 760 || r.Decode.Table == nil || r.Encode.SoftwareVersion != "1.2.3" {
		t.Errorf("resolved %+v", r)
	}
}

// TestEnvironmentFillsFlagsNotGiven checks the one rule for variables:
// a flag on the command line wins, a variable fills a flag not given, and
// a bad variable is reported with its name, flag and value.
func TestEnvironmentFillsFlagsNotGiven(t *testing.T) {
	env := map[string]string{
		"DEADSPACE_WINDOW":              "7m",
		"DEADSPACE_BAROMETRIC_PRESSURE": "700",
		"DEADSPACE_FALL_DROP":           "ten",
		"DEADSPACE_FALL_SUSTAIN":        "forever",
	}
	var d settings.Derivation
	fs := flag.NewFlagSet("x", flag.ContinueOnError)
	fs.SetOutput(io.Discard)
	d.Register(fs)
	if err := fs.Parse([]string{"--barometric-pressure", "720"}); err != nil {
		t.Fatal(err)
	}
	err := settings.ApplyEnv(fs, func(k string) string { return env[k] })
	if d.Window != 7*time.Minute {
		t.Errorf("window %v, want 7m from DEADSPACE_WINDOW", d.Window)
	}
	if d.Barometric != 720 {
		t.Errorf("barometric %v, want the command line's 720", d.Barometric)
	}
	for _, want := range []string{`DEADSPACE_FALL_DROP (--fall-drop) = "ten": not a number`, `DEADSPACE_FALL_SUSTAIN (--fall-sustain) = "forever": not a duration`} {
		if err == nil || !strings.Contains(err.Error(), want) {
			t.Errorf("error %v, want it to contain %q", err, want)
		}
	}
}

func TestEnvName(t *testing.T) {
	if got := settings.EnvName("fall-baseline"); got != "DEADSPACE_FALL_BASELINE" {
		t.Errorf("got %s", got)
	}
}

// TestCodesFileIsLoaded checks that a site table given by flag is the one
// the decoder gets.
func TestCodesFileIsLoaded(t *testing.T) {
	path := filepath.Join(t.TempDir(), "codes.json")
	if err := os.WriteFile(path, []byte(`not json`), 0o600); err != nil {
		t.Fatal(err)
	}
	d := settings.Defaults()
	d.CodesFile = path
	if _, err := d.Resolve("t"); err == nil || !strings.Contains(err.Error(), "--codes") {
		t.Fatalf("a broken site table gave %v", err)
	}
	var pathErr *os.PathError
	d.CodesFile = filepath.Join(t.TempDir(), "absent.json")
	if _, err := d.Resolve("t"); !errors.As(err, &pathErr) {
		t.Fatalf("a missing site table gave %v, want the file error wrapped", err)
	}
}

// TestServeRegistersTheSameDerivationFlags checks that serve takes every
// derivation flag from here, with the same default and help, so replay and
// serve cannot drift apart again.
func TestServeRegistersTheSameDerivationFlags(t *testing.T) {
	var d settings.Derivation
	own := flag.NewFlagSet("settings", flag.ContinueOnError)
	d.Register(own)
	var cfg serve.Config
	sfs := flag.NewFlagSet("serve", flag.ContinueOnError)
	cfg.Bind(sfs)
	n := 0
	own.VisitAll(func(f *flag.Flag) {
		n++
		g := sfs.Lookup(f.Name)
		if g == nil {
			t.Errorf("serve lacks --%s", f.Name)
			return
		}
		if g.DefValue != f.DefValue || g.Usage != f.Usage {
			t.Errorf("--%s: serve has default %q (%q), settings %q (%q)", f.Name, g.DefValue, g.Usage, f.DefValue, f.Usage)
		}
	})
	if n != 8 {
		t.Errorf("%d derivation flags, want 8", n)
	}
	if !reflect.DeepEqual(cfg.Derivation, settings.Defaults()) {
		t.Errorf("serve's derivation defaults %+v, want %+v", cfg.Derivation, settings.Defaults())
	}
}

// commandFlags is a command's flag set as the commands build it: the
// derivation flags and a boolean of the command's own.
func commandFlags(t *testing.T) (*flag.FlagSet, *settings.Derivation, *bool, *strings.Builder) {
	t.Helper()
	var out strings.Builder
	fs := settings.NewCommand("x", "usage: x [flags] FILE...", &out)
	d := new(settings.Derivation)
	d.Register(fs)
	dry := fs.Bool("dry-run", false, "derive without writing")
	return fs, d, dry, &out
}

// TestParseReportsEveryBadFlag checks that parsing goes on past a bad flag,
// so a command reports every one with its other problems, and that a flag
// whose value does not parse keeps its value: no range check then reports
// a value nobody gave.
func TestParseReportsEveryBadFlag(t *testing.T) {
	cases := []struct {
		name       string
		args       []string
		want       []string // in the parse error, in order
		positional []string
		check      func(t *testing.T, d settings.Derivation, dry bool)
	}{
		{"every bad value at once", []string{"--window", "5x", "--barometric-pressure", "0", "--fall-drop", "ten", "a.ndjson"},
			[]string{`--window "5x": not a duration such as 90s, 5m or 2h`, `--fall-drop "ten": not a number`}, []string{"a.ndjson"},
			func(t *testing.T, d settings.Derivation, _ bool) {
				_, err := d.Resolve("t")
				if err == nil || !strings.Contains(err.Error(), "--barometric-pressure must be 250 to 2300 mm[Hg], got 0") {
					t.Errorf("the range check of a value given lacks: %v", err)
				}
				for _, f := range []string{"--window must", "--fall-drop must"} {
					if err != nil && strings.Contains(err.Error(), f) {
						t.Errorf("a value that did not parse was range-checked: %v", err)
					}
				}
			}},
		{"a bad value keeps the one given before", []string{"--window", "10m", "--window=zz"}, []string{`--window "zz": not a duration`}, nil,
			func(t *testing.T, d settings.Derivation, _ bool) {
				if d.Window != 10*time.Minute {
					t.Errorf("window %v, want the 10m given first", d.Window)
				}
			}},
		{"a bad value keeps the default", []string{"--barometric-pressure", "abc"}, []string{`--barometric-pressure "abc": not a number`}, nil,
			func(t *testing.T, d settings.Derivation, _ bool) {
				if d.Barometric != settings.Defaults().Barometric {
					t.Errorf("barometric %v, want the default", d.Barometric)
				}
			}},
		{"unknown flags between good ones", []string{"--nope", "--window", "7m", "-also-nope=1", "a.ndjson"},
			[]string{"unknown flag --nope", "unknown flag --also-nope"}, []string{"a.ndjson"},
			func(t *testing.T, d settings.Derivation, _ bool) {
				if d.Window != 7*time.Minute {
					t.Errorf("window %v, want 7m", d.Window)
				}
			}},
		{"a flag without its value", []string{"a.ndjson", "--window"}, []string{"--window needs a value"}, []string{"a.ndjson"}, nil},
		{"bad syntax", []string{"---window", "5m", "--=x"}, []string{"bad flag syntax: ---window", "bad flag syntax: --=x"}, []string{"5m"}, nil},
		{"a boolean takes no separate value", []string{"--dry-run", "a.ndjson", "-dry-run=maybe"}, []string{`--dry-run "maybe": not true or false`}, []string{"a.ndjson"},
			func(t *testing.T, _ settings.Derivation, dry bool) {
				if !dry {
					t.Error("--dry-run before the bad one was lost")
				}
			}},
		{"flags anywhere, -- ends them", []string{"a.ndjson", "--window", "2m", "-", "--", "--fall-drop", "x"}, nil, []string{"a.ndjson", "-", "--fall-drop", "x"},
			func(t *testing.T, d settings.Derivation, _ bool) {
				if d.Window != 2*time.Minute || d.FallDrop != settings.Defaults().FallDrop {
					t.Errorf("window %v, fall drop %v", d.Window, d.FallDrop)
				}
			}},
		{"nothing", nil, nil, nil, nil},
	}
	for _, tc := range cases {
		t.Run(tc.name, func(t *testing.T) {
			fs, d, dry, out := commandFlags(t)
			positional, help, err := settings.ParseCommand(fs, tc.args)
			if help {
				t.Fatal("help without -h")
			}
			if !reflect.DeepEqual(positional, tc.positional) {
				t.Errorf("positional %q, want %q", positional, tc.positional)
			}
			if len(tc.want) == 0 && err != nil {
				t.Errorf("error %v, want none", err)
			}
			msg := fmt.Sprint(err)
			at := 0
			for _, w := range tc.want {
				i := strings.Index(msg[at:], w)
				if i < 0 {
					t.Errorf("error %q lacks %q (after what came before it)", msg, w)
					continue
				}
				at += i + len(w)
			}
			if n := strings.Count(msg, "\n") + 1; err != nil && n != len(tc.want) {
				t.Errorf("%d problems reported, want %d: %q", n, len(tc.want), msg)
			}
			if out.Len() > 0 {
				t.Errorf("parsing printed %q: the command reports the errors with its others", out)
			}
			checkNoGoFields(t, msg)
			if tc.check != nil {
				tc.check(t, *d, *dry)
			}
		})
	}
}

// TestParseHelp checks that -h prints the usage and stops the command
// (ExitOK), whatever else is wrong.
func TestParseHelp(t *testing.T) {
	for _, args := range [][]string{{"-h"}, {"--help"}, {"--window", "5x", "-help", "--nope"}} {
		t.Run(strings.Join(args, " "), func(t *testing.T) {
			fs, _, _, out := commandFlags(t)
			_, help, err := settings.ParseCommand(fs, args)
			if !help || err != nil {
				t.Errorf("help %v, error %v; want help and no error", help, err)
			}
			if !strings.Contains(out.String(), "usage: x [flags] FILE...") || !strings.Contains(out.String(), "-fall-baseline") {
				t.Errorf("usage printed: %q", out)
			}
		})
	}
}

// TestBadValueIsReportedOnce checks that a value that does not parse,
// from the command line or the environment, is reported once, by its parse
// error: the flag keeps the value it had, so no range check reports a
// value nobody gave, and a bad flag on the command line still wins over
// its variable.
func TestBadValueIsReportedOnce(t *testing.T) {
	cases := []struct {
		name string
		args []string
		env  map[string]string
		want []string
	}{
		{"bad variables", nil, map[string]string{"DEADSPACE_BAROMETRIC_PRESSURE": "abc", "DEADSPACE_WINDOW": "zz"},
			[]string{`DEADSPACE_BAROMETRIC_PRESSURE (--barometric-pressure) = "abc": not a number`, `DEADSPACE_WINDOW (--window) = "zz": not a duration`}},
		{"a bad flag over a variable", []string{"--window", "5x"}, map[string]string{"DEADSPACE_WINDOW": "10s"},
			[]string{`--window "5x": not a duration`}},
		{"bad flag and bad variable of other flags", []string{"--fall-sustain", "long"}, map[string]string{"DEADSPACE_FALL_BASELINE": "short"},
			[]string{`--fall-sustain "long"`, `DEADSPACE_FALL_BASELINE (--fall-baseline) = "short"`}},
	}
	for _, tc := range cases {
		t.Run(tc.name, func(t *testing.T) {
			fs, d, _, _ := commandFlags(t)
			_, _, err := settings.ParseCommand(fs, tc.args)
			_, rerr := d.Resolve("t")
			err = errors.Join(err, settings.ApplyEnv(fs, func(k string) string { return tc.env[k] }))
			if rerr != nil {
				t.Errorf("before the environment: %v", rerr)
			}
			_, rerr = d.Resolve("t")
			all := errors.Join(err, rerr)
			if all == nil {
				t.Fatal("accepted")
			}
			msg := all.Error()
			for _, w := range tc.want {
				if strings.Count(msg, w) != 1 {
					t.Errorf("%q is not reported once in %q", w, msg)
				}
			}
			if n := strings.Count(msg, "\n") + 1; n != len(tc.want) {
				t.Errorf("%d problems, want only the %d parse errors: %q", n, len(tc.want), msg)
			}
			if *d != settings.Defaults() {
				t.Errorf("settings %+v, want the defaults kept", *d)
			}
		})
	}
}
