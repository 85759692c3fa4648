package derive

import (
	"slices"
)

// detectFalls is one forward pass in which each reading is judged only on
// itself and the readings before it, and a finding is fixed the moment it is
// confirmed. That is what makes a streaming caller, who re-runs it over a
// growing series, and a batch caller agree. The rules are on [DetectFalls].
func detectFalls(cfg FallConfig, series []Reading) []Fall {
	var (
		falls []Fall
		// eligible are baseline-eligible readings in time order;
		// eligible[head:inEnd] are in the current window, and their values
		// are in window, sorted.
		eligible    []Reading
		head, inEnd int
		window      []float64
		ep          *episode
	)
	span := cfg.Baseline.Milliseconds()
	sustain := cfg.Sustain.Milliseconds()

	for _, r := range series {
		if r.Kind != KindEtCO2 {
			continue
		}
		if ok, _, _ := Plausible(KindEtCO2, r.Value); !ok {
			continue
		}
		t := r.AtMillis
		for inEnd < len(eligible) && eligible[inEnd].AtMillis < t {
			v := eligible[inEnd].Value
			i, _ := slices.BinarySearch(window, v)
			window = slices.Insert(window, i, v)
			inEnd++
		}
		from := addSat(t, -span)
		for head < inEnd && eligible[head].AtMillis < from {
			i, _ := slices.BinarySearch(window, eligible[head].Value)
			window = slices.Delete(window, i, i+1)
			head++
		}

		if ep != nil {
			if ep.confirmed {
				if r.Value > ep.baseline-cfg.Recover*ep.threshold {
					ep = nil
					eligible = append(eligible, r)
				}
				continue
			}
			last := ep.readings[len(ep.readings)-1].AtMillis
			if t-last <= sustain && r.Value < ep.baseline-ep.threshold {
				ep.readings = append(ep.readings, r)
				if t-ep.readings[0].AtMillis >= sustain {
					falls = append(falls, ep.confirm())
				}
				continue
			}
			ep = nil // cancelled; judge r afresh below
		}

		if n := inEnd - head; n >= cfg.MinBaselineReadings && n > 0 {
			base := median(window)
			thr := min(cfg.Drop, cfg.DropFraction*base)
			if r.Value < base-thr {
				ep = &episode{
					baseline:     base,
					threshold:    thr,
					baseReadings: slices.Clone(eligible[head:inEnd]),
					readings:     []Reading{r},
				}
				if sustain <= 0 {
					falls = append(falls, ep.confirm())
				}
				continue
			}
		}
		eligible = append(eligible, r)
	}
	return falls
}

// episode is an open fall, candidate or confirmed.
type episode struct {
	baseline, threshold float64
	baseReadings        []Reading
	readings            []Reading // onset to the latest reading, while a candidate
	confirmed           bool
}

// confirm fixes the finding from the readings so far.
func (e *episode) confirm() Fall {
	e.confirmed = true
	vals := make([]float64, len(e.readings))
	for i, r := range e.readings {
		vals[i] = r.Value
	}
	level := Median(vals)
	return Fall{
		Onset:            e.readings[0].At(),
		Confirmed:        e.readings[len(e.readings)-1].At(),
		Baseline:         e.baseline,
		Level:            level,
		Change:           level - e.baseline,
		BaselineReadings: e.baseReadings,
		EpisodeReadings:  slices.Clone(e.readings),
		Notes:            fallNotes(level),
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
