package derive_test

import (
	"math/rand/v2"
	"reflect"
	"slices"
	"testing"
	"time"

	"github.com/deadspace-fhir/deadspace/derive"
)

// resumed runs the detector over series, saving the scan with Clone (or
// CloneWithRoom, every other time, with room for a few readings or none)
// after each reading whose index is in at and going on from the copy, as a
// caller that keeps the scan between evaluations does.
func resumed(cfg derive.FallConfig, series []derive.Reading, at func(i int) bool) ([]derive.Fall, []derive.Omission) {
	s := derive.NewFallScan(cfg)
	var sparse []derive.Omission
	for i, r := range series {
		s.Add(r)
		if at(i) {
			sparse = append(sparse, s.Sparse()...)
			if i%2 == 0 {
				s = s.Clone()
			} else {
				s = s.CloneWithRoom(i % 7)
			}
		}
	}
	return s.Falls(), append(sparse, s.Sparse()...)
}

// fallSeries are series that exercise every state the scan keeps: a
// baseline forming, candidates cancelled and confirmed, episodes open
// across a save, candidates opened in them, recovery, gaps, sparse
// charting and implausible values.
func fallSeries() map[string][]derive.Reading {
	series := map[string][]derive.Reading{
		"two episodes": minutes(cat(rep(38, 20), rep(25, 10), rep(38, 15), rep(26, 10), rep(38, 5))...),
		"noisy": minutes(cat(
			slices.Repeat([]float64{36, 39, 37, 40, 0}, 8), []float64{28, 27, 36, 29, 28, 27, 26, 25, 31, 33, 35, 38},
			slices.Repeat([]float64{37, 38}, 10), rep(0, 6), rep(38, 8),
		)...),
		"rise then a long fall": minutes(cat(rep(30, 40), rep(45, 20), rep(30, 30), rep(12, 200), rep(30, 40))...),
		// Candidates opened against an open episode's level, cancelled
		// and confirmed: a rise, an outlier below the baseline, a fall to
		// near zero, a level of 30, a further fall.
		"changes during open episodes": minutes(cat(rep(38, 30), rep(52, 60), rep(33, 2), rep(52, 10), rep(1, 10),
			rep(30, 40), rep(14, 10), rep(12, 100), rep(30, 20))...),
	}
	// Sparse and gappy: every 20 minutes, then a gap, then every minute.
	var sparse []derive.Reading
	for i := range 12 {
		sparse = append(sparse, rd(derive.KindEtCO2, time.Duration(i)*20*time.Minute, 38))
	}
	for i := range 60 {
		v := 38.0
		if i > 30 && i < 45 {
			v = 22
		}
		sparse = append(sparse, rd(derive.KindEtCO2, 6*time.Hour+time.Duration(i)*time.Minute, v))
	}
	series["sparse, gap, episode"] = sparse
	// A random walk with steps and dropouts, 12 hours of minute readings.
	rng := rand.New(rand.NewPCG(9, 9))
	var walk []derive.Reading
	v := 38.0
	for i := range 12 * 60 {
		switch rng.IntN(60) {
		case 0:
			v = 20 + rng.Float64()*10 // a step down
		case 1:
			v = 36 + rng.Float64()*6 // back
		}
		if rng.IntN(50) == 0 {
			continue // a reading missing
		}
		walk = append(walk, rd(derive.KindEtCO2, time.Duration(i)*time.Minute, v+rng.NormFloat64()))
	}
	series["random walk"] = walk
	return series
}

// A scan saved and resumed anywhere finds exactly what one pass over the
// whole series finds: the findings, and the readings too sparse to judge.
func TestFallScanResumedEqualsFull(t *testing.T) {
	t.Parallel()
	cfg := derive.DefaultConfig().Fall
	for name, series := range fallSeries() {
		t.Run(name, func(t *testing.T) {
			t.Parallel()
			full, sparse := derive.DetectEpisodes(cfg, series)
			if len(full) == 0 && name != "sparse, gap, episode" {
				t.Fatalf("the series should hold a finding")
			}
			for _, tc := range []struct {
				name string
				at   func(i int) bool
			}{
				{"after every reading", func(int) bool { return true }},
				{"every 7th", func(i int) bool { return i%7 == 6 }},
				{"every 97th", func(i int) bool { return i%97 == 96 }},
			} {
				falls, sp := resumed(cfg, series, tc.at)
				if !reflect.DeepEqual(falls, full) {
					t.Errorf("%s: %d findings, want %d\ngot  %+v\nwant %+v", tc.name, len(falls), len(full), falls, full)
				}
				if !reflect.DeepEqual(sp, sparse) {
					t.Errorf("%s: %d sparse readings, want %d", tc.name, len(sp), len(sparse))
				}
			}
		})
	}
}

// A saved scan holds what the rest of the series can need, not the series:
// after 12 hours of minute readings it keeps about BaselineMax of them,
// whether the series was steady or one episode was open all along (its
// level keeps only the readings it can still need, as the baseline does).
func TestFallScanCloneIsBounded(t *testing.T) {
	t.Parallel()
	cfg := derive.DefaultConfig().Fall
	for _, tc := range []struct {
		name   string
		series []derive.Reading
		falls  int // after five readings of 2 at the end
	}{
		{"steady", minutes(rep(38, 12*60)...), 1},
		{"an episode open for 12 hours", minutes(cat(rep(38, 30), rep(25, 12*60-30))...), 2},
	} {
		t.Run(tc.name, func(t *testing.T) {
			t.Parallel()
			s := derive.NewFallScan(cfg)
			for _, r := range tc.series {
				s.Add(r)
			}
			c := s.Clone()
			if n := derive.HeldReadings(c); n > 2*(int(cfg.BaselineMax/time.Minute)+2) {
				t.Errorf("the copy holds %d readings, want at most about %v of minute readings", n, cfg.BaselineMax)
			}
			// The copy goes on as the original does, and neither disturbs
			// the other.
			for i := range 5 {
				next := rd(derive.KindEtCO2, 12*time.Hour+time.Duration(i)*time.Minute, 2)
				s.Add(next)
				c.Add(next)
			}
			if !reflect.DeepEqual(s.Falls(), c.Falls()) || len(c.Falls()) != tc.falls {
				t.Errorf("original and copy differ after the same readings, or found other than %d: %+v", tc.falls, c.Falls())
			}
		})
	}
}
