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
	// base holds the baseline-eligible readings: those of no episode.
	base trail
	// ep is the open episode, candidate or confirmed; next is a candidate
	// opened against the level of ep while ep is confirmed.
	ep, next *episode
	// seen are the times of judged readings, episode or not, and
	// seen[seenHead:] those within BaselineMax: sparseness is a property
	// of the charting, not of which readings may form a baseline. first is
	// the time of the first judged reading, kept when seen is trimmed.
	seen     []int64
	seenHead int
	first    int64
	judged   bool
}

// trail is a trailing series a baseline or a level is the median of:
// readings in time order; readings[head:inEnd] are in the Baseline window
// before the reading being judged, and their values are in window,
// sorted; readings[far:inEnd] are within BaselineMax.
type trail struct {
	readings         []Reading
	head, inEnd, far int
	window           []float64
}

// advance moves the windows to a reading at t (readings at t itself are
// not in them).
func (w *trail) advance(t, span, spanMax int64) {
	for w.inEnd < len(w.readings) && w.readings[w.inEnd].AtMillis < t {
		v := w.readings[w.inEnd].Value
		i, _ := slices.BinarySearch(w.window, v)
		w.window = slices.Insert(w.window, i, v)
		w.inEnd++
	}
	from := addSat(t, -span)
	for w.head < w.inEnd && w.readings[w.head].AtMillis < from {
		i, _ := slices.BinarySearch(w.window, w.readings[w.head].Value)
		w.window = slices.Delete(w.window, i, i+1)
		w.head++
	}
	fromMax := addSat(t, -spanMax)
	for w.far < w.inEnd && w.readings[w.far].AtMillis < fromMax {
		w.far++
	}
}

// median returns the median of the Baseline window when it holds need
// readings, otherwise (sparse charting) of the last need readings within
// BaselineMax, or of all of them when there are fewer but at least least;
// from is the first of the readings it is the median of
// (readings[from:inEnd]). ok is false when there are too few. It
// allocates only in the sparse case, which holds a handful of readings:
// it runs for every reading of a series.
func (w *trail) median(need, least int) (m float64, from int, ok bool) {
	if w.inEnd-w.head >= need {
		return median(w.window), w.head, true
	}
	n := min(w.inEnd-w.far, need)
	if n < max(least, 1) {
		return 0, 0, false
	}
	from = w.inEnd - n
	vals := make([]float64, 0, n)
	for _, r := range w.readings[from:w.inEnd] {
		vals = append(vals, r.Value)
	}
	return Median(vals), from, true
}

// cited returns a copy of readings[from:inEnd], for a finding to cite.
func (w *trail) cited(from int) []Reading { return slices.Clone(w.readings[from:w.inEnd]) }

// clone copies w with room for n more readings, without the readings
// before far and head, which are never looked at again (far and head only
// move forward).
func (w *trail) clone(n int) trail {
	drop := min(w.far, w.head)
	return trail{
		readings: cloneWithRoom(w.readings[drop:], n),
		head:     w.head - drop, inEnd: w.inEnd - drop, far: w.far - drop,
		window: cloneWithRoom(w.window, n),
	}
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
	c.base = s.base.clone(n)
	// The last time is kept even when it is older than BaselineMax: the
	// gap to the next reading is measured from it.
	keep := min(s.seenHead, max(len(s.seen)-1, 0))
	c.seen = cloneWithRoom(s.seen[keep:], n)
	c.seenHead = s.seenHead - keep
	c.ep, c.next = s.ep.clone(n), s.next.clone(n)
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
	s.base.advance(t, s.span, s.spanMax)
	fromMax := addSat(t, -s.spanMax)
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
			s.addToOpen(r, why)
			return
		}
		if s.extend(ep, r) {
			return
		}
		s.ep = nil // cancelled; judge r afresh below
	}

	need := max(s.cfg.MinBaselineReadings, 1)
	base, baseFrom, ok := s.base.median(need, need)
	if why != "" {
		s.sparse = append(s.sparse, Omission{Ref: r.Ref, Reason: ReasonTooSparse, Detail: why})
	} else if ok && base >= minBaselineEtCO2 {
		thr := threshold(s.cfg, base)
		if rise := r.Value > base+thr; rise || r.Value < base-thr {
			s.ep = s.open(r, base, thr, rise, s.base.cited(baseFrom))
			return
		}
	}
	s.base.readings = append(s.base.readings, r)
}

// addToOpen judges r while the episode s.ep is confirmed: it may extend or
// cancel the candidate s.next, end the episode by recovery, open a
// candidate against the episode's level, or join that level.
func (s *FallScan) addToOpen(r Reading, why string) {
	ep := s.ep
	ep.level.advance(r.AtMillis, s.span, s.spanMax)
	if c := s.next; c != nil {
		if s.extend(c, r) {
			if c.confirmed { // it takes the place of the episode it opened in
				s.ep, s.next = c, nil
			}
			return
		}
		s.next = nil // cancelled; judge r afresh below
	}
	if ep.recovered(r.Value, s.cfg.Recover) {
		s.ep = nil
		s.base.readings = append(s.base.readings, r)
		return
	}
	if why != "" {
		s.sparse = append(s.sparse, Omission{Ref: r.Ref, Reason: ReasonTooSparse, Detail: why})
	} else if level, from, ok := ep.level.median(max(s.cfg.MinBaselineReadings, 1), s.minEp); ok && level >= minBaselineEtCO2 {
		thr := threshold(s.cfg, level)
		rise := r.Value > level+thr
		// A change towards the episode's baseline that stops short of the
		// far side of its recovery band is a partial recovery, not a
		// change of its own.
		across := rise != ep.rise
		if (rise || r.Value < level-thr) && (!across || ep.beyondBand(r.Value, rise, s.cfg.Recover)) {
			c := s.open(r, level, thr, rise, ep.level.cited(from))
			if across {
				c.across, c.edge = true, ep.bandEdge(rise, s.cfg.Recover)
			}
			if c.confirmed { // it takes the place of the episode it opened in
				s.ep = c
			} else {
				s.next = c
			}
			return
		}
	}
	ep.level.readings = append(ep.level.readings, r)
}

// open returns the candidate episode r opens, a rise or a fall past thr
// from ref (a baseline, or an episode's level, the median of cited),
// confirmed at once when the configuration confirms at onset.
func (s *FallScan) open(r Reading, ref, thr float64, rise bool, cited []Reading) *episode {
	ep := &episode{
		baseline:     ref,
		threshold:    thr,
		rise:         rise,
		baseReadings: cited,
		readings:     []Reading{r},
	}
	if s.sustain <= 0 && s.minEp <= 1 {
		s.falls = append(s.falls, ep.confirm())
	}
	return ep
}

// extend adds r to the candidate ep when r is past its threshold and
// within MaxGap of the last reading, confirming it once it has lasted
// Sustain with MinEpisodeReadings readings; it reports false when r
// cancels the candidate instead.
func (s *FallScan) extend(ep *episode, r Reading) bool {
	last := ep.readings[len(ep.readings)-1].AtMillis
	if r.AtMillis-last > s.maxGap || !ep.beyond(r.Value) {
		return false
	}
	ep.readings = append(ep.readings, r)
	if r.AtMillis-ep.readings[0].AtMillis >= s.sustain && len(ep.readings) >= s.minEp {
		s.falls = append(s.falls, ep.confirm())
	}
	return true
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

// threshold is how far from the baseline a reading must be to be low or
// high: min(Drop, DropFraction × baseline).
func threshold(cfg FallConfig, base float64) float64 {
	return min(cfg.Drop, cfg.DropFraction*base)
}

// episode is an open fall or rise, candidate or confirmed.
type episode struct {
	baseline, threshold float64
	rise                bool
	// across marks a candidate that crosses the baseline of the confirmed
	// episode it opened in (a fall during a rise, a rise during a fall):
	// a reading is past it only when it is also at or past edge, the far
	// side of that baseline's recovery band.
	across       bool
	edge         float64
	baseReadings []Reading
	readings     []Reading // onset to the latest reading, while a candidate
	confirmed    bool
	// level holds, once confirmed, the episode's readings from onset on
	// that neither ended it nor belonged to a candidate opened in it: the
	// level it settled at, which a further change is judged against.
	level trail
}

// clone copies e (nil stays nil) with room for n more readings.
func (e *episode) clone(n int) *episode {
	if e == nil {
		return nil
	}
	c := *e
	c.readings = slices.Clone(e.readings)
	if e.confirmed {
		c.level = e.level.clone(n)
	}
	return &c
}

// beyond reports whether v is past the threshold in the episode's direction.
func (e *episode) beyond(v float64) bool {
	if e.rise {
		return v > e.baseline+e.threshold && (!e.across || v >= e.edge)
	}
	return v < e.baseline-e.threshold && (!e.across || v <= e.edge)
}

// recovered reports whether v is back within recover × threshold of the
// baseline, on either side, which ends a confirmed episode. A reading past
// that band on the far side of the baseline (a fall below it during a
// rise, a rise above it during a fall) has not recovered: it is a change
// of its own.
func (e *episode) recovered(v, recover float64) bool {
	band := recover * e.threshold
	return v > e.baseline-band && v < e.baseline+band
}

// bandEdge is the edge of the recovery band on the side of the baseline a
// rise (up) or a fall (!up) reaches beyond.
func (e *episode) bandEdge(up bool, recover float64) float64 {
	if up {
		return e.baseline + recover*e.threshold
	}
	return e.baseline - recover*e.threshold
}

// beyondBand reports whether v, not recovered, is at or past the recovery
// band on the side a rise (up) or a fall (!up) reaches.
func (e *episode) beyondBand(v float64, up bool, recover float64) bool {
	if up {
		return v >= e.bandEdge(true, recover)
	}
	return v <= e.bandEdge(false, recover)
}

// confirm fixes the finding from the readings so far, and starts the
// episode's level from them.
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
	f := Fall{
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
	e.level = trail{readings: e.readings}
	e.readings, e.baseReadings = nil, nil
	return f
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
