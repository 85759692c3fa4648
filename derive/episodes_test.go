package derive_test

import (
	"testing"
	"time"

	"github.com/deadspace-fhir/deadspace/derive"
)

// The end of an episode follows the detector's own recovery rule (a design
// choice, see DetectFalls): with the defaults, a fall from a baseline of 38
// has a threshold of min(8, 0.25 × 38) = 8 and ends at the first reading
// above 38 − 0.5 × 8 = 34 after its confirmation.
func TestEpisodeEnd(t *testing.T) {
	t.Parallel()
	cases := []struct {
		name    string
		series  []derive.Reading
		end     int // minutes
		ongoing bool
	}{
		{"recovers", minutes(cat(rep(38, 20), rep(25, 10), rep(38, 10))...), 30, false},
		{"recovers by hysteresis only above 34", minutes(cat(rep(38, 20), rep(25, 5), rep(33, 5), rep(35, 5))...), 30, false},
		{"still low at the last reading", minutes(cat(rep(38, 20), rep(25, 15))...), 34, true},
		{"hovering near the threshold never ends", minutes(cat(rep(38, 20), rep(25, 4), rep(29, 3), rep(33, 3))...), 29, true},
		{"confirmed at the last reading", minutes(cat(rep(38, 20), rep(25, 4))...), 23, true},
		// A rise from 20: threshold min(8, 0.25 × 20) = 5, recovered below
		// 20 + 2.5.
		{"a rise recovers", minutes(cat(rep(20, 20), rep(30, 6), rep(24, 2), rep(22, 3))...), 28, false},
		{
			"other kinds and implausible values are not end-tidal readings",
			append(minutes(cat(rep(38, 20), rep(25, 6))...),
				rd(derive.KindPaCO2, 27*time.Minute, 40), rd(derive.KindEtCO2, 28*time.Minute, 500)),
			25, true,
		},
	}
	cfg := derive.DefaultConfig().Fall
	for _, tc := range cases {
		t.Run(tc.name, func(t *testing.T) {
			falls := derive.DetectFalls(cfg, tc.series)
			if len(falls) != 1 {
				t.Fatalf("%d findings, want 1", len(falls))
			}
			end, ongoing := derive.EpisodeEnd(cfg, falls[0], tc.series)
			if !end.Equal(at(tc.end)) || ongoing != tc.ongoing {
				t.Fatalf("EpisodeEnd = %v (minute %v), ongoing %v; want minute %d, ongoing %v",
					end, end.Sub(sampleTime).Minutes(), ongoing, tc.end, tc.ongoing)
			}
		})
	}
}

// checkEpisodeEnds holds for any series: an episode ends at or after its
// confirmation, and the next finding opens no earlier than the one before
// it ended (the detector opens no episode while one is confirmed; a reading
// at the very instant of the recovering one may), so episodes never
// overlap on a page.
func checkEpisodeEnds(t *testing.T, cfg derive.FallConfig, series []derive.Reading, falls []derive.Fall) {
	t.Helper()
	for i, f := range falls {
		end, ongoing := derive.EpisodeEnd(cfg, f, series)
		if end.Before(f.Confirmed) {
			t.Errorf("finding %d ends at %v, before its confirmation at %v", i, end, f.Confirmed)
		}
		if i+1 < len(falls) {
			if ongoing {
				t.Errorf("finding %d is ongoing, yet finding %d follows it", i, i+1)
			} else if falls[i+1].Onset.Before(end) {
				t.Errorf("finding %d opens at %v, before finding %d ended at %v", i+1, falls[i+1].Onset, i, end)
			}
		}
	}
}

// An episode whose place a further change took ends at that change's
// onset, and a reading past the band on the far side of the baseline does
// not end a rise (the detector's rules, design choices: see DetectFalls).
func TestEpisodeEndWhenAnotherTakesItsPlace(t *testing.T) {
	t.Parallel()
	cases := []struct {
		name    string
		series  []derive.Reading
		finding int // which finding
		end     int // minutes
		ongoing bool
	}{
		{"a lower level ends at the fall to near zero", minutes(cat(rep(38, 30), rep(29, 120), rep(2, 10))...), 0, 150, false},
		{"the fall to near zero is ongoing", minutes(cat(rep(38, 30), rep(29, 120), rep(2, 10))...), 1, 159, true},
		{"a rise ends at a fall below the baseline", minutes(cat(rep(38, 30), rep(50, 30), rep(26, 10))...), 0, 60, false},
		// 33 for a minute is a candidate cancelled by the next reading: it
		// neither recovers the rise (below 34) nor replaces it.
		{"one reading below the baseline does not end a rise", minutes(cat(rep(38, 30), rep(50, 10), rep(33, 1), rep(50, 5))...), 0, 45, true},
		// Within the band on the far side (34 < 36 < 38) is a recovery.
		{"a rise recovers within the band below the baseline", minutes(cat(rep(38, 30), rep(50, 10), rep(36, 5))...), 0, 40, false},
	}
	cfg := derive.DefaultConfig().Fall
	for _, tc := range cases {
		t.Run(tc.name, func(t *testing.T) {
			t.Parallel()
			falls := derive.DetectFalls(cfg, tc.series)
			if len(falls) <= tc.finding {
				t.Fatalf("%d findings, want finding %d", len(falls), tc.finding)
			}
			end, ongoing := derive.EpisodeEnd(cfg, falls[tc.finding], tc.series)
			if !end.Equal(at(tc.end)) || ongoing != tc.ongoing {
				t.Fatalf("EpisodeEnd = %v (minute %v), ongoing %v; want minute %d, ongoing %v",
					end, end.Sub(sampleTime).Minutes(), ongoing, tc.end, tc.ongoing)
			}
			checkEpisodeEnds(t, cfg, tc.series, falls)
		})
	}
}
