package derive_test

import (
	"fmt"
	"math"
	"strings"
	"testing"
	"time"

	"github.com/deadspace-fhir/deadspace/derive"
)

func TestDefaultConfig(t *testing.T) {
	t.Parallel()
	c := derive.DefaultConfig()
	if err := c.Validate(); err != nil {
		t.Fatalf("DefaultConfig().Validate() = %v", err)
	}
	// Design choices documented on DefaultConfig. No published maximum
	// offset between blood gas and capnography was found; Enghoff's method
	// needs the two measured simultaneously, so the window is short (design
	// choice, at most 5–10 min).
	if c.Window != 5*time.Minute || c.HeightMaxAge != 365*24*time.Hour {
		t.Errorf("Window %v, HeightMaxAge %v", c.Window, c.HeightMaxAge)
	}
	want := derive.FallConfig{Baseline: 30 * time.Minute, MinBaselineReadings: 5, Drop: 8, DropFraction: 0.25, Sustain: 3 * time.Minute, Recover: 0.5}
	if c.Fall != want {
		t.Errorf("Fall = %+v, want %+v", c.Fall, want)
	}
}

func TestValidate(t *testing.T) {
	t.Parallel()
	cases := []struct {
		name   string
		mutate func(*derive.Config)
		fields []string // each must be named in the error
	}{
		{"zero window", func(c *derive.Config) { c.Window = 0 }, []string{"Window"}},
		{"sub-millisecond window", func(c *derive.Config) { c.Window = time.Microsecond }, []string{"Window"}},
		{"negative height age", func(c *derive.Config) { c.HeightMaxAge = -time.Hour }, []string{"HeightMaxAge"}},
		{"drop fraction 1", func(c *derive.Config) { c.Fall.DropFraction = 1 }, []string{"Fall.DropFraction"}},
		{"recover 0", func(c *derive.Config) { c.Fall.Recover = 0 }, []string{"Fall.Recover"}},
		{"NaN drop", func(c *derive.Config) { c.Fall.Drop = math.NaN() }, []string{"Fall.Drop"}},
		{"everything at once", func(c *derive.Config) { *c = derive.Config{} }, []string{
			"Window", "HeightMaxAge", "Fall.Baseline", "Fall.Sustain", "Fall.MinBaselineReadings",
			"Fall.Drop", "Fall.DropFraction", "Fall.Recover",
		}},
	}
	for _, tc := range cases {
		t.Run(tc.name, func(t *testing.T) {
			t.Parallel()
			c := derive.DefaultConfig()
			tc.mutate(&c)
			err := c.Validate()
			if err == nil {
				t.Fatal("Validate() = nil, want an error")
			}
			for _, f := range tc.fields {
				if !strings.Contains(err.Error(), f+" must") {
					t.Errorf("error does not name %s: %v", f, err)
				}
			}
			if got := strings.Count(err.Error(), " must "); got != len(tc.fields) {
				t.Errorf("%d problems reported, want %d: %v", got, len(tc.fields), err)
			}
		})
	}
}

func TestPlausible(t *testing.T) {
	t.Parallel()
	// The ranges are design choices (see plausibleRange); these cases pin
	// the documented edges and the two rules that matter most: a
	// disconnection's EtCO2 of 0 is plausible, a non-number never is.
	cases := []struct {
		kind derive.Kind
		v    float64
		want bool
	}{
		{derive.KindPaCO2, 5, true},
		{derive.KindPaCO2, 4.9, false},
		{derive.KindPaCO2, 200, true},
		{derive.KindPaCO2, 5.3 * 7.5, true},
		{derive.KindEtCO2, 0, true},
		{derive.KindEtCO2, -0.1, false},
		{derive.KindEtCO2, 150.1, false},
		{derive.KindMixedExpiredCO2, 0.4, false},
		{derive.KindVCO2, 20, true},
		{derive.KindVCO2, 2001, false},
		{derive.KindTidalVolume, 0.5, false}, // litres sent as mL
		{derive.KindTidalVolume, 3000, true},
		{derive.KindMinuteVolume, 7000, false}, // mL/min sent as L/min
		{derive.KindRespRate, 100, true},
		{derive.KindRespRate, 0, false},
		{derive.KindHeight, 40, true},
		{derive.KindHeight, 1.75, false}, // metres sent as cm
		{derive.KindEtCO2, math.NaN(), false},
		{derive.KindPaCO2, math.Inf(1), false},
		{derive.KindUnknown, 1, false},
		{derive.Kind(200), 1, false},
	}
	for _, tc := range cases {
		t.Run(fmt.Sprintf("%s %v", tc.kind, tc.v), func(t *testing.T) {
			t.Parallel()
			if got, lo, hi := derive.Plausible(tc.kind, tc.v); got != tc.want {
				t.Errorf("Plausible(%v, %v) = %v (range %v–%v), want %v", tc.kind, tc.v, got, lo, hi, tc.want)
			}
		})
	}
}
