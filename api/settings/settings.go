// Package settings is the one derivation configuration of deadspace: the
// flags, their environment variables and defaults, and their checks. replay
// and serve register the same flags from here, and the gRPC Compute call
// runs with what serve built from them, so an offline replay and the live
// service given the same settings derive the same values.
//
// Every flag can also be set by an environment variable, for every
// command: DEADSPACE_ and the flag name in upper case with dashes as
// underscores (--barometric-pressure is DEADSPACE_BAROMETRIC_PRESSURE). A
// flag on the command line wins over its variable.
//
// [Derivation.Resolve] checks every value and reports every problem at
// once, each naming its flag and the value given, never a Go field.
package settings

import (
	"errors"
	"flag"
	"fmt"
	"io"
	"math"
	"net/url"
	"strings"
	"time"

	"github.com/deadspace-fhir/deadspace/derive"
	"github.com/deadspace-fhir/deadspace/fhir/codes"
	"github.com/deadspace-fhir/deadspace/fhir/decode"
	"github.com/deadspace-fhir/deadspace/fhir/encode"
	"github.com/deadspace-fhir/deadspace/fhir/units"
)

// Bounds of the checks. The barometric bounds span the highest inhabited
// altitudes and a hyperbaric chamber at 3 atm (from memory), and refuse a
// pressure typed in kPa (about 101) or left at 0. The window and fall
// bounds keep a typo (a minute for an hour, or the reverse) from passing.
const (
	MinBarometric   = 250.0
	MaxBarometric   = 2300.0
	MinWindow       = time.Minute
	MaxWindow       = 6 * time.Hour
	MaxFallDrop     = 50.0 // mm[Hg]
	MinFallSustain  = 10 * time.Second
	MaxFallSustain  = 2 * time.Hour
	MinFallBaseline = time.Minute
	MaxFallBaseline = 24 * time.Hour
)

// FlagOfField names the flag that sets each derive.Config field, for
// derive.Config.ValidateAs: an error never shows a Go field where a flag
// exists.
var FlagOfField = map[string]string{
	"Window": "--window", "Fall.Drop": "--fall-drop", "Fall.Sustain": "--fall-sustain", "Fall.Baseline": "--fall-baseline",
}

// Derivation is the derivation configuration every command shares.
type Derivation struct {
	Window       time.Duration
	CodesFile    string
	Barometric   float64
	CO2Basis     string
	CodeSystem   string
	FallDrop     float64
	FallSustain  time.Duration
	FallBaseline time.Duration
}

// Defaults is the configuration with no flag or variable set.
func Defaults() Derivation {
	d := derive.DefaultConfig()
	return Derivation{
		Window:       d.Window,
		Barometric:   units.DefaultBarometricPressure,
		CO2Basis:     units.BasisDry.String(),
		CodeSystem:   encode.DefaultCodeSystem,
		FallDrop:     d.Fall.Drop,
		FallSustain:  d.Fall.Sustain,
		FallBaseline: d.Fall.Baseline,
	}
}

// Register adds the derivation flags to fs, with their defaults.
func (c *Derivation) Register(fs *flag.FlagSet) {
	d := Defaults()
	fs.DurationVar(&c.Window, "window", d.Window, "pairing window on each side of a blood gas's sample time")
	fs.StringVar(&c.CodesFile, "codes", "", "site code table (JSON) merged over the built-in LOINC and MDC table")
	fs.Float64Var(&c.Barometric, "barometric-pressure", d.Barometric, fmt.Sprintf("barometric pressure in mm[Hg] (%g to %g), for CO2 reported in percent", MinBarometric, MaxBarometric))
	fs.StringVar(&c.CO2Basis, "co2-basis", d.CO2Basis, "how percent CO2 becomes a pressure where the code table sets no basis: dry (F x PB) or wet (F x (PB - 47))")
	fs.StringVar(&c.CodeSystem, "code-system", d.CodeSystem, "canonical URL of the CodeSystem of the derived codes")
	fs.Float64Var(&c.FallDrop, "fall-drop", d.FallDrop, "EtCO2 fall below baseline, in mm[Hg], that counts")
	fs.DurationVar(&c.FallSustain, "fall-sustain", d.FallSustain, "how long an EtCO2 fall must last to be reported")
	fs.DurationVar(&c.FallBaseline, "fall-baseline", d.FallBaseline, "how far back the EtCO2 baseline reaches")
}

// Resolved is what the derivation settings select, ready for replay, the
// engine and the encoder.
type Resolved struct {
	Derive derive.Config
	Decode decode.Options
	Encode encode.Options
}

// Resolve checks every setting, loads the site code table, and builds the
// options; version is stamped on the derived resources. All problems are
// reported together.
func (c Derivation) Resolve(version string) (Resolved, error) {
	var errs []error
	bad := func(flagName, format string, args ...any) {
		errs = append(errs, fmt.Errorf("--%s "+format, append([]any{flagName}, args...)...))
	}
	between := func(flagName string, v, lo, hi time.Duration) {
		if v < lo || v > hi {
			bad(flagName, "must be between %v and %v, got %v", lo, hi, v)
		}
	}
	between("window", c.Window, MinWindow, MaxWindow)
	between("fall-sustain", c.FallSustain, MinFallSustain, MaxFallSustain)
	between("fall-baseline", c.FallBaseline, MinFallBaseline, MaxFallBaseline)
	if !(c.FallDrop > 0 && c.FallDrop <= MaxFallDrop) {
		bad("fall-drop", "must be more than 0 and at most %g mm[Hg], got %v", MaxFallDrop, c.FallDrop)
	}
	if math.IsNaN(c.Barometric) || c.Barometric < MinBarometric || c.Barometric > MaxBarometric {
		bad("barometric-pressure", "must be %g to %g mm[Hg], got %v", MinBarometric, MaxBarometric, c.Barometric)
	}
	basis, err := units.ParseBasis(c.CO2Basis)
	if err != nil {
		bad("co2-basis", "must be dry or wet, got %q", c.CO2Basis)
	}
	if u, err := url.Parse(c.CodeSystem); err != nil || !(u.Scheme == "http" || u.Scheme == "https" || u.Scheme == "urn") || (u.Scheme != "urn" && u.Host == "") || strings.ContainsAny(c.CodeSystem, " |") {
		bad("code-system", "must be an absolute http, https or urn URI, got %q", c.CodeSystem)
	}
	table, err := codes.LoadFile(c.CodesFile)
	if err != nil {
		bad("codes", "%q: %w", c.CodesFile, err)
	}

	r := Resolved{Derive: derive.DefaultConfig(), Encode: encode.DefaultOptions()}
	r.Derive.Window = c.Window
	r.Derive.Fall.Drop = c.FallDrop
	r.Derive.Fall.Sustain = c.FallSustain
	r.Derive.Fall.Baseline = c.FallBaseline
	r.Decode = decode.Options{Table: table, Units: units.Options{BarometricPressure: c.Barometric, PercentBasis: basis}}
	r.Encode.CodeSystem = c.CodeSystem
	r.Encode.SoftwareVersion = version
	if len(errs) == 0 {
		// The checks above are stricter than the packages' own; these stay
		// as a guard should a package tighten its rules.
		for _, err := range []error{r.Derive.ValidateAs(FlagOfField), r.Decode.Units.Validate()} {
			if err != nil {
				errs = append(errs, err)
			}
		}
		if _, err := encode.New(r.Encode); err != nil {
			errs = append(errs, err)
		}
	}
	return r, errors.Join(errs...)
}

// EnvName is the environment variable of a flag: DEADSPACE_ and the flag's
// name in upper case with dashes as underscores.
func EnvName(flagName string) string {
	return "DEADSPACE_" + strings.ToUpper(strings.ReplaceAll(flagName, "-", "_"))
}

// ApplyEnv sets every flag of fs not given on the command line from its
// environment variable. It reports every bad value at once, naming the
// variable, its flag and the value. A flag whose variable does not parse
// keeps its default, so that no check reports a value nobody gave.
func ApplyEnv(fs *flag.FlagSet, getenv func(string) string) error {
	set := make(map[string]bool)
	fs.Visit(func(f *flag.Flag) { set[f.Name] = true })
	var errs []error
	fs.VisitAll(func(f *flag.Flag) {
		if set[f.Name] {
			return
		}
		if v := getenv(EnvName(f.Name)); v != "" {
			before := f.Value.String()
			if err := f.Value.Set(v); err != nil {
				// The flag package's values set their zero on a failed
				// parse: put back what the flag held.
				_ = f.Value.Set(before)
				errs = append(errs, fmt.Errorf("%s (--%s) = %q: %s", EnvName(f.Name), f.Name, v, expected(f, err)))
			}
		}
	})
	return errors.Join(errs...)
}

// expected says what a flag takes, in place of the flag package's bare
// "parse error".
func expected(f *flag.Flag, err error) string {
	g, ok := f.Value.(flag.Getter)
	if !ok {
		return err.Error()
	}
	switch g.Get().(type) {
	case time.Duration:
		return "not a duration such as 90s, 5m or 2h"
	case float64:
		return "not a number"
	case int, int64, uint, uint64:
		return "not a whole number"
	case bool:
		return "not true or false"
	}
	return err.Error()
}

// ParseInterspersed parses flags that may come before, between or after the
// positional arguments, as in "replay a.ndjson b.ndjson --format table", and
// returns the positional arguments. "--" ends the flags.
//
// It reads every argument whatever goes wrong, so that a command reports
// every bad flag together with its other problems: the error joins one
// line per unknown flag, flag without its value and value its flag cannot
// take (naming the flag, the value and what the flag takes). A flag whose
// value does not parse keeps the value it had and counts as given (fs.Visit
// lists it), so neither a range check nor its environment variable reports
// a value nobody gave. An argument that follows an unknown flag is taken as
// positional. After -h or -help it prints the usage and returns
// flag.ErrHelp.
//
// The syntax is the flag package's: -name or --name, then =value or the
// next argument as the value; a boolean flag takes only =value.
func ParseInterspersed(fs *flag.FlagSet, args []string) ([]string, error) {
	var positional []string
	var errs []error
	for i := 0; i < len(args); i++ {
		arg := args[i]
		if arg == "--" {
			positional = append(positional, args[i+1:]...)
			break
		}
		if len(arg) < 2 || arg[0] != '-' {
			positional = append(positional, arg)
			continue
		}
		name, value, hasValue := strings.Cut(strings.TrimPrefix(arg[1:], "-"), "=")
		if name == "" || name[0] == '-' {
			errs = append(errs, fmt.Errorf("bad flag syntax: %s", arg))
			continue
		}
		f := fs.Lookup(name)
		if f == nil {
			if name == "h" || name == "help" {
				usage(fs)
				return nil, flag.ErrHelp
			}
			errs = append(errs, fmt.Errorf("unknown flag --%s (-h lists the flags)", name))
			continue
		}
		if !hasValue {
			switch {
			case isBool(f):
				value = "true"
			case i+1 < len(args):
				i++
				value = args[i]
			default:
				errs = append(errs, fmt.Errorf("--%s needs a value", name))
				continue
			}
		}
		before := f.Value.String()
		if err := fs.Set(name, value); err != nil {
			// The flag package's values set their zero on a failed parse:
			// put back what the flag held, which also marks it as given.
			_ = fs.Set(name, before)
			errs = append(errs, fmt.Errorf("--%s %q: %s", name, value, expected(f, err)))
		}
	}
	return positional, errors.Join(errs...)
}

// isBool reports whether f is a boolean flag, which takes no separate value.
func isBool(f *flag.Flag) bool {
	b, ok := f.Value.(interface{ IsBoolFlag() bool })
	return ok && b.IsBoolFlag()
}

// usage prints fs's usage, as the flag package does after -h.
func usage(fs *flag.FlagSet) {
	if fs.Usage != nil {
		fs.Usage()
		return
	}
	fmt.Fprintf(fs.Output(), "Usage of %s:\n", fs.Name())
	fs.PrintDefaults()
}

// Exit statuses every command shares: 0 all well, 1 the run failed, 2 bad
// usage, 3 the run finished but left some input out (skipped lines, refused
// resources).
const (
	ExitOK      = 0
	ExitFailed  = 1
	ExitUsage   = 2
	ExitSkipped = 3
)

// NewCommand returns the flag set of a command: errors and help go to
// stderr, the usage text before the flag list.
func NewCommand(name, usage string, stderr io.Writer) *flag.FlagSet {
	fs := flag.NewFlagSet(name, flag.ContinueOnError)
	fs.SetOutput(stderr)
	fs.Usage = func() {
		fmt.Fprintln(stderr, usage)
		fs.PrintDefaults()
	}
	return fs
}

// ParseCommand parses a command's arguments (flags anywhere, see
// [ParseInterspersed]). help is true after -h, once the usage is printed:
// the command stops there with ExitOK. err joins every bad flag: the
// command reports it with the rest of its configuration's problems and
// exits with ExitUsage.
func ParseCommand(fs *flag.FlagSet, args []string) (positional []string, help bool, err error) {
	positional, err = ParseInterspersed(fs, args)
	if errors.Is(err, flag.ErrHelp) {
		return nil, true, nil
	}
	return positional, false, err
}
