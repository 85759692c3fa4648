package derive

import (
	"fmt"
	"slices"
	"time"
)

// minBaselineEtCO2 is the lowest baseline, in mm[Hg], the detector judges
// against: a lower one is not an end-tidal baseline of a ventilated patient
// (a series in kPa labelled mm[Hg], or a long disconnection). A design
// choice.
const minBaselineEtCO2 = 10.0

// detectFalls is one forward pass in which each reading is judged only on
// itself and the readings before it, and a finding is fixed the moment it is
// confirmed. That is what makes a streaming caller, who re-runs it over a
// growing series, and a batch caller agree. The rules are on [DetectFalls].
// It also returns the readings it could not judge because the series was
// too sparse or gappy.
func detectFalls(cfg FallConfig, series []Reading) ([]Fall, []Omission) {
	s := NewFallScan(cfg)
	for _, r := range series {
		s.Add(r)
	}
	return s.falls, s.sparse
}

// FallScan is the fall and rise detector part-way through a series: fed
// readings in time order with [FallScan.Add], it judges each as
// [DetectFalls] does, and [FallScan.Clone] keeps where it stands, so that
// a caller whose series grows at its end resumes from a saved scan instead
// of running over the whole series again. A scan resumed from a clone and
// fed the rest of the series finds exactly what one pass over the whole
// series finds.
type FallScan struct {
	cfg                            FallConfig
	span, spanMax, sustain, maxGap int64
	minEp                          int
	falls                          []Fall
	sparse                         []Omission
	// eligible are baseline-eligible readings in time order;
	// eligible[head:inEnd] are in the Baseline window, and their values
	// are in window, sorted; eligible[far:inEnd] are within BaselineMax.
	eligible         []Reading
	head, inEnd, far int
	window           []float64
	ep               *episode
	// seen are the times of judged readings, episode or not, and
	// seen[seenHead:] those within BaselineMax: sparseness is a property
	// of the charting, not of which readings may form a baseline. first is
	// the time of the first judged reading, kept when seen is trimmed.
	seen     []int64
	seenHead int
	first    int64
	judged   bool
}

// NewFallScan returns a scan that has seen no reading.
func NewFallScan(cfg FallConfig) *FallScan {
	return &FallScan{
		cfg:     cfg,
		span:    cfg.Baseline.Milliseconds(),
		spanMax: max(cfg.BaselineMax, cfg.Baseline).Milliseconds(),
		sustain: cfg.Sustain.Milliseconds(),
		maxGap:  max(cfg.MaxGap, cfg.Sustain).Milliseconds(),
		minEp:   max(cfg.MinEpisodeReadings, 1),
	}
}

// Falls returns the findings confirmed so far, in order of confirmation.
func (s *FallScan) Falls() []Fall { return slices.Clone(s.falls) }

// Sparse returns the readings the scan could not judge because the series
// was too sparse or gappy, since it was made or cloned.
func (s *FallScan) Sparse() []Omission { return slices.Clone(s.sparse) }

// Clone returns a copy that goes on independently, holding only what the
// rest of the series can still need: the readings within BaselineMax of
// the last one, the open episode and the findings so far (not the sparse
// readings, which [FallScan.Sparse] of the copy lists from then on).
func (s *FallScan) Clone() *FallScan { return s.CloneWithRoom(0) }

// CloneWithRoom is Clone with room for n more readings: a copy about to be
// fed n readings takes them without growing its buffers.
func (s *FallScan) CloneWithRoom(n int) *FallScan {
	c := *s
	c.falls = slices.Clone(s.falls)
	c.sparse = nil
	// Readings before far and times before seenHead are never looked at
	// again: far and seenHead only move forward.
	drop := min(s.far, s.head)
	c.eligible = cloneWithRoom(s.eligible[drop:], n)
	c.head, c.inEnd, c.far = s.head-drop, s.inEnd-drop, s.far-drop
	c.window = cloneWithRoom(s.window, n)
	// The last time is kept even when it is older than BaselineMax: the
	// gap to the next reading is measured from it.
	keep := min(s.seenHead, max(len(s.seen)-1, 0))
	c.seen = cloneWithRoom(s.seen[keep:], n)
	c.seenHead = s.seenHead - keep
	if s.ep != nil {
		ep := *s.ep
		ep.readings = slices.Clone(s.ep.readings)
		c.ep = &ep
	}
	return &c
}

// cloneWithRoom copies s into a new slice with room for n more elements
// (nil stays nil when no room is asked for, as slices.Clone keeps it).
func cloneWithRoom[T any](s []T, n int) []T {
	if s == nil && n == 0 {
		return nil
	}
	return append(make([]T, 0, len(s)+n), s...)
}

// Add judges the next reading of the series; readings come in time order.
// Readings of other kinds and implausible values are skipped, as
// [DetectFalls] skips them.
func (s *FallScan) Add(r Reading) {
	if r.Kind != KindEtCO2 {
		return
	}
	if ok, _, _ := Plausible(KindEtCO2, r.Value); !ok {
		return
	}
	t := r.AtMillis
	cfg := s.cfg
	for s.inEnd < len(s.eligible) && s.eligible[s.inEnd].AtMillis < t {
		v := s.eligible[s.inEnd].Value
		i, _ := slices.BinarySearch(s.window, v)
		s.window = slices.Insert(s.window, i, v)
		s.inEnd++
	}
	from := addSat(t, -s.span)
	for s.head < s.inEnd && s.eligible[s.head].AtMillis < from {
		i, _ := slices.BinarySearch(s.window, s.eligible[s.head].Value)
		s.window = slices.Delete(s.window, i, i+1)
		s.head++
	}
	fromMax := addSat(t, -s.spanMax)
	for s.far < s.inEnd && s.eligible[s.far].AtMillis < fromMax {
		s.far++
	}
	for s.seenHead < len(s.seen) && s.seen[s.seenHead] < fromMax {
		s.seenHead++
	}
	why := s.sparseness(t)
	if !s.judged {
		s.first, s.judged = t, true
	}
	s.seen = append(s.seen, t)

	if ep := s.ep; ep != nil {
		if ep.confirmed {
			if ep.recovered(r.Value, cfg.Recover) {
				s.ep = nil
				s.eligible = append(s.eligible, r)
			}
			return
		}
		last := ep.readings[len(ep.readings)-1].AtMillis
		if t-last <= s.maxGap && ep.beyond(r.Value) {
			ep.readings = append(ep.readings, r)
			if t-ep.readings[0].AtMillis >= s.sustain && len(ep.readings) >= s.minEp {
				s.falls = append(s.falls, ep.confirm())
			}
			return
		}
		s.ep = nil // cancelled; judge r afresh below
	}

	base, baseFrom, ok := baseline(cfg, s.eligible, s.head, s.inEnd, s.far, s.window)
	if why != "" {
		s.sparse = append(s.sparse, Omission{Ref: r.Ref, Reason: ReasonTooSparse, Detail: why})
	} else if ok && base >= minBaselineEtCO2 {
		thr := threshold(cfg, base)
		rise := r.Value > base+thr
		if rise || r.Value < base-thr {
			s.ep = &episode{
				baseline:     base,
				threshold:    thr,
				rise:         rise,
				baseReadings: slices.Clone(s.eligible[baseFrom:s.inEnd]),
				readings:     []Reading{r},
			}
			if s.sustain <= 0 && s.minEp <= 1 {
				s.falls = append(s.falls, s.ep.confirm())
			}
			return
		}
	}
	s.eligible = append(s.eligible, r)
}

// sparseness says why the charting before time t is too sparse or gappy to
// judge, or "" when it is not. seen[seenHead:] are the times of the
// readings within BaselineMax before t. The first readings of a series are
// a baseline forming, not a sparse series.
func (s *FallScan) sparseness(t int64) string {
	if !s.judged {
		return ""
	}
	if gap := t - s.seen[len(s.seen)-1]; gap > s.maxGap {
		return fmt.Sprintf("no end-tidal reading in the %s before this one: the series is too gappy to judge a fall or rise",
			ClinicalDuration(time.Duration(s.maxGap)*time.Millisecond))
	}
	need := max(s.cfg.MinBaselineReadings, 1)
	if n := len(s.seen) - s.seenHead; n < need && s.first <= t-s.spanMax {
		return fmt.Sprintf("%d end-tidal readings in the %s before this one, fewer than the %d a baseline needs: the series is too sparse to judge a fall or rise",
			n, ClinicalDuration(time.Duration(s.spanMax)*time.Millisecond), need)
	}
	return ""
}

// baseline returns the baseline and the first of the readings it is the
// median of (eligible[from:inEnd]): the Baseline window when it holds
// MinBaselineReadings, otherwise (sparse charting) the last
// MinBaselineReadings eligible readings within BaselineMax. ok is false
// when neither has enough readings: a baseline still forming, or emptied
// by a long episode. It allocates only in the sparse case, which holds a
// handful of readings: it runs for every reading of a series.
func baseline(cfg FallConfig, eligible []Reading, head, inEnd, far int, window []float64) (base float64, from int, ok bool) {
	need := max(cfg.MinBaselineReadings, 1)
	if inEnd-head >= need {
		return median(window), head, true
	}
	if inEnd-far < need {
		return 0, 0, false
	}
	from = inEnd - need
	vals := make([]float64, 0, need)
	for _, r := range eligible[from:inEnd] {
		vals = append(vals, r.Value)
	}
	return Median(vals), from, true
}

// threshold is how far from the baseline a reading must be to be low or
// high: min(Drop, DropFraction × baseline).
func threshold(cfg FallConfig, base float64) float64 {
	return min(cfg.Drop, cfg.DropFraction*base)
}

// episode is an open fall or rise, candidate or confirmed.
type episode struct {
	baseline, threshold float64
	rise                bool
	baseReadings        []Reading
	readings            []Reading // onset to the latest reading, while a candidate
	confirmed           bool
}

// beyond reports whether v is past the threshold in the episode's direction.
func (e *episode) beyond(v float64) bool {
	if e.rise {
		return v > e.baseline+e.threshold
	}
	return v < e.baseline-e.threshold
}

// recovered reports whether v is back within recover × threshold of the
// baseline, which ends a confirmed episode.
func (e *episode) recovered(v, recover float64) bool {
	if e.rise {
		return v < e.baseline+recover*e.threshold
	}
	return v > e.baseline-recover*e.threshold
}

// confirm fixes the finding from the readings so far.
func (e *episode) confirm() Fall {
	e.confirmed = true
	vals := make([]float64, len(e.readings))
	for i, r := range e.readings {
		vals[i] = r.Value
	}
	level := Median(vals)
	notes := fallNotes(level)
	if e.rise {
		notes = riseNotes()
	}
	return Fall{
		Onset:            e.readings[0].At(),
		Confirmed:        e.readings[len(e.readings)-1].At(),
		Baseline:         e.baseline,
		Level:            level,
		Change:           level - e.baseline,
		Rise:             e.rise,
		BaselineReadings: e.baseReadings,
		EpisodeReadings:  slices.Clone(e.readings),
		Notes:            notes,
	}
}

// riseNotes names the usual causes of a sustained rise of end-tidal CO2,
// all common practice: return of spontaneous circulation or a rising
// cardiac output (the mirror of the fall with low output, Grmec 2003, which
// is not cited for the rise), hypoventilation, and a rise in CO2
// production (fever, sepsis, bicarbonate, a released tourniquet).
func riseNotes() []string {
	return []string{
		"consider return of circulation or a rising cardiac output",
		"consider hypoventilation: a lower minute volume, a leak or an obstruction",
		"consider a rise in CO2 production: fever, sepsis, shivering, bicarbonate, a released tourniquet",
	}
}

// nearZeroEtCO2 is the level, in mm[Hg], below which a fall looks like no
// expired gas reaching the sensor at all. A design choice.
const nearZeroEtCO2 = 5.0

// fallNotes names the causes to rule out. Disconnection, leak and sampling
// faults are common practice; dead space rising with pulmonary embolism is
// shown by Courtney DM et al., Resuscitation 2002;53:83, and the fall with
// low cardiac output by Grmec S et al., Crit Care 2003;7:R139.
func fallNotes(level float64) []string {
	notes := []string{
		"rule out a sudden rise in dead space: pulmonary embolism, low cardiac output (Courtney 2002; Grmec 2003)",
		"rule out a leak or a disconnection of the circuit",
		"rule out a sampling fault of the capnograph",
	}
	if level < nearZeroEtCO2 {
		notes = append(notes, "near-zero end-tidal CO2: check first for disconnection, extubation or an oesophageal tube")
	}
	return notes
}

// median of an already sorted, non-empty slice.
func median(sorted []float64) float64 {
	n := len(sorted)
	if n%2 == 1 {
		return sorted[n/2]
	}
	return (sorted[n/2-1] + sorted[n/2]) / 2
}
