package derive_test

import (
	"reflect"
	"slices"
	"strings"
	"testing"
	"time"

	"github.com/deadspace-fhir/deadspace/derive"
)

// The fall rules are our own design (see DetectFalls), so the expectations
// below follow from the documented defaults, not from a published
// detector. The causes named in the notes of a fall are disconnection and
// sampling faults (common practice), pulmonary embolism (Courtney 2002,
// Resuscitation 53:83), low cardiac output (Grmec 2003, Crit Care 7:R139).

// minutes builds one EtCO2 reading a minute from sampleTime.
func minutes(vals ...float64) []derive.Reading {
	out := make([]derive.Reading, len(vals))
	for i, v := range vals {
		out[i] = rd(derive.KindEtCO2, time.Duration(i)*time.Minute, v)
	}
	return out
}

func rep(v float64, n int) []float64 { return slices.Repeat([]float64{v}, n) }

func cat(parts ...[]float64) []float64 { return slices.Concat(parts...) }

func at(minute int) time.Time { return sampleTime.Add(time.Duration(minute) * time.Minute) }

type wantFall struct {
	onset, confirmed int // minutes
	baseline, level  float64
	baseN            int // baseline readings cited; 0: not checked
}

func TestDetectFalls(t *testing.T) {
	t.Parallel()
	cases := []struct {
		name   string
		series []derive.Reading
		want   []wantFall
	}{
		{"stable", minutes(slices.Repeat([]float64{37, 38, 39, 38, 0}, 20)...), nil},
		// 38 → 25 is 13 below baseline, more than min(8, 0.25 × 38) = 8.
		// Confirmed at the first reading 3 min after onset.
		{"sustained drop", minutes(cat(rep(38, 20), rep(25, 10))...), []wantFall{{20, 23, 38, 25, 0}}},
		{"brief dip", minutes(cat(rep(38, 20), rep(25, 2), rep(38, 10))...), nil},
		{"low for just under sustain", minutes(cat(rep(38, 20), rep(25, 3), rep(38, 10))...), nil},
		{"low for exactly sustain", minutes(cat(rep(38, 20), rep(25, 4), rep(38, 10))...), []wantFall{{20, 23, 38, 25, 0}}},
		// 31 is 7 below 38: not a fall (threshold 8).
		{"small drop", minutes(cat(rep(38, 20), rep(31, 20))...), nil},
		{"long episode", minutes(cat(rep(38, 20), rep(25, 180))...), []wantFall{{20, 23, 38, 25, 0}}},
		// After confirmation, 33 is still below 38 − 0.5 × 8 = 34, so the
		// episode never ends and the flapping gives one finding.
		{"hovering near the threshold", minutes(cat(rep(38, 20), rep(25, 4), slices.Repeat([]float64{29, 33}, 20))...), []wantFall{{20, 23, 38, 25, 0}}},
		// 32 is no longer low (> 30) but not recovered (< 34): the
		// episode stays open, so the second dip is the same episode.
		{"partial recovery keeps the episode open", minutes(cat(rep(38, 20), rep(25, 4), rep(32, 5), rep(25, 5))...), []wantFall{{20, 23, 38, 25, 0}}},
		// The baseline excludes readings at the same instant: at 4 min the
		// 25 sees only four earlier readings, so the onset is at 5 min.
		{
			"same-instant readings are not baseline",
			append(minutes(cat(rep(38, 5), rep(25, 4))...), rd(derive.KindEtCO2, 4*time.Minute, 25)),
			[]wantFall{{5, 8, 38, 25, 6}},
		},
		{
			"two episodes with recovery between",
			minutes(cat(rep(38, 20), rep(25, 10), rep(38, 15), rep(26, 10))...),
			// The second baseline is [15, 45) min without the first
			// episode's readings (20–29): 20 readings.
			[]wantFall{{20, 23, 38, 25, 20}, {45, 48, 38, 26, 20}},
		},
		// Recovery to 35 (> 34) ends the first; a second drop follows.
		{
			"recovery by hysteresis",
			minutes(cat(rep(38, 20), rep(25, 5), rep(35, 10), rep(24, 5))...),
			// The recovering reading at 25 min joins the baseline: [5, 35)
			// without 20–24 holds 25 readings.
			[]wantFall{{20, 23, 38, 25, 20}, {35, 38, 38, 24, 25}},
		},
		{"disconnection to zero", minutes(cat(rep(38, 20), rep(0, 10))...), []wantFall{{20, 23, 38, 0, 0}}},
		// A low baseline gets the proportional threshold: 0.25 × 20 = 5,
		// so 14 is a fall and 16 is not.
		{"low baseline, proportional fall", minutes(cat(rep(20, 20), rep(14, 5))...), []wantFall{{20, 23, 20, 14, 0}}},
		{"low baseline, small fall", minutes(cat(rep(20, 20), rep(16, 5))...), nil},
		// Two baseline readings: the low readings become the baseline
		// before five are collected.
		{"too little baseline", minutes(cat(rep(38, 2), rep(25, 30))...), nil},
		{
			// A gap of 17 min (> MaxGap) after the first low reading
			// cancels that candidate, and the reading after the gap cannot
			// be judged (the series is too gappy); the next ones can.
			"gap cancels the candidate",
			slices.Concat(minutes(cat(rep(38, 20), rep(25, 1))...), []derive.Reading{
				rd(derive.KindEtCO2, 37*time.Minute, 25), rd(derive.KindEtCO2, 38*time.Minute, 25),
				rd(derive.KindEtCO2, 39*time.Minute, 25), rd(derive.KindEtCO2, 40*time.Minute, 25),
				rd(derive.KindEtCO2, 41*time.Minute, 25),
			}),
			[]wantFall{{38, 41, 38, 25, 0}},
		},
		{
			"other kinds and implausible values are ignored",
			slices.Concat(minutes(cat(rep(38, 20), rep(25, 4))...), []derive.Reading{
				rd(derive.KindPaCO2, 21*time.Minute+time.Second, 80),
				rd(derive.KindEtCO2, 22*time.Minute+time.Second, 900),
			}),
			[]wantFall{{20, 23, 38, 25, 0}},
		},
	}
	for _, tc := range cases {
		t.Run(tc.name, func(t *testing.T) {
			t.Parallel()
			got := derive.DetectFalls(derive.DefaultConfig().Fall, sortByTime(tc.series))
			if len(got) != len(tc.want) {
				t.Fatalf("%d findings, want %d: %+v", len(got), len(tc.want), got)
			}
			for i, w := range tc.want {
				f := got[i]
				if !f.Onset.Equal(at(w.onset)) || !f.Confirmed.Equal(at(w.confirmed)) {
					t.Errorf("finding %d: onset %v confirmed %v, want minutes %d and %d", i, f.Onset, f.Confirmed, w.onset, w.confirmed)
				}
				if f.Baseline != w.baseline || f.Level != w.level || f.Change != w.level-w.baseline || f.Change >= 0 {
					t.Errorf("finding %d: baseline %v level %v change %v, want %v %v", i, f.Baseline, f.Level, f.Change, w.baseline, w.level)
				}
				if n := len(f.EpisodeReadings); n != w.confirmed-w.onset+1 {
					t.Errorf("finding %d cites %d episode readings", i, n)
				}
				if w.baseN != 0 && len(f.BaselineReadings) != w.baseN {
					t.Errorf("finding %d cites %d baseline readings, want %d", i, len(f.BaselineReadings), w.baseN)
				}
				if len(f.BaselineReadings) < derive.DefaultConfig().Fall.MinBaselineReadings {
					t.Errorf("finding %d cites %d baseline readings", i, len(f.BaselineReadings))
				}
				for _, cause := range []string{"pulmonary embolism", "low cardiac output", "disconnection", "sampling fault"} {
					if !slices.ContainsFunc(f.Notes, func(n string) bool { return strings.Contains(n, cause) }) {
						t.Errorf("finding %d notes %q lack %q", i, f.Notes, cause)
					}
				}
				nearZero := slices.ContainsFunc(f.Notes, func(n string) bool { return strings.Contains(n, "near-zero") })
				if nearZero != (w.level < 5) {
					t.Errorf("finding %d: near-zero note %v at level %v", i, nearZero, w.level)
				}
			}
		})
	}
}

func TestDetectFallsBaselineWindow(t *testing.T) {
	t.Parallel()
	// 60 min at 38, then 40 min at 30 (exactly 8 below 38, so not low),
	// then 23, then 21. Against the 30 min trailing baseline of 30 the
	// threshold is min(8, 0.25 × 30) = 7.5: 23 is not low, 21 is. Against
	// the old 38 both would be.
	series := minutes(cat(rep(38, 60), rep(30, 40), rep(23, 5), rep(21, 5))...)
	got := derive.DetectFalls(derive.DefaultConfig().Fall, series)
	if len(got) != 1 || got[0].Baseline != 30 || !got[0].Onset.Equal(at(105)) || !got[0].Confirmed.Equal(at(108)) {
		t.Fatalf("got %+v, want one fall from a baseline of 30 at minute 105", got)
	}
	for _, r := range got[0].BaselineReadings {
		if r.AtMillis < at(75).UnixMilli() || r.AtMillis >= at(105).UnixMilli() {
			t.Errorf("baseline reading at %v outside [75, 105) min", r.At())
		}
	}
}

// TestDetectFallsPrefixStable checks the streaming property: re-running over
// any prefix gives exactly the findings confirmed within that prefix.
func TestDetectFallsPrefixStable(t *testing.T) {
	t.Parallel()
	series := map[string][]derive.Reading{
		"two episodes": minutes(cat(rep(38, 20), rep(25, 10), rep(38, 15), rep(26, 10), rep(38, 5))...),
		"noisy": minutes(cat(
			slices.Repeat([]float64{36, 39, 37, 40, 0}, 8), []float64{28, 27, 36, 29, 28, 27, 26, 25, 31, 33, 35, 38},
			slices.Repeat([]float64{37, 38}, 10), rep(0, 6), rep(38, 8),
		)...),
	}
	cfg := derive.DefaultConfig().Fall
	for name, s := range series {
		t.Run(name, func(t *testing.T) {
			t.Parallel()
			full := derive.DetectFalls(cfg, s)
			if len(full) < 2 {
				t.Fatalf("test series should have at least two findings, has %d", len(full))
			}
			for n := 1; n <= len(s); n++ {
				assertPrefix(t, cfg, s, full, n)
			}
		})
	}
}

func assertPrefix(t *testing.T, cfg derive.FallConfig, s []derive.Reading, full []derive.Fall, n int) {
	t.Helper()
	end := s[n-1].At()
	var want []derive.Fall
	for _, f := range full {
		if !f.Confirmed.After(end) {
			want = append(want, f)
		}
	}
	if got := derive.DetectFalls(cfg, s[:n]); !reflect.DeepEqual(got, want) {
		t.Fatalf("prefix of %d readings: %d findings, want %d\ngot  %+v\nwant %+v", n, len(got), len(want), got, want)
	}
}

// After a fall or rise is confirmed, the detector goes on judging the
// readings of the open episode against the level it settled at (the
// median of its own readings over the Baseline window, by the baseline's
// rules; a design choice, see DetectFalls): a further change of the
// threshold's size from that level is a finding of its own, and so is a
// crossing past the recovery band to the far side of the baseline. A move
// back towards the baseline that stops short of that is a partial
// recovery, and a reading back within the band ends the episode as
// before. Thresholds with the defaults: min(8, 0.25 × level); the band is
// half the episode's own threshold either side of its baseline.
func TestDetectFallsWhileAnEpisodeIsOpen(t *testing.T) {
	t.Parallel()
	// after appends vals, one a minute, starting gap after the last
	// reading of s.
	after := func(s []derive.Reading, gap time.Duration, vals ...float64) []derive.Reading {
		last := time.Duration(s[len(s)-1].AtMillis-sampleTime.UnixMilli()) * time.Millisecond
		for i, v := range vals {
			s = append(s, rd(derive.KindEtCO2, last+gap+time.Duration(i)*time.Minute, v))
		}
		return s
	}
	type change struct {
		rise             bool
		onset, confirmed int // minutes
		baseline, level  float64
		baseN            int // baseline readings cited
	}
	fall := func(onset, confirmed int, baseline, level float64, baseN int) change {
		return change{false, onset, confirmed, baseline, level, baseN}
	}
	rise := func(onset, confirmed int, baseline, level float64, baseN int) change {
		return change{true, onset, confirmed, baseline, level, baseN}
	}
	cases := []struct {
		name   string
		series []derive.Reading
		want   []change
		sparse int // readings too sparse or gappy to judge
	}{
		// A sudden fall to near zero is a disconnection, extubation or
		// arrest until shown otherwise (common practice), whatever level
		// the patient had settled at: 29 − 7.25 = 21.75 > 2.
		{
			"fall to near zero two hours into a lower level",
			minutes(cat(rep(38, 30), rep(29, 120), rep(2, 10))...),
			[]change{fall(30, 33, 38, 29, 30), fall(150, 153, 29, 2, 30)}, 0,
		},
		// The same during a rise (after bicarbonate, on return of
		// circulation: common practice): 1 is far below the band of 38
		// (34–42) and below 52 − 8.
		{
			"fall to near zero two hours into a higher level",
			minutes(cat(rep(38, 30), rep(52, 120), rep(1, 10))...),
			[]change{rise(30, 33, 38, 52, 30), fall(150, 153, 52, 1, 30)}, 0,
		},
		// Right after a confirmation the level is the median of the
		// readings that confirmed it (four here): a disconnection then is
		// not missed while the level fills.
		{
			"fall to near zero a minute after a rise is confirmed",
			minutes(cat(rep(38, 30), rep(52, 4), rep(1, 10))...),
			[]change{rise(30, 33, 38, 52, 30), fall(34, 37, 52, 1, 4)}, 0,
		},
		// Falls of end-tidal CO2 track falls of cardiac output (Grmec
		// 2003): after partial recovery to a settled 32 (not back within 4
		// of 38), a fall to 22 is 10 below it, a new finding.
		{
			"fall, partial recovery, a second fall",
			minutes(cat(rep(38, 30), rep(25, 20), rep(32, 30), rep(22, 10))...),
			[]change{fall(30, 33, 38, 25, 0), fall(80, 83, 32, 22, 30)}, 0,
		},
		// Back to 25 after 10 minutes at 32: the level (25, the median of
		// the last 30 minutes) has not moved, so this is the same episode.
		{
			"fall, brief partial recovery, back to the same level",
			minutes(cat(rep(38, 30), rep(25, 20), rep(32, 10), rep(25, 10))...),
			[]change{fall(30, 33, 38, 25, 0)}, 0,
		},
		// 26 is past the band of 38 on the far side (below 34), and 24
		// below the level of 50: a fall of its own, not a recovery of the
		// rise (common practice: a fall of cardiac output or a leak).
		{
			"rise, then a fall below the baseline",
			minutes(cat(rep(38, 30), rep(50, 30), rep(26, 10))...),
			[]change{rise(30, 33, 38, 50, 30), fall(60, 63, 50, 26, 30)}, 0,
		},
		// 38 is back within the band: the rise ends there, 38 joins the
		// baseline, and a later fall is judged against the old 38.
		{
			"rise, recovery to the baseline, then a fall",
			minutes(cat(rep(38, 30), rep(50, 30), rep(38, 30), rep(25, 10))...),
			[]change{rise(30, 33, 38, 50, 30), fall(90, 93, 38, 25, 30)}, 0,
		},
		// 43 is 9 below the level of 52 but still above the band (42):
		// easing back towards the baseline, no fall.
		{
			"rise easing back towards the baseline",
			minutes(cat(rep(38, 30), rep(52, 60), rep(43, 30))...),
			[]change{rise(30, 33, 38, 52, 0)}, 0,
		},
		// The abrupt rise at return of circulation overshoots the level
		// before the arrest (common practice): 50 is above the band of 38
		// (42) and 25 above the level of 25.
		{
			"fall, then a rise above the baseline",
			minutes(cat(rep(38, 30), rep(25, 30), rep(50, 10))...),
			[]change{fall(30, 33, 38, 25, 0), rise(60, 63, 25, 50, 30)}, 0,
		},
		// Hypoventilation getting worse (common practice): 52 is 12 above
		// the settled 40 (threshold 8).
		{
			"rise, then a further rise",
			minutes(cat(rep(30, 30), rep(40, 60), rep(52, 10))...),
			[]change{rise(30, 33, 30, 40, 0), rise(90, 93, 40, 52, 30)}, 0,
		},
		// One reading of 2 (a suction, a kinked line) is a candidate
		// cancelled by the next; it does not enter the level.
		{
			"one outlier during an open episode",
			minutes(cat(rep(38, 30), rep(29, 60), rep(2, 1), rep(29, 30), rep(2, 5))...),
			[]change{fall(30, 33, 38, 29, 0), fall(121, 124, 29, 2, 30)}, 0,
		},
		{
			"a dip shorter than the sustain time during an open episode",
			minutes(cat(rep(38, 30), rep(29, 60), rep(2, 3), rep(29, 30))...),
			[]change{fall(30, 33, 38, 29, 0)}, 0,
		},
		// A silence of 21 minutes (more than MaxGap): the reading after it
		// cannot be judged (too gappy) and joins the level, as a reading
		// after a gap joins the baseline; the next ones are judged against
		// the level of the 30 minutes before them (nine 29s and that 2).
		{
			"silence longer than MaxGap, then a fall to near zero",
			after(minutes(cat(rep(38, 30), rep(29, 60))...), 21*time.Minute, rep(2, 10)...),
			[]change{fall(30, 33, 38, 29, 0), fall(111, 114, 29, 2, 10)}, 1,
		},
		// A silence of two hours (more than BaselineMax): the first five
		// readings after it are too sparse to judge, and then the level is
		// theirs, 2, below any end-tidal level of a ventilated patient
		// (10): nothing is judged against it. As at the start of a series,
		// the detector says it could not judge rather than guess across
		// the silence.
		{
			"silence longer than BaselineMax, then near zero",
			after(minutes(cat(rep(38, 30), rep(29, 60))...), 2*time.Hour, rep(2, 20)...),
			[]change{fall(30, 33, 38, 29, 0)}, 5,
		},
	}
	cfg := derive.DefaultConfig().Fall
	for _, tc := range cases {
		t.Run(tc.name, func(t *testing.T) {
			t.Parallel()
			got, sparse := derive.DetectEpisodes(cfg, tc.series)
			if len(got) != len(tc.want) {
				t.Fatalf("%d findings, want %d: %+v", len(got), len(tc.want), got)
			}
			for i, w := range tc.want {
				f := got[i]
				if f.Rise != w.rise || !f.Onset.Equal(at(w.onset)) || !f.Confirmed.Equal(at(w.confirmed)) {
					t.Errorf("finding %d: rise %v onset %v confirmed %v, want %v, minutes %d and %d", i, f.Rise, f.Onset, f.Confirmed, w.rise, w.onset, w.confirmed)
				}
				if f.Baseline != w.baseline || f.Level != w.level || f.Change != w.level-w.baseline {
					t.Errorf("finding %d: baseline %v level %v change %v, want %v %v", i, f.Baseline, f.Level, f.Change, w.baseline, w.level)
				}
				if w.baseN != 0 && len(f.BaselineReadings) != w.baseN {
					t.Errorf("finding %d cites %d baseline readings, want %d", i, len(f.BaselineReadings), w.baseN)
				}
				// The wording is the detector's usual one: a fall names
				// the causes to rule out, near zero first disconnection.
				nearZero := slices.ContainsFunc(f.Notes, func(n string) bool { return strings.Contains(n, "near-zero") })
				if nearZero != (!w.rise && w.level < 5) {
					t.Errorf("finding %d: near-zero note %v at level %v", i, nearZero, w.level)
				}
			}
			if len(sparse) != tc.sparse {
				t.Errorf("%d readings too sparse to judge, want %d: %+v", len(sparse), tc.sparse, sparse)
			}
			checkEpisodeEnds(t, cfg, tc.series, got)
			for n := 1; n <= len(tc.series); n++ {
				assertPrefix(t, cfg, tc.series, got, n)
			}
		})
	}
}
