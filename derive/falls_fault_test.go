package derive_test

import (
	"testing"

	"github.com/deadspace-fhir/deadspace/derive"
)

// A fall or rise of end-tidal CO2 that is confirmed and never recovers (a
// new level after a change of settings, a rise after bicarbonate or on
// return of circulation) holds the detector for the rest of the series:
// while the episode stays open nothing else is judged, and a reading on
// the far side of the baseline counts as "recovered" and joins the
// baseline. So a fall to near zero two hours later, the classic picture of
// a circuit disconnection, extubation or cardiac arrest, is never
// reported. Disconnection is the commonest cause of a sudden fall to zero
// (ANZCA study notes); "Sudden drop in EtCO2 with hypotension is highly
// suggestive" of massive pulmonary embolism (ANZCA study notes); the fall
// with low cardiac output or arrest: Grmec S et al., Crit Care 2003;7:R139.
// A clinician expects a finding for the fall to near zero, whatever
// happened two hours before: the detector's notes already name
// "near-zero end-tidal CO2: check first for disconnection, extubation or an
// oesophageal tube" for exactly this case.
func TestFallToNearZeroDuringAnUnrecoveredEpisodeIsReported(t *testing.T) {
	t.Parallel()
	cases := []struct {
		name   string
		series []derive.Reading
		// onset is the minute the fall to near zero starts.
		onset int
	}{
		// 38 for 30 min, then a settled 29 for two hours (a fall of 9,
		// confirmed and never back within 4 of 38), then 2 mm[Hg].
		{"disconnection two hours into a lower level", minutes(cat(rep(38, 30), rep(29, 120), rep(2, 10))...), 150},
		// 38 for 30 min, then a settled 52 for two hours (a rise of 14,
		// confirmed), then 1 mm[Hg].
		{"disconnection two hours into a higher level", minutes(cat(rep(38, 30), rep(52, 120), rep(1, 10))...), 150},
	}
	for _, tc := range cases {
		t.Run(tc.name, func(t *testing.T) {
			t.Parallel()
			falls := derive.DetectFalls(derive.DefaultConfig().Fall, tc.series)
			found := false
			for _, f := range falls {
				if !f.Rise && !f.Onset.Before(at(tc.onset)) && f.Level < 5 {
					found = true
				}
			}
			if !found {
				var got []string
				for _, f := range falls {
					got = append(got, f.Onset.Format("15:04")+" "+map[bool]string{true: "rise", false: "fall"}[f.Rise])
				}
				t.Errorf("no fall to near zero reported from %s on (end-tidal 1–2 mm[Hg] for 10 min); findings: %v", at(tc.onset).Format("15:04"), got)
			}
		})
	}
}
