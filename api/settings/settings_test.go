package settings_test

import (
	"errors"
	"flag"
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
