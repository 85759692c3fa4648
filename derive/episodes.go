package derive

import "time"

// EpisodeEnd says when the episode of a fall or rise finding ended, for a
// reviewer who wants to see its whole extent (the finding itself is fixed
// at its confirmation and says nothing of what came after). The rule is
// the one that ends a confirmed episode in [DetectFalls]: the episode ends
// at the first end-tidal reading after the confirmation that is back
// within Recover × threshold of the finding's baseline (threshold =
// min(Drop, DropFraction × baseline)). When no such reading has come, the
// episode is ongoing and end is the last end-tidal reading after the
// confirmation (the confirmation itself when there is none): the shading
// of a timeline stops where the data stops. A silent monitor does not end
// an episode, as in the detector; a page shows the silence as a break in
// the line. series is as for DetectFalls (sorted by AtMillis; other kinds
// and implausible values are skipped); cfg should be the configuration
// that found f, since the threshold is not part of the finding.
func EpisodeEnd(cfg FallConfig, f Fall, series []Reading) (end time.Time, ongoing bool) {
	ep := episode{baseline: f.Baseline, threshold: threshold(cfg, f.Baseline), rise: f.Rise}
	after := f.Confirmed.UnixMilli()
	end = f.Confirmed
	for _, r := range series {
		if r.Kind != KindEtCO2 || r.AtMillis <= after {
			continue
		}
		if ok, _, _ := Plausible(KindEtCO2, r.Value); !ok {
			continue
		}
		if ep.recovered(r.Value, cfg.Recover) {
			return r.At(), false
		}
		end = r.At()
	}
	return end, true
}
