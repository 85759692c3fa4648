package encode

import (
	"math"
	"regexp"
	"strconv"
	"strings"
	"testing"
)

// decimalPattern is the R4 decimal regex (datatypes.html#decimal), without
// the exponent we never write.
var decimalPattern = regexp.MustCompile(`^-?(0|[1-9][0-9]*)(\.[0-9]+)?$`)

func TestFormatDecimal(t *testing.T) {
	// Expected strings are the inputs rounded by hand; exact binary halves
	// go to the even digit (IEEE 754 round-half-even, as strconv does).
	cases := []struct {
		v    float64
		d    int
		want string
	}{
		{0.2808219178082192, 3, "0.281"},
		{0.3, 3, "0.300"},
		{162.5, 0, "162"},
		{163.5, 0, "164"},
		{-14, 1, "-14.0"},
		{-0.0004, 3, "0.000"},
		{math.Copysign(0, -1), 2, "0.00"},
		{1e21, 0, "1000000000000000000000"},
	}
	for _, tc := range cases {
		t.Run(strconv.FormatFloat(tc.v, 'g', -1, 64), func(t *testing.T) {
			got, err := formatDecimal(tc.v, tc.d)
			if err != nil || got != tc.want {
				t.Errorf("formatDecimal(%v, %d) = %q, %v; want %q", tc.v, tc.d, got, err, tc.want)
			}
		})
	}
	for _, bad := range []float64{math.NaN(), math.Inf(1), math.Inf(-1)} {
		if _, err := formatDecimal(bad, 1); err == nil {
			t.Errorf("formatDecimal(%v) accepted", bad)
		}
	}
}

// FuzzFormatDecimal: every finite value is written as an R4 decimal that
// reads back within half a unit of the last decimal.
func FuzzFormatDecimal(f *testing.F) {
	for _, v := range []float64{0, 0.2808, -14, 162.5, 1e-9, 1e300, -0.0004} {
		f.Add(v, uint8(3))
	}
	f.Fuzz(func(t *testing.T, v float64, d uint8) {
		dec := int(d % 6)
		s, err := formatDecimal(v, dec)
		if math.IsNaN(v) || math.IsInf(v, 0) {
			if err == nil {
				t.Fatalf("accepted %v", v)
			}
			return
		}
		if err != nil {
			t.Fatal(err)
		}
		if !decimalPattern.MatchString(s) {
			t.Fatalf("%q is not an R4 decimal", s)
		}
		if strings.HasPrefix(s, "-") && strings.Trim(s, "-0.") == "" {
			t.Fatalf("%q: negative zero", s)
		}
		back, err := strconv.ParseFloat(s, 64)
		if err != nil {
			t.Fatal(err)
		}
		if tol := 0.5*math.Pow(10, -float64(dec)) + math.Abs(v)*1e-15; math.Abs(back-v) > tol {
			t.Fatalf("%v written as %q", v, s)
		}
	})
}

// FuzzParseRef: a reference either fails to parse or survives the round
// trip, and its parts are FHIR ids.
func FuzzParseRef(f *testing.F) {
	for _, s := range []string{"Observation/a/_history/1", "Patient/p1", "Observation/a/_history/", "x", "Observation/a\n", "Observation/../_history/1"} {
		f.Add(s)
	}
	id := regexp.MustCompile(`^[A-Za-z0-9\-.]{1,64}$`)
	f.Fuzz(func(t *testing.T, s string) {
		r, err := parseRef(s)
		if err != nil {
			return
		}
		if r.String() != s {
			t.Fatalf("parseRef(%q).String() = %q", s, r.String())
		}
		if !id.MatchString(r.ID) || (r.Version != "" && !id.MatchString(r.Version)) {
			t.Fatalf("parseRef(%q) = %+v: parts are not ids", s, r)
		}
		if strings.ContainsAny(s, "\n\r") {
			t.Fatalf("parseRef(%q) accepted a line break", s)
		}
	})
}
