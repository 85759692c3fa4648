package units_test

import (
	"bytes"
	"encoding/json"
	"errors"
	"flag"
	"math"
	"os"
	"os/exec"
	"path/filepath"
	"strings"
	"testing"

	"github.com/deadspace-fhir/deadspace/derive"
	"github.com/deadspace-fhir/deadspace/fhir/codes"
	"github.com/deadspace-fhir/deadspace/fhir/fhirtest"
	"github.com/deadspace-fhir/deadspace/fhir/units"
)

var update = flag.Bool("update", false, "regenerate testdata/ucum-lhc-7.1.10.json with node")

const (
	referenceFile   = "testdata/ucum-lhc-7.1.10.json"
	referenceScript = "testdata/ucum-reference.mjs"
)

// referenceTable is the output of referenceScript: the verdicts of the UCUM
// reference library @lhncbc/ucum-lhc 7.1.10.
type referenceTable struct {
	Library string `json:"library"`
	Version string `json:"version"`
	Units   []struct {
		Unit   string `json:"unit"`
		Status string `json:"status"`
	} `json:"units"`
	Conversions []struct {
		From   string   `json:"from"`
		To     string   `json:"to"`
		Value  float64  `json:"value"`
		Status string   `json:"status"`
		ToVal  *float64 `json:"toVal"`
	} `json:"conversions"`
}

func loadReference(t *testing.T) referenceTable {
	t.Helper()
	data, err := os.ReadFile(referenceFile)
	if err != nil {
		t.Fatal(err)
	}
	var ref referenceTable
	if err := json.Unmarshal(data, &ref); err != nil {
		t.Fatal(err)
	}
	if ref.Library != "@lhncbc/ucum-lhc" || ref.Version != "7.1.10" {
		t.Fatalf("reference is %s %s, want @lhncbc/ucum-lhc 7.1.10", ref.Library, ref.Version)
	}
	return ref
}

func relDiff(a, b float64) float64 {
	if a == b {
		return 0
	}
	return math.Abs(a-b) / math.Max(math.Abs(a), math.Abs(b))
}

// Every unit string we accept must be valid UCUM according to ucum-lhc
// 7.1.10, and every string ucum-lhc refuses we must refuse. (We may refuse
// valid UCUM that we do not convert, such as cm[H2O] or ML, a megalitre.)
func TestUnitStringsAgainstUcumLhc(t *testing.T) {
	ref := loadReference(t)
	listed := map[string]bool{}
	for _, u := range ref.Units {
		t.Run(u.Unit, func(t *testing.T) {
			parsed, err := units.Parse(u.Unit)
			if err == nil {
				listed[parsed.Bare] = true
			}
			switch {
			case err == nil && u.Status != "valid":
				t.Errorf("we accept %q (as %q), ucum-lhc says %s", u.Unit, parsed.Bare, u.Status)
			case err != nil:
				var ue *units.Error
				if !errors.As(err, &ue) || ue.Reason != derive.ReasonUnitUnknown {
					t.Errorf("refusal of %q is %v, want an *Error with %s", u.Unit, err, derive.ReasonUnitUnknown)
				}
			}
		})
	}
	for _, u := range units.SupportedUnits() {
		if !listed[u] {
			t.Errorf("supported unit %q is not in the reference table; add it to %s", u, referenceScript)
		}
	}
}

// Every conversion ucum-lhc 7.1.10 performs to a kind's canonical unit we
// must perform with the same result (relative 1e-9), and every one it refuses
// we must refuse as a mismatch. The kind for each canonical unit is one whose
// Unit() it is; for mm[Hg] it is PaCO2, for which ucum-lhc and we both refuse
// a percent (the expired-gas percent conversion is checked separately).
func TestConversionsAgainstUcumLhc(t *testing.T) {
	ref := loadReference(t)
	kindFor := map[string]derive.Kind{
		"mm[Hg]": derive.KindPaCO2, "mL": derive.KindTidalVolume, "L/min": derive.KindMinuteVolume,
		"mL/min": derive.KindVCO2, "/min": derive.KindRespRate, "cm": derive.KindHeight,
	}
	for _, c := range ref.Conversions {
		k, ok := kindFor[c.To]
		if !ok || k.Unit() != c.To {
			t.Fatalf("no kind with canonical unit %q", c.To)
		}
		got, err := units.Convert(k, c.Value, c.From, units.Options{})
		switch {
		case c.Status == "succeeded":
			if err != nil {
				t.Errorf("%v %q → %q: ucum-lhc gives %v, we fail: %v", c.Value, c.From, c.To, *c.ToVal, err)
			} else if d := relDiff(got.ToValue/got.Conditions, *c.ToVal); d > 1e-9 {
				// UCUM gives annotations no meaning; the gas-condition
				// factor (TestGasConditions) is physics on top of it.
				t.Errorf("%v %q → %q = %v, ucum-lhc gives %v (rel diff %.2g)", c.Value, c.From, c.To, got.ToValue, *c.ToVal, d)
			}
		default:
			var ue *units.Error
			if !errors.As(err, &ue) || ue.Reason != derive.ReasonUnitMismatch {
				t.Errorf("%v %q → %q: ucum-lhc refuses, we give %+v, %v; want %s", c.Value, c.From, c.To, got, err, derive.ReasonUnitMismatch)
			}
		}
	}
}

// The committed table must be what the script prints with the installed
// library. CI installs testdata/node, so this runs there.
func TestReferenceTableCurrent(t *testing.T) {
	node, err := exec.LookPath("node")
	if err != nil {
		fhirtest.Missing(t, "node not installed: cannot check the ucum-lhc reference table is current")
	}
	if _, err := os.Stat(filepath.Join("..", "..", "testdata", "node", "node_modules", "@lhncbc", "ucum-lhc")); err != nil {
		fhirtest.Missing(t, "testdata/node/node_modules not installed (run npm ci in testdata/node): cannot check the ucum-lhc reference table is current")
	}
	out, err := exec.Command(node, referenceScript).Output()
	if err != nil {
		t.Fatalf("%s: %v", referenceScript, err)
	}
	if *update {
		if err := os.WriteFile(referenceFile, out, 0o644); err != nil {
			t.Fatal(err)
		}
		return
	}
	want, err := os.ReadFile(referenceFile)
	if err != nil {
		t.Fatal(err)
	}
	if !bytes.Equal(out, want) {
		t.Errorf("%s is stale; regenerate with go test ./fhir/units -run TestReferenceTableCurrent -update", referenceFile)
	}
}

func TestConvert(t *testing.T) {
	cases := []struct {
		name     string
		kind     derive.Kind
		value    float64
		unit     string
		opts     units.Options
		want     float64
		wantText string
		// source of the expected value
		source string
	}{
		{"kPa to mm[Hg]", derive.KindPaCO2, 5.3, "kPa", units.Options{}, 39.75337903721817,
			"5.3 kPa × 7.50064 = 39.7534 mm[Hg]", "measured with ucum-lhc 7.1.10 convertUnitTo"},
		{"canonical unit unchanged", derive.KindPaCO2, 40, "mm[Hg]", units.Options{}, 40,
			"40 mm[Hg] (canonical unit, no conversion)", "identity"},
		{"percent EtCO2 wet basis", derive.KindEtCO2, 5.0, "%", units.Options{BarometricPressure: 760, PercentBasis: units.BasisWet}, 35.65,
			"5 % × (760 − 47) mm[Hg] / 100 = 35.65 mm[Hg] (wet basis, BTPS)",
			"own arithmetic on the published formula PCO2 = FCO2 × (PB − 47) of the Intensive Care Med 2004 dead-space review (doi 10.1007/s00134-004-2194-8)"},
		{"percent EtCO2 dry basis", derive.KindEtCO2, 5.0, "%", units.Options{BarometricPressure: 760, PercentBasis: units.BasisDry}, 38.0,
			"5 % × 760 mm[Hg] / 100 = 38 mm[Hg] (dry basis, ambient pressure)", "own arithmetic, dry basis PCO2 = FCO2 × PB (common practice)"},
		{"percent default is dry at 760", derive.KindEtCO2, 5.0, "%", units.Options{}, 38.0, "", "own arithmetic, dry basis FCO2 × PB (common practice), package default"},
		{"percent mixed-expired wet", derive.KindMixedExpiredCO2, 5.0, "%{CO2}", units.Options{PercentBasis: units.BasisWet}, 35.65, "", "own arithmetic on the Intensive Care Med 2004 review formula FCO2 × (PB − 47)"},
		{"inches to cm", derive.KindHeight, 70, "[in_i]", units.Options{}, 177.8, "", "ucum-lhc 7.1.10: 70 [in_i] = 177.8 cm"},
		{"L/min to mL/min for VCO2", derive.KindVCO2, 0.25, "L/min", units.Options{}, 250, "", "UCUM: L = 10^3 mL"},
		{"annotated rate", derive.KindRespRate, 14, "{breaths}/min", units.Options{}, 14, "", "ucum-lhc 7.1.10: annotations carry no dimension"},
	}
	for _, tc := range cases {
		t.Run(tc.name, func(t *testing.T) {
			got, err := units.Convert(tc.kind, tc.value, tc.unit, tc.opts)
			if err != nil {
				t.Fatal(err)
			}
			if d := relDiff(got.ToValue, tc.want); d > 1e-9 {
				t.Errorf("ToValue = %v, want %v (%s)", got.ToValue, tc.want, tc.source)
			}
			if relDiff(got.Factor*tc.value, got.ToValue) > 1e-12 {
				t.Errorf("Factor %v × %v ≠ %v", got.Factor, tc.value, got.ToValue)
			}
			if got.ToUnit != tc.kind.Unit() || got.FromUnit != tc.unit || got.FromValue != tc.value {
				t.Errorf("conversion = %+v", got)
			}
			if tc.wantText != "" && got.Text != tc.wantText {
				t.Errorf("Text = %q, want %q", got.Text, tc.wantText)
			}
		})
	}
}

// PĒCO2 = 0.863 × VCO2 / VE holds only for VCO2 at STPD and VE at BTPS
// (from memory). By the gas laws (Boyle and Charles; own arithmetic),
// V(STPD) = V(BTPS) × (PB − 47)/760 × 273.15/310.15, with 47 mm[Hg] the
// water vapour pressure at 37 °C (alveolar gas tables: 47 mmHg, 6.25 kPa) and 37 °C the body
// temperature of BTPS: at 760 mm[Hg] the factor is 713/760 × 0.880703 =
// 0.826238, so 200 mL/min BTPS is 165.25 mL/min STPD; at 600 mm[Hg] (an
// altitude of about 2000 m) it is 553/760 × 0.880703 = 0.640833.
func TestGasConditions(t *testing.T) {
	t.Parallel()
	f760 := (760.0 - 47) / 760 * 273.15 / 310.15
	f600 := (600.0 - 47) / 760 * 273.15 / 310.15
	cases := []struct {
		name string
		kind derive.Kind
		v    float64
		code string
		pb   float64
		want float64
		bad  bool
	}{
		{"VCO2 at BTPS to STPD", derive.KindVCO2, 200, "mL/min{BTPS}", 0, 200 * f760, false},
		{"VCO2 at BTPS, lower-case annotation, at altitude", derive.KindVCO2, 0.2, "L/min{btps}", 600, 200 * f600, false},
		{"VCO2 already at STPD", derive.KindVCO2, 200, "mL/min{STPD}", 0, 200, false},
		{"VCO2 without annotation keeps the STPD assumption", derive.KindVCO2, 200, "mL/min", 0, 200, false},
		{"minute volume at STPD to BTPS", derive.KindMinuteVolume, 7, "L/min{STPD}", 0, 7 / f760, false},
		{"minute volume at BTPS", derive.KindMinuteVolume, 7, "L/min{BTPS}", 0, 7, false},
		{"tidal volume at STPD to BTPS", derive.KindTidalVolume, 413.1, "mL{STPD}", 0, 413.1 / f760, false},
		{"minute volume at ambient conditions needs the room temperature", derive.KindMinuteVolume, 7, "L/min{ATPS}", 0, 0, true},
		{"VCO2 at ATPD", derive.KindVCO2, 200, "mL/min{ATPD}", 0, 0, true},
		{"two conditions at once", derive.KindVCO2, 200, "mL{BTPS}/min{STPD}", 0, 0, true},
		{"an annotation that names no conditions", derive.KindVCO2, 200, "mL/min{measured}", 0, 200, false},
	}
	for _, tc := range cases {
		t.Run(tc.name, func(t *testing.T) {
			t.Parallel()
			got, err := units.Convert(tc.kind, tc.v, tc.code, units.Options{BarometricPressure: tc.pb})
			if tc.bad {
				var ue *units.Error
				if !errors.As(err, &ue) || ue.Reason != derive.ReasonUnitUnknown {
					t.Fatalf("Convert = %+v, %v; want a refusal with %s", got, err, derive.ReasonUnitUnknown)
				}
				return
			}
			if err != nil || relDiff(got.ToValue, tc.want) > 1e-12 {
				t.Fatalf("Convert = %+v, %v; want %v", got, err, tc.want)
			}
		})
	}
}

func TestConvertRefusals(t *testing.T) {
	cases := []struct {
		name   string
		kind   derive.Kind
		unit   string
		reason derive.Reason
	}{
		{"mmHg is not UCUM", derive.KindPaCO2, "mmHg", derive.ReasonUnitUnknown},
		{"kpa is not UCUM (case-sensitive)", derive.KindPaCO2, "kpa", derive.ReasonUnitUnknown},
		{"ML is a megalitre, not converted", derive.KindTidalVolume, "ML", derive.ReasonUnitUnknown},
		{"cm[H2O] is valid UCUM but not converted", derive.KindPaCO2, "cm[H2O]", derive.ReasonUnitUnknown},
		{"annotation before a symbol", derive.KindPaCO2, "{x}mm[Hg]", derive.ReasonUnitUnknown},
		{"space inside a unit", derive.KindPaCO2, "mm Hg", derive.ReasonUnitUnknown},
		{"empty", derive.KindPaCO2, "", derive.ReasonUnitUnknown},
		{"volume for a pressure", derive.KindPaCO2, "mL", derive.ReasonUnitMismatch},
		{"percent PaCO2", derive.KindPaCO2, "%", derive.ReasonUnitMismatch},
		{"percent tidal volume", derive.KindTidalVolume, "%", derive.ReasonUnitMismatch},
		{"concentration for a pressure", derive.KindPaCO2, "mmol/L", derive.ReasonUnitMismatch},
		{"mass for a height", derive.KindHeight, "kg", derive.ReasonUnitMismatch},
		{"bare annotation for a rate", derive.KindRespRate, "{breaths}", derive.ReasonUnitMismatch},
		{"volume for a flow", derive.KindMinuteVolume, "L", derive.ReasonUnitMismatch},
		{"unknown kind", derive.KindUnknown, "mL", derive.ReasonUnitMismatch},
	}
	for _, tc := range cases {
		t.Run(tc.name, func(t *testing.T) {
			_, err := units.Convert(tc.kind, 1, tc.unit, units.Options{})
			var ue *units.Error
			if !errors.As(err, &ue) {
				t.Fatalf("err = %v, want *units.Error", err)
			}
			if ue.Reason != tc.reason {
				t.Errorf("reason = %s, want %s (%v)", ue.Reason, tc.reason, err)
			}
		})
	}
}

func TestFromQuantity(t *testing.T) {
	cases := []struct {
		name       string
		q          units.Quantity
		want       float64
		wantSource string
		reason     derive.Reason
	}{
		{"code wins over unit", units.Quantity{System: codes.UCUM, Code: "kPa", Unit: "mmHg"}, 39.75337903721817, "code", ""},
		{"code without system read as UCUM", units.Quantity{Code: "kPa"}, 39.75337903721817, "code", ""},
		{"unit used when code absent", units.Quantity{Unit: "kPa"}, 39.75337903721817, "unit", ""},
		{"non-UCUM system refused", units.Quantity{System: "http://example.org/units", Code: "kPa"}, 0, "", derive.ReasonUnitUnknown},
		{"display-only unit not UCUM", units.Quantity{Unit: "mmHg"}, 0, "", derive.ReasonUnitUnknown},
		{"no unit at all", units.Quantity{}, 0, "", derive.ReasonUnitUnknown},
	}
	for _, tc := range cases {
		t.Run(tc.name, func(t *testing.T) {
			got, err := units.FromQuantity(derive.KindPaCO2, 5.3, tc.q, units.Options{})
			if tc.reason != "" {
				var ue *units.Error
				if !errors.As(err, &ue) || ue.Reason != tc.reason {
					t.Fatalf("err = %v, want reason %s", err, tc.reason)
				}
				return
			}
			if err != nil {
				t.Fatal(err)
			}
			if relDiff(got.ToValue, tc.want) > 1e-9 || got.Source != tc.wantSource {
				t.Errorf("got %v from %q, want %v from %q", got.ToValue, got.Source, tc.want, tc.wantSource)
			}
			if tc.wantSource == "unit" && !strings.Contains(got.Text, "Quantity.unit") {
				t.Errorf("Text %q does not say the unit came from Quantity.unit", got.Text)
			}
		})
	}
}

// UCUM's mm[Hg] (133.3220 Pa, the ucum-lhc 7.1.10 baseFactor, measured) is
// about 3 ppm below the conventional 133.322387415 Pa, as unit-conversion
// references state it: "1 mmHg equals exactly 133.322387415 pascals"
// (13.5951 g/cm³ × 9.80665 m/s² × 1 mm; the density and gravity from memory).
func TestMMHgConstant(t *testing.T) {
	const conventional = 133.322387415
	d := 1 - units.MMHgPascal/conventional
	if d < 2e-6 || d > 4e-6 {
		t.Errorf("MMHgPascal differs from the conventional value by %.3g, documented as about 3 ppm", d)
	}
}

func TestOptionsValidate(t *testing.T) {
	cases := []struct {
		name string
		o    units.Options
		ok   bool
	}{
		{"zero value is the defaults", units.Options{}, true},
		{"high altitude", units.Options{BarometricPressure: 500, PercentBasis: units.BasisWet}, true},
		{"kPa typed by mistake", units.Options{BarometricPressure: 101.3}, false},
		{"negative", units.Options{BarometricPressure: -760}, false},
		{"NaN", units.Options{BarometricPressure: math.NaN()}, false},
		{"unknown basis", units.Options{PercentBasis: 9}, false},
	}
	for _, tc := range cases {
		t.Run(tc.name, func(t *testing.T) {
			if err := tc.o.Validate(); (err == nil) != tc.ok {
				t.Errorf("Validate() = %v, want ok=%v", err, tc.ok)
			}
		})
	}
}

func TestParseBasis(t *testing.T) {
	for _, b := range []units.Basis{units.BasisDry, units.BasisWet} {
		got, err := units.ParseBasis(b.String())
		if err != nil || got != b {
			t.Errorf("ParseBasis(%q) = %v, %v", b, got, err)
		}
	}
	if _, err := units.ParseBasis("damp"); err == nil {
		t.Error("ParseBasis(damp) succeeded")
	}
}

func FuzzParse(f *testing.F) {
	for _, s := range []string{"mm[Hg]", "{breaths}/min", "L/min{BTPS}", "mL{a}{b}", "{x}mm[Hg]", " mL", "%{CO2}", "{", "}", "{}", "[in_i]{h}"} {
		f.Add(s)
	}
	f.Fuzz(func(t *testing.T, s string) {
		u, err := units.Parse(s)
		if err != nil {
			return
		}
		if strings.ContainsAny(u.Bare, "{} \t\r\n") {
			t.Fatalf("Parse(%q).Bare = %q still has annotations or space", s, u.Bare)
		}
		if u.Bare != "" {
			again, err := units.Parse(u.Bare)
			if err != nil || again.Bare != u.Bare || again.Dimension() != u.Dimension() {
				t.Fatalf("Parse(%q) = %q, but Parse(%q) = %+v, %v", s, u.Bare, u.Bare, again, err)
			}
		}
		for _, k := range derive.Kinds() {
			c, err := units.Convert(k, 1, s, units.Options{})
			if err == nil && (math.IsNaN(c.ToValue) || c.ToValue <= 0) {
				t.Fatalf("Convert(%v, 1, %q) = %v", k, s, c.ToValue)
			}
		}
	})
}
