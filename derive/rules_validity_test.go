package derive_test

import (
	"math"
	"testing"
	"time"

	"github.com/deadspace-fhir/deadspace/derive"
)

// Validity rules, one table each, cases named after the clinical situation.

// EtCO2 > PaCO2: "Occasionally, PetCO2 may actually be
// higher than PaCO2 ... low V/Q units with long time constants" (Malley
// WJ, Clinical Blood Gases, 2005), and the rule: "Do not clamp silently:
// report AVDSF < 0 with a warning and suspect a timing or specimen
// error." The alveolar dead-space fraction is therefore written, negative,
// with a note saying so, not left out as out of bounds.
func TestRuleNegativeGradientReportsTheAlveolarFraction(t *testing.T) {
	t.Parallel()
	cases := []struct {
		name       string
		paco2, et  float64
		wantAVDSF  float64
		wantSigned bool
	}{
		// (38 − 41)/38 = −0.0789 (own arithmetic).
		{"end-tidal 3 above arterial in a patient with slow-emptying lung units", 38, 41, (38.0 - 41) / 38, true},
		// (40 − 42)/40 = −0.05.
		{"end-tidal 2 above arterial, blood gas drawn as ventilation was raised", 40, 42, -0.05, true},
		// Control: (40 − 35)/40 = 0.125.
		{"usual positive gradient", 40, 35, 0.125, false},
	}
	for _, tc := range cases {
		t.Run(tc.name, func(t *testing.T) {
			t.Parallel()
			rs := []derive.Reading{rd(derive.KindEtCO2, -time.Minute, tc.et), rd(derive.KindEtCO2, 0, tc.et), rd(derive.KindEtCO2, time.Minute, tc.et)}
			d := derive.Derive(derive.DefaultConfig(), gasOf(tc.paco2), man60, rs)
			checkAccounts(t, d)
			v := value(d, derive.CodeAlveolarFraction)
			if v.Code == "" {
				t.Fatalf("alveolar dead-space fraction not reported: %+v; Malley 2005: report it with a warning, do not clamp", omission(d, derive.CodeAlveolarFraction))
			}
			if math.Abs(v.Value-tc.wantAVDSF) > 1e-9 {
				t.Errorf("AVDSF %v, want %v", v.Value, tc.wantAVDSF)
			}
			if warned := hasNote(v, "timing") || hasNote(v, "sampl") || hasNote(v, "specimen"); warned != tc.wantSigned {
				t.Errorf("timing or specimen warning %v, want %v: %q", warned, tc.wantSigned, v.Notes)
			}
		})
	}
}

// Range checks, from memory: 0 < PĒCO2 < PaCO2; VD/VT in [0, 1); 0.9 or
// more implausible. A physiologic VD/VT of 0.9 or more is
// not a value to write as a measurement: with VD/VT 0.925 at VE 7 L/min,
// alveolar ventilation would be 0.5 L/min. It is left out with a reason
// (the inputs are suspect: VCO2, VE or a mislabelled PaCO2), not written
// and flagged as a markedly raised dead space.
func TestRulePhysiologicFractionOfNinetyPercentIsImplausible(t *testing.T) {
	t.Parallel()
	cases := []struct {
		name      string
		paco2, pe float64
		emitted   bool
	}{
		// (80 − 6)/80 = 0.925 (own arithmetic, Anderson & Breen 2000).
		{"PĒCO2 of 6 against PaCO2 80: VD/VT 0.925", 80, 6, false},
		// (60 − 5.4)/60 = 0.91.
		{"PĒCO2 of 5.4 against PaCO2 60: VD/VT 0.91", 60, 5.4, false},
		// (60 − 9)/60 = 0.85: very high, still within the range checks.
		{"severe ARDS, VD/VT 0.85, still written", 60, 9, true},
	}
	for _, tc := range cases {
		t.Run(tc.name, func(t *testing.T) {
			t.Parallel()
			rs := []derive.Reading{rd(derive.KindEtCO2, 0, 30), rd(derive.KindMixedExpiredCO2, 0, tc.pe), rd(derive.KindTidalVolume, 0, 500), rd(derive.KindMinuteVolume, 0, 7)}
			d := derive.Derive(derive.DefaultConfig(), gasOf(tc.paco2), man60, rs)
			checkAccounts(t, d)
			v := value(d, derive.CodePhysiologic)
			if got := v.Code != ""; got != tc.emitted {
				t.Errorf("physiologic VD/VT emitted %v (value %v, omission %+v), want %v", got, v.Value, omission(d, derive.CodePhysiologic), tc.emitted)
			}
		})
	}
}

// Leaks, from memory: expired VE and VT and PetCO2 read low, so VD/VT and
// VR are wrong; flag a leak above about 10 %. When the same
// window holds the inspired and the expired minute volume (or tidal
// volume) and the expired is more than 10 % below the inspired, the values
// computed from the expired volume carry a note naming the leak. The code
// table's priorities are those of the default table: expired 20 (30 for
// tidal volume), inspired minute volume 10, delivered tidal volume 15.
func TestRuleLeakBetweenInspiredAndExpiredVolumeIsFlagged(t *testing.T) {
	t.Parallel()
	prio := func(r derive.Reading, p int16) derive.Reading { r.Priority = p; return r }
	common := []derive.Reading{
		rd(derive.KindEtCO2, 0, 35), rd(derive.KindVCO2, 0, 200), rd(derive.KindHeight, -time.Hour, 175),
	}
	cases := []struct {
		name string
		vols []derive.Reading
		leak bool
	}{
		// (10 − 7)/10 = 30 % of the inspired volume lost.
		{"cuff leak: inspired 10, expired 7 L/min", []derive.Reading{
			prio(rd(derive.KindMinuteVolume, 0, 10), 10), prio(rd(derive.KindMinuteVolume, 0, 7), 20),
			prio(rd(derive.KindTidalVolume, 0, 500), 30)}, true},
		// (600 − 450)/600 = 25 %.
		{"bronchopleural fistula: delivered 600, expired 450 mL", []derive.Reading{
			prio(rd(derive.KindMinuteVolume, 0, 7), 20),
			prio(rd(derive.KindTidalVolume, 0, 600), 15), prio(rd(derive.KindTidalVolume, 0, 450), 30)}, true},
		// (500 − 480)/500 = 4 %, set against expired: no leak to speak of.
		{"volume control, set 500, expired 480 mL", []derive.Reading{
			prio(rd(derive.KindMinuteVolume, 0, 7), 20),
			prio(rd(derive.KindTidalVolume, 0, 500), 10), prio(rd(derive.KindTidalVolume, 0, 480), 30)}, false},
		// (7.2 − 7)/7.2 = 2.8 %: no leak to speak of.
		{"sealed circuit: inspired 7.2, expired 7 L/min", []derive.Reading{
			prio(rd(derive.KindMinuteVolume, 0, 7.2), 10), prio(rd(derive.KindMinuteVolume, 0, 7), 20),
			prio(rd(derive.KindTidalVolume, 0, 500), 30)}, false},
	}
	for _, tc := range cases {
		t.Run(tc.name, func(t *testing.T) {
			t.Parallel()
			d := derive.Derive(derive.DefaultConfig(), gasOf(40), man60, sortByTime(append(append([]derive.Reading{}, common...), tc.vols...)))
			checkAccounts(t, d)
			for _, c := range []derive.Code{derive.CodePhysiologic, derive.CodeDeadSpaceVolume, derive.CodeAlveolarVent} {
				v := value(d, c)
				if v.Code == "" {
					t.Fatalf("%s not emitted: %+v", c, omission(d, c))
				}
				if got := hasNote(v, "leak"); got != tc.leak {
					t.Errorf("%s leak note %v, want %v: %q", c, got, tc.leak, v.Notes)
				}
			}
		})
	}
}

// The implausible VD/VT (range checks, from memory) is left
// out with its own reason, and neither the values computed from it nor the
// regression estimate stand in for it: (80 − 6)/80 = 0.925.
func TestRuleImplausibleFractionHasItsReasonAndNoStandIn(t *testing.T) {
	t.Parallel()
	rs := []derive.Reading{rd(derive.KindEtCO2, 0, 70), rd(derive.KindMixedExpiredCO2, 0, 6), rd(derive.KindTidalVolume, 0, 500),
		rd(derive.KindMinuteVolume, 0, 7), rd(derive.KindRespRate, 0, 14)}
	d := derive.Derive(derive.DefaultConfig(), gasOf(80), man60, rs)
	checkAccounts(t, d)
	want := map[derive.Code]derive.Reason{
		derive.CodePhysiologic:    derive.ReasonImplausibleVDVT,
		derive.CodeAirwayFraction: derive.ReasonImplausibleVDVT, // (70 − 6)/70 = 0.914
		// Not input-missing: the fraction they need was computed and
		// refused, so they carry its reason, and an auditor counting
		// omissions by reason sees one implausible input, not missing data.
		derive.CodeDeadSpaceVolume:   derive.ReasonImplausibleVDVT,
		derive.CodeAlveolarVent:      derive.ReasonImplausibleVDVT,
		derive.CodeEstimatedFraction: derive.ReasonInconsistent,
	}
	for c, r := range want {
		if o := omission(d, c); o.Reason != r {
			t.Errorf("%s: omission %+v, want reason %s", c, o, r)
		}
	}
}
