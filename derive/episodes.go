package derive

import (
	"math"
	"slices"
	"time"
)

// EpisodeEnd says when the episode of a fall or rise finding ended, for a
// reviewer who wants to see its whole extent (the finding itself is fixed
// at its confirmation and says nothing of what came after). The rules are
// the ones that end a confirmed episode in [DetectFalls]: the episode ends
// at the first end-tidal reading after the confirmation that is back
// within Recover × threshold of the finding's baseline, on either side
// (threshold = min(Drop, DropFraction × baseline)), or at the onset of the
// next finding when that one opened against the episode's level before
// such a reading came (a further fall, or a crossing to the far side of
// the baseline, took its place). When neither has come, the episode is
// ongoing and end is the last end-tidal reading after the confirmation
// (the confirmation itself when there is none): the shading of a timeline
// stops where the data stops. A silent monitor does not end an episode,
// as in the detector; a page shows the silence as a break in the line.
// series is as for DetectFalls (sorted by AtMillis; other kinds and
// implausible values are skipped), and the whole series the detector
// read: the finding that took an episode's place is found by running the
// detector over it. cfg should be the configuration that found f, since
// the threshold is not part of the finding.
func EpisodeEnd(cfg FallConfig, f Fall, series []Reading) (end time.Time, ongoing bool) {
	ep := episode{baseline: f.Baseline, threshold: threshold(cfg, f.Baseline), rise: f.Rise}
	after := f.Confirmed.UnixMilli()
	g, replaced := nextFinding(cfg, f, series)
	next := int64(math.MaxInt64)
	if replaced {
		next = g.Onset.UnixMilli()
	}
	end = f.Confirmed
	for _, r := range series {
		if r.Kind != KindEtCO2 || r.AtMillis <= after {
			continue
		}
		if ok, _, _ := Plausible(KindEtCO2, r.Value); !ok {
			continue
		}
		if r.AtMillis >= next {
			return g.Onset, false
		}
		if ep.recovered(r.Value, cfg.Recover) {
			return r.At(), false
		}
		end = r.At()
	}
	return end, true
}

// nextFinding returns the finding the detector confirms over series after
// f, when f is one of its findings.
func nextFinding(cfg FallConfig, f Fall, series []Reading) (Fall, bool) {
	falls := DetectFalls(cfg, series)
	i := slices.IndexFunc(falls, func(g Fall) bool {
		return g.Rise == f.Rise && g.Onset.Equal(f.Onset) && g.Confirmed.Equal(f.Confirmed) && g.Baseline == f.Baseline
	})
	if i < 0 || i+1 >= len(falls) {
		return Fall{}, false
	}
	return falls[i+1], true
}
