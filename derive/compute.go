package derive

import (
	"errors"
	"fmt"
	"math"
	"slices"
	"sort"
	"strconv"
	"strings"
	"time"
)

// DefaultConfig returns the documented defaults. All are design choices, not
// published values:
//
//   - Window 5 min: Enghoff's equation needs PaCO2 and PĒCO2 measured at the
//     same time, no maximum offset has been published, and 5 min is the short
//     end of the 5–10 min we judged safe at steady ventilation.
//   - HeightMaxAge 365 days: an adult's height does not change in a year, and
//     a height older than that may belong to a merged or reused record.
//   - Artefact: an end-tidal reading below 5 mm[Hg] (no expired gas reaching
//     the sensor: disconnection, suctioning, an occluded sampling line), or
//     below half the median of its window's other readings, is not an
//     end-tidal value of the patient at that moment; when fewer than half of
//     a window's readings remain, the window has no end-tidal value.
//   - Steady: minute volume changed by 20 % or more, or end-tidal CO2 by
//     5 mm[Hg] or more, between the 15 min before the pairing window and the
//     window itself: the Enghoff and Bohr values carry a note.
//   - Temperature: the nearest body temperature within 60 min of the
//     sample; nothing changes within 37 ± 0.5 °C; otherwise
//     PCO2(T) = PCO2(37) × 10^(0.019 × (T − 37)), the coefficient published
//     for PCO2 of blood in vitro (J Appl Physiol 1965; Bradley, Severinghaus
//     and Stupfel 1956 give 0.0185).
//   - LeakFraction 0.10: a measured (expired) minute or tidal volume more
//     than 10 % below the inspired or delivered one in the same window is
//     a leak (cuff, circuit, bronchopleural fistula); the expired volumes
//     and end-tidal CO2 then read low (the ~10 % figure is from memory).
//   - Fall: a 30 min trailing baseline of at least 5 readings; a reading is
//     fallen when it is 8 mm[Hg] or 25 % below baseline, whichever is
//     smaller (so a low baseline still gives a proportionate threshold); the
//     fall must last 3 min, long enough to pass over suction, a sigh or a
//     brief sampling artefact; and it ends when a reading is back within
//     half the threshold of the baseline, a hysteresis that keeps a value
//     hovering at the threshold from producing a stream of findings. For
//     sparse charting (many EHRs keep a validated value every 5 to 60 min)
//     readings may be up to 16 min apart (15 min charting and a minute of
//     jitter), the baseline reaches back up to 90 min to find its 5
//     readings, and an episode needs 2 readings past the threshold.
func DefaultConfig() Config {
	return Config{
		Window:       5 * time.Minute,
		HeightMaxAge: 365 * 24 * time.Hour,
		Artefact: ArtefactConfig{
			Floor:             5,
			Fraction:          0.5,
			MinUsableFraction: 0.5,
		},
		Steady: SteadyConfig{
			Lookback:           15 * time.Minute,
			MinuteVolumeChange: 0.20,
			EtCO2Change:        5,
		},
		Temperature: TemperatureConfig{
			Search:      60 * time.Minute,
			Tolerance:   0.5,
			Coefficient: 0.019,
		},
		LeakFraction: 0.10,
		Fall: FallConfig{
			Baseline:            30 * time.Minute,
			MinBaselineReadings: 5,
			Drop:                8,
			DropFraction:        0.25,
			Sustain:             3 * time.Minute,
			MaxGap:              16 * time.Minute,
			BaselineMax:         90 * time.Minute,
			MinEpisodeReadings:  2,
			Recover:             0.5,
		},
	}
}

// ValidateAs is [Config.Validate] with the fields an operator sets through
// a flag named by it: names maps a field ("Window", "Fall.Drop") to the
// name the operator typed ("--window"), so an error never shows a Go field
// name where a flag exists.
func (c Config) ValidateAs(names map[string]string) error {
	err := c.Validate()
	if err == nil || len(names) == 0 {
		return err
	}
	lines := strings.Split(strings.TrimPrefix(err.Error(), "derive config: "), "\n")
	for i, l := range lines {
		field, rest, ok := strings.Cut(l, " must ")
		if n, named := names[field]; ok && named {
			lines[i] = n + " must " + rest
		}
	}
	return fmt.Errorf("derive config: %w", errors.New(strings.Join(lines, "\n")))
}

// Validate reports every problem with the configuration at once, each naming
// its field, so an operator fixes a configuration in one pass.
func (c Config) Validate() error {
	var errs []error
	// Readings carry millisecond times, so a shorter duration would silently
	// become zero.
	duration := func(name string, d time.Duration) {
		if d < time.Millisecond {
			errs = append(errs, fmt.Errorf("%s must be at least 1ms, got %v", name, d))
		}
	}
	fraction := func(name string, v float64) {
		if !(v > 0 && v < 1) {
			errs = append(errs, fmt.Errorf("%s must be between 0 and 1 exclusive, got %v", name, v))
		}
	}
	duration("Window", c.Window)
	duration("HeightMaxAge", c.HeightMaxAge)
	duration("Fall.Baseline", c.Fall.Baseline)
	duration("Fall.Sustain", c.Fall.Sustain)
	if c.Fall.MinBaselineReadings < 1 {
		errs = append(errs, fmt.Errorf("Fall.MinBaselineReadings must be at least 1, got %d", c.Fall.MinBaselineReadings))
	}
	if !(c.Fall.Drop > 0) || math.IsInf(c.Fall.Drop, 0) {
		errs = append(errs, fmt.Errorf("Fall.Drop must be a positive number of mm[Hg], got %v", c.Fall.Drop))
	}
	fraction("Fall.DropFraction", c.Fall.DropFraction)
	fraction("Fall.Recover", c.Fall.Recover)
	duration("Fall.MaxGap", c.Fall.MaxGap)
	if c.Fall.BaselineMax < c.Fall.Baseline {
		errs = append(errs, fmt.Errorf("Fall.BaselineMax must be at least Fall.Baseline (%v), got %v", c.Fall.Baseline, c.Fall.BaselineMax))
	}
	if c.Fall.MinEpisodeReadings < 1 {
		errs = append(errs, fmt.Errorf("Fall.MinEpisodeReadings must be at least 1, got %d", c.Fall.MinEpisodeReadings))
	}
	positive := func(name, unit string, v float64) {
		if !(v > 0) || math.IsInf(v, 0) {
			errs = append(errs, fmt.Errorf("%s must be a positive number%s, got %v", name, unit, v))
		}
	}
	positive("Artefact.Floor", " of mm[Hg]", c.Artefact.Floor)
	fraction("Artefact.Fraction", c.Artefact.Fraction)
	if !(c.Artefact.MinUsableFraction > 0 && c.Artefact.MinUsableFraction <= 1) {
		errs = append(errs, fmt.Errorf("Artefact.MinUsableFraction must be above 0 and at most 1, got %v", c.Artefact.MinUsableFraction))
	}
	duration("Steady.Lookback", c.Steady.Lookback)
	positive("Steady.MinuteVolumeChange", " (a fraction)", c.Steady.MinuteVolumeChange)
	positive("Steady.EtCO2Change", " of mm[Hg]", c.Steady.EtCO2Change)
	duration("Temperature.Search", c.Temperature.Search)
	if !(c.Temperature.Tolerance >= 0 && c.Temperature.Tolerance < 5) {
		errs = append(errs, fmt.Errorf("Temperature.Tolerance must be at least 0 and below 5 °C, got %v", c.Temperature.Tolerance))
	}
	if !(c.Temperature.Coefficient > 0 && c.Temperature.Coefficient < 0.1) {
		errs = append(errs, fmt.Errorf("Temperature.Coefficient must be above 0 and below 0.1 per °C, got %v", c.Temperature.Coefficient))
	}
	fraction("LeakFraction", c.LeakFraction)
	if err := errors.Join(errs...); err != nil {
		return fmt.Errorf("derive config: %w", err)
	}
	return nil
}

// plausibleRange holds the physiological range of each kind, inclusive.
// These are design choices, wide enough for any live patient (a neonate's
// height, an exercising adult's minute volume) and narrow enough to catch a
// wrong unit, such as kPa read as mm[Hg] or mL as L. The range rules we know
// of are from memory, so nothing here is a published limit. The upper CO2
// limits are wide on purpose: extreme hypercapnia (PaCO2 above 150 mm[Hg])
// has been survived (from memory). Body temperature reaches down to 15 °C
// for deep hypothermia during cardiac surgery.
// EtCO2 includes 0 on purpose: a disconnected circuit reads 0 and the fall
// detector must see it.
var plausibleRange = [kindCount]struct {
	lo, hi float64
	known  bool
}{
	KindPaCO2:           {minPaCO2, 300, true},
	KindEtCO2:           {0, 200, true},
	KindMixedExpiredCO2: {0.5, 150, true},
	KindVCO2:            {20, 2000, true},
	KindTidalVolume:     {20, 3000, true},
	KindMinuteVolume:    {0.5, 60, true},
	KindRespRate:        {1, 100, true},
	KindHeight:          {40, 250, true},
	KindBodyTemperature: {15, 45, true},
	KindPaCO2Adjusted:   {minPaCO2, 300, true},
}

// Plausible reports whether v is inside the physiological range of kind k,
// and returns the range. NaN and infinities are never plausible; an unknown
// kind has no range and nothing is plausible for it.
func Plausible(k Kind, v float64) (ok bool, lo, hi float64) {
	if k >= kindCount || !plausibleRange[k].known {
		return false, 0, 0
	}
	p := plausibleRange[k]
	return v >= p.lo && v <= p.hi, p.lo, p.hi
}

// Derive computes every value it can for one blood gas. readings are the
// same patient's accepted readings of any kind, sorted by AtMillis. Readings
// of KindPaCO2 (the patient's blood gases) are not paired; they tell a
// temperature-adjusted PaCO2 reported on another blood gas (a component,
// which carries that gas's reference and time) from one of this sample, so
// a caller passes them. They also decide two rules of what a sample is:
//
//   - Blood gases of other resources at exactly gas's sample time are the
//     same sample reported again (a laboratory that sends the panel with
//     its components and each result as its own Observation too). When
//     their values agree within [SameValue], the preferred one (see
//     [preferGas]) is derived, citing the others (a summary of kind
//     [KindPaCO2] in Used, and a note on every value computed from the
//     PaCO2); the others give no values and are left out with
//     [ReasonSameSample]. When they disagree, none is derived: each is
//     left out with [ReasonSampleDisagrees], and so is every value.
//   - A separate temperature-adjusted PaCO2 (its own resource) belongs to
//     the blood gas nearest in time within [sameSample]; as near to
//     another blood gas as to this one, it is used by neither (left out
//     with [ReasonSampleAmbiguous], and the values say so in a note).
//
// The pairing uses only AtMillis, which the adapter sets from the
// physiological (sample) time, never from when a result was reported.
//
// A reading outside [Plausible] is not used and is listed in Omitted with
// [ReasonImplausible]; the adapters should already have removed such
// readings, this is a second line of defence. Every value that is not
// emitted is listed in Omitted with its reason, so the output always
// accounts for every [Code] except [CodeEtCO2Drop], which [DetectFalls]
// produces, and a blood gas left out with [ReasonSameSample], whose values
// the preferred blood gas of its sample accounts for.
func Derive(cfg Config, gas Reading, patient Patient, readings []Reading) Derivation {
	g := sameInstant(gas, readings)
	if len(g.others) > 0 && (g.disagree || g.primary.Ref != gas.Ref) {
		return sameSampleOnly(gas, patient, g)
	}
	b := builder{
		d:      Derivation{Gas: gas, Patient: patient},
		window: cfg.Window,
	}
	if len(g.others) > 0 {
		b.d.Used = append(b.d.Used, sameSampleSummary(gas, g))
		b.kindNotes[KindPaCO2] = append(b.kindNotes[KindPaCO2], sameSampleNote(gas, g))
	}
	b.collect(cfg, readings)
	b.d.PaCO2 = b.pa
	b.values()
	return b.d
}

// builder carries one derivation's state between its steps.
type builder struct {
	d      Derivation
	window time.Duration

	med      [kindCount]float64
	have     [kindCount]bool
	priority [kindCount]int16
	// kindNotes are added to every value computed from the kind: a
	// substitute source, artefacts left out.
	kindNotes [kindCount][]string
	// missing says why a windowed kind has no summary although readings
	// were in the window, with the reason to give.
	missing       [kindCount]string
	missingReason [kindCount]Reason

	heightWhy string // why no height was found, when none was

	// pa is the PaCO2 the equations use: the blood gas's value, or the
	// value at the patient's temperature.
	pa         float64
	paAdjusted bool
	paUsed     []Summary
	paTerms    []Term
	paNote     string
	paOK       bool
	paWhy      string
	// paAmbiguous says that a separate temperature-adjusted PaCO2 was as
	// near another blood gas and was not used.
	paAmbiguous string

	// age is the age in completed years at the sample time; ageWhy says why
	// it is unknown.
	age    int
	ageOK  bool
	ageWhy string

	steadyNote  string
	steadyTerms []Term

	// leakNote goes on every value computed from a minute or tidal volume
	// or from end-tidal CO2 (leakAffected) when the window shows a leak;
	// leakTerms are its figures.
	leakNote  string
	leakTerms []Term

	// The mixed-expired PCO2 used by the fractions, measured or computed.
	pe       float64
	peOK     bool
	peBad    string // set when computed but implausible
	peInputs []Kind
	peTerms  []Term
	peEq     string

	phys       float64
	physOK     bool
	physInputs []Kind
	// physImplausible is set when the physiologic VD/VT was computed but
	// left out as implausible: the estimate must not stand in for it.
	physImplausible bool
}

func (b *builder) collect(cfg Config, readings []Reading) {
	t := b.d.Gas.AtMillis
	win := cfg.Window.Milliseconds()
	from, to := addSat(t, -win), addSat(t, win)

	var byKind [kindCount][]Reading
	i := sort.Search(len(readings), func(i int) bool { return readings[i].AtMillis >= from })
	for ; i < len(readings) && readings[i].AtMillis <= to; i++ {
		r := readings[i]
		if !isWindowed(r.Kind) {
			continue
		}
		if !b.plausible(r) {
			continue
		}
		byKind[r.Kind] = append(byKind[r.Kind], r)
	}

	var reason Reason
	reason, b.paWhy = CheckValue(KindPaCO2, b.d.Gas.Value)
	b.paOK = reason == ""
	if !b.paOK {
		b.d.Omitted = append(b.d.Omitted, Omission{Ref: b.d.Gas.Ref, Reason: reason, Detail: b.paWhy})
	}
	b.temperature(cfg, readings)
	b.patientAge()

	var height *Summary
	if h, rule, ok := b.findHeight(cfg, readings); ok {
		height = &Summary{Kind: KindHeight, Median: h.Value, Readings: []Reading{h}, Rule: rule}
		b.med[KindHeight], b.have[KindHeight] = h.Value, true
	}

	for _, k := range Kinds() {
		if k == KindHeight && height != nil {
			b.d.Used = append(b.d.Used, *height)
			continue
		}
		if k == KindBodyTemperature || k == KindPaCO2Adjusted {
			for _, s := range b.paUsed {
				if s.Kind == k {
					b.d.Used = append(b.d.Used, s)
				}
			}
			continue
		}
		rs := byKind[k]
		if len(rs) == 0 {
			continue
		}
		if k == KindMinuteVolume || k == KindTidalVolume {
			b.leak(cfg, k, rs)
		}
		rs, substitute := b.preferred(k, rs)
		b.priority[k] = rs[0].Priority
		var artefacts int
		if k == KindEtCO2 {
			if b.paOK && etco2InKPa(rs, b.d.Gas.Value) {
				why := fmt.Sprintf("every etco2 reading within ±%s of the sample time is between %v and %v, as end-tidal CO2 in kPa would be, while PaCO2 is %v mm[Hg]",
					ClinicalDuration(cfg.Window), etco2KPaBand[0], etco2KPaBand[1], b.d.Gas.Value)
				for _, r := range rs {
					b.d.Omitted = append(b.d.Omitted, Omission{Ref: r.Ref, Reason: ReasonWrongUnit, Detail: why})
				}
				b.missing[k], b.missingReason[k] = why, ReasonWrongUnit
				continue
			}
			var why string
			rs, artefacts, why = b.artefacts(cfg.Artefact, rs)
			if why != "" {
				b.missing[k], b.missingReason[k] = why, ReasonTooFewUsable
				continue
			}
		}
		vals := make([]float64, len(rs))
		for j, r := range rs {
			vals[j] = r.Value
		}
		m := Median(vals)
		b.med[k], b.have[k] = m, true
		rule := fmt.Sprintf("median of %d readings within ±%s of sample time", len(rs), ClinicalDuration(cfg.Window))
		if len(rs) == 1 {
			rule = fmt.Sprintf("the only reading within ±%s of sample time", ClinicalDuration(cfg.Window))
		}
		if artefacts > 0 {
			note := fmt.Sprintf("%d end-tidal reading(s) in the pairing window left out as artefacts (near zero or far below the rest of the window: disconnection, suctioning, an occluded sampling line)", artefacts)
			rule += "; " + note
			b.kindNotes[k] = append(b.kindNotes[k], note)
		}
		if substitute != "" {
			rule += "; " + substitute
			b.kindNotes[k] = append(b.kindNotes[k], substitute)
		}
		b.d.Used = append(b.d.Used, Summary{Kind: k, Median: m, Readings: rs, Rule: rule, Substitute: substitute, Artefacts: artefacts})
	}
	if b.paAmbiguous != "" {
		b.kindNotes[KindPaCO2] = append(b.kindNotes[KindPaCO2], b.paAmbiguous)
	}
	if b.paNote != "" {
		b.kindNotes[KindPaCO2] = append(b.kindNotes[KindPaCO2], b.paNote)
	}
	b.steadyNote, b.steadyTerms = b.steady(cfg, readings)
}

// patientAge sets the age at the sample time, or why it is unknown.
func (b *builder) patientAge() {
	birth := b.d.Patient.BirthDate
	at := b.d.Gas.At()
	switch {
	case birth.IsZero():
		b.ageWhy = "birth date unknown"
	case at.Before(birth):
		b.ageWhy = fmt.Sprintf("birth date %s is after the sample time", birth.Format(time.DateOnly))
	default:
		b.age, b.ageOK = ageYears(birth, at), true
	}
}

// WestmostZone is how far behind UTC the westmost local time is
// (UTC−12:00, the earliest zone in use; from memory), which ageYears
// counts a birthday by.
const WestmostZone = 12 * time.Hour

// AdultAge is the age, in completed years, from which the adult indices
// (predicted body weight, the ventilatory ratio, the regression estimate)
// are computed: they were derived in adults (Sinha 2009 studied "adult
// mechanically ventilated ICU patients"; the ARDS Network enrolled adults).
const AdultAge = 18

// child reports whether the patient is known to be under [AdultAge].
func (b *builder) child() bool { return b.ageOK && b.age < AdultAge }

// plausible checks r and records it as omitted when it is not.
func (b *builder) plausible(r Reading) bool {
	reason, detail := CheckValue(r.Kind, r.Value)
	if reason != "" {
		b.d.Omitted = append(b.d.Omitted, Omission{Ref: r.Ref, Reason: reason, Detail: detail})
	}
	return reason == ""
}

// findHeight picks the latest plausible height at or before the sample time
// and not older than HeightMaxAge; failing that, the first within Window
// after it (a height measured on admission, just after the first gas).
func (b *builder) findHeight(cfg Config, readings []Reading) (Reading, string, bool) {
	t := b.d.Gas.AtMillis
	oldest := addSat(t, -cfg.HeightMaxAge.Milliseconds())
	next := sort.Search(len(readings), func(i int) bool { return readings[i].AtMillis > t })
	for i := next - 1; i >= 0 && readings[i].AtMillis >= oldest; i-- {
		if r := readings[i]; r.Kind == KindHeight && b.plausible(r) {
			return r, fmt.Sprintf("latest body height at or before sample time, not older than %s", days(cfg.HeightMaxAge)), true
		}
	}
	to := addSat(t, cfg.Window.Milliseconds())
	for i := next; i < len(readings) && readings[i].AtMillis <= to; i++ {
		if r := readings[i]; r.Kind == KindHeight && b.plausible(r) {
			return r, fmt.Sprintf("first body height within %s after sample time (none in the %s before)", ClinicalDuration(cfg.Window), days(cfg.HeightMaxAge)), true
		}
	}
	b.heightWhy = fmt.Sprintf("no body height in the %s before the sample time or within %s after", days(cfg.HeightMaxAge), ClinicalDuration(cfg.Window))
	return Reading{}, "", false
}

func (b *builder) omit(c Code, r Reason, format string, args ...any) {
	b.d.Omitted = append(b.d.Omitted, Omission{Code: c, Reason: r, Detail: fmt.Sprintf(format, args...)})
}

// emit appends v unless arithmetic produced a non-finite number, which must
// never leave the package.
func (b *builder) emit(v Value) bool {
	if math.IsNaN(v.Value) || math.IsInf(v.Value, 0) {
		b.omit(v.Code, ReasonInconsistent, "the inputs gave a non-finite result")
		return false
	}
	var notes []string
	for _, k := range v.Inputs {
		notes = append(notes, b.kindNotes[k]...)
	}
	if b.leakNote != "" && slices.ContainsFunc(v.Inputs, leakAffected) {
		notes = append(notes, b.leakNote)
		v.Terms = append(v.Terms, b.leakTerms...)
	}
	v.Notes = append(notes, v.Notes...)
	b.d.Values = append(b.d.Values, v)
	return true
}

// notSteady adds the steady-state note and figures to a value that assumes
// steady ventilation.
func (b *builder) notSteady(v *Value) {
	if b.steadyNote == "" {
		return
	}
	v.Notes = append(v.Notes, b.steadyNote)
	v.Terms = append(v.Terms, b.steadyTerms...)
}

// need checks that the PaCO2 (when pa) and the windowed kinds are available,
// and records an omission naming everything missing when they are not. A
// kind whose readings were all refused (artefacts, a wrong unit) gives that
// reason rather than [ReasonMissingInput].
func (b *builder) need(c Code, pa bool, kinds ...Kind) bool {
	var missing, why []string
	reason := ReasonMissingInput
	if pa && !b.paOK {
		why = append(why, b.paWhy)
	}
	for _, k := range kinds {
		switch {
		case b.have[k]:
		case b.missing[k] != "":
			why = append(why, b.missing[k])
			if b.missingReason[k] == ReasonTooFewUsable {
				reason = ReasonTooFewUsable
			}
		default:
			missing = append(missing, k.String())
		}
	}
	if len(missing) > 0 {
		why = append(why, fmt.Sprintf("no %s reading within ±%s of the sample time", strings.Join(missing, ", "), ClinicalDuration(b.window)))
	}
	if len(why) == 0 {
		return true
	}
	b.omit(c, reason, "%s", strings.Join(why, "; and "))
	return false
}

// ImplausibleVDVT is the dead-space fraction (VD/VT: Enghoff, Bohr or the
// regression estimate) at and above which a value is not written: with
// VD/VT 0.9 only a tenth of each breath would reach perfused alveoli, so
// alveolar ventilation at a minute volume of 7 L/min would be 0.7 L/min.
// Such a number comes from a wrong input (VCO2, VE, PĒCO2, a PaCO2 in
// another unit), and writing it flagged as a markedly raised dead space
// would present an artefact as a finding. The range check (0 < PĒCO2 <
// PaCO2, VD/VT in [0, 1), 0.9 or more implausible) is from memory; the
// most severe ARDS cohorts average about 0.6–0.7
// (Nuckton 2002: non-survivors 0.63 ± 0.10), so 0.9 is far in the tail.
const ImplausibleVDVT = 0.9

// implausibleVDVT records the omission of c when f is at or above
// [ImplausibleVDVT], judged on the value as written, and reports whether
// it did.
func (b *builder) implausibleVDVT(c Code, f float64, suspect string) bool {
	if asWritten(f, 3) < ImplausibleVDVT {
		return false
	}
	b.omit(c, ReasonImplausibleVDVT, "VD/VT %.3f is %v or more, not a plausible dead-space fraction of a ventilated patient: %s", f, ImplausibleVDVT, suspect)
	return true
}

// inFraction is the bound every dead-space fraction must meet.
func inFraction(f float64) bool { return f >= 0 && f < 1 }

// asWritten rounds v to the decimals its code is written with (pressures 1,
// fractions 3, the ventilatory ratio 2; see package fhir/encode), so that a
// flag is decided on the number a reader sees: a gradient of 5.04 is written
// 5.0 and must not be flagged against a range whose high is 5.
func asWritten(v float64, decimals int) float64 {
	// The same formatting the encoder uses, so the two cannot round apart.
	w, err := strconv.ParseFloat(strconv.FormatFloat(v, 'f', decimals, 64), 64)
	if err != nil {
		return v
	}
	return w
}

// paInputs are the kinds behind the PaCO2 the equations use: the blood gas,
// and the temperature or temperature-adjusted value when one was used.
func (b *builder) paInputs(more ...Kind) []Kind {
	out := []Kind{KindPaCO2}
	for _, s := range b.paUsed {
		out = append(out, s.Kind)
	}
	return union(out, more)
}

// paTermsWith returns the PaCO2 terms (the 37 °C value and temperature when
// they differ from the value used) followed by more.
func (b *builder) paTermsWith(more ...Term) []Term {
	out := slices.Clone(b.paTerms)
	out = append(out, Term{"PaCO2", b.pa, "mm[Hg]"})
	return append(out, more...)
}

// GradientHigh is the upper limit of the normal arterial to end-tidal
// gradient, mm[Hg], inclusive as FHIR's referenceRange.high is: Malley WJ,
// Clinical Blood Gases, 2nd ed., 2005, "Normally, the gradient is less than
// 5 mm Hg"; 2–5 mm[Hg] in other texts. Population: adults.
const GradientHigh = 5.0

// PhysiologicHigh is the physiologic VD/VT at and above which the value is
// flagged high: "markedly elevated VD/VT (≥0.60)" (Kallet RH et al., Respir
// Care 2014;59:1611), associated with higher mortality in ventilated adults
// with ARDS (also Nuckton TJ et al., NEJM 2002;346:1281: non-survivors
// 0.63 ± 0.10 vs survivors 0.54 ± 0.09).
const PhysiologicHigh = 0.60

// AlveolarFractionFloor is the lowest end-tidal alveolar dead-space
// fraction reported: end-tidal CO2 up to 25 % above arterial (10 mm[Hg] at
// a PaCO2 of 40). A negative fraction is reported with a warning (Malley
// WJ, Clinical Blood Gases, 2005: "Occasionally, PetCO2 may actually be
// higher than PaCO2", low V/Q units with long time constants; do not clamp
// it silently), but the negative gradients described with low V/Q units
// are a few mm[Hg]; one beyond this bound is not a physiological reading
// of one moment (a blood gas and an end-tidal value of different times, a
// venous sample) and the value is left out as [ReasonInconsistent]. The
// bound is inclusive and judged on the value as written (3 decimals), as
// [ImplausibleVDVT] is: end-tidal exactly 25 % above arterial is −0.250
// and is written. The bound itself is a design choice.
const AlveolarFractionFloor = -0.25

// VentilatoryRatioHigh is the ventilatory ratio above which the value is
// flagged high: in adults with ARDS, a ratio above 2 (the cohort median) on
// day 1 was associated with higher mortality (ROSE trial secondary
// analysis, Crit Care 2022, doi 10.1186/s13054-022-04179-7).
const VentilatoryRatioHigh = 2.0

func (b *builder) values() {
	pa := b.pa
	et := b.med[KindEtCO2]

	// 1. Arterial to end-tidal gradient. Normal from 0 to GradientHigh
	// inclusive; a negative gradient gets no flag, only its note.
	if b.need(CodeGradient, true, KindEtCO2) {
		g := Gradient(pa, et)
		v := Value{
			Code: CodeGradient, Value: g, Unit: "mm[Hg]",
			Inputs:   b.paInputs(KindEtCO2),
			Equation: "PaCO2 − PetCO2 (Malley WJ, Clinical Blood Gases, 2nd ed., 2005)",
			Terms:    b.paTermsWith(Term{"PetCO2", et, "mm[Hg]"}),
			Range:    &Range{Low: ptr(0), High: ptr(GradientHigh), Text: "normally 0 to 5 mm[Hg] in adults", Source: "Malley WJ, Clinical Blood Gases, 2005"},
		}
		switch gw := asWritten(g, 1); {
		case b.child():
			v.Notes = append(v.Notes, fmt.Sprintf("no flag: the normal range (Malley 2005) is given for adults, and the patient is %d", b.age))
		case gw > GradientHigh:
			v.Flag = FlagHigh
		case gw >= 0:
			v.Flag = FlagNormal
		}
		if g < 0 {
			v.Notes = append(v.Notes, "end-tidal above arterial PCO2 occurs with low V/Q units (Malley 2005) but suggests a timing or sampling error")
		}
		b.emit(v)
	}

	// 2. End-tidal alveolar dead-space fraction.
	// A negative fraction (end-tidal above arterial) is reported with a
	// warning, not clamped or dropped: Malley WJ, Clinical Blood Gases,
	// 2005, "Occasionally, PetCO2 may actually be higher than PaCO2", with
	// the advice to suspect a timing or specimen error. Below
	// AlveolarFractionFloor the inputs cannot both be right.
	if b.need(CodeAlveolarFraction, true, KindEtCO2) {
		f := AlveolarFraction(pa, et)
		switch {
		case asWritten(f, 3) < AlveolarFractionFloor: // inclusive, judged as written
			b.omit(CodeAlveolarFraction, ReasonInconsistent, "PetCO2 %v mm[Hg] is more than %v × PaCO2 %v mm[Hg] (fraction %.3f, below %v): suspect timing, sampling or units",
				et, 1-AlveolarFractionFloor, pa, f, AlveolarFractionFloor)
		case f >= 1:
			b.omit(CodeAlveolarFraction, ReasonFractionBounds, "PetCO2 %v mm[Hg] gives %v, outside [%v, 1)", et, f, AlveolarFractionFloor)
		default:
			v := Value{
				Code: CodeAlveolarFraction, Value: f, Unit: "1",
				Inputs:   b.paInputs(KindEtCO2),
				Equation: "(PaCO2 − PetCO2)/PaCO2, end-tidal alveolar dead-space fraction (name: Bhalla AK et al., Respir Care 2015;60:1548)",
				Terms:    b.paTermsWith(Term{"PetCO2", et, "mm[Hg]"}),
			}
			if f < 0 {
				v.Notes = append(v.Notes, "negative: end-tidal above arterial PCO2; this occurs with low V/Q units, but suspect a timing or specimen error (blood gas and end-tidal not simultaneous, a venous or air-contaminated sample)")
			}
			b.emit(v)
		}
	}

	// 3. Mixed-expired PCO2: measured, or computed from VCO2 and VE.
	b.mixedExpired()

	// 4. Physiologic dead-space fraction (Enghoff).
	b.physiologic(pa)

	// 5. Airway dead-space fraction (Bohr with PetCO2).
	b.airway(et)

	// 6. Dead-space volume and 7. alveolar ventilation.
	b.fromPhysiologic(CodeDeadSpaceVolume, KindTidalVolume)
	b.fromPhysiologic(CodeAlveolarVent, KindMinuteVolume)

	// 8. Ventilatory ratio.
	b.ventilatoryRatio(pa)

	// 9. Estimated fraction, when nothing better exists.
	b.estimated(pa, et)
}

// leakAffected reports whether a leak makes readings of kind k read low:
// the expired volumes, and the end-tidal CO2 sampled from expired gas.
func leakAffected(k Kind) bool {
	return k == KindMinuteVolume || k == KindTidalVolume || k == KindEtCO2
}

func (b *builder) mixedExpired() {
	if b.have[KindMixedExpiredCO2] {
		b.pe, b.peOK = b.med[KindMixedExpiredCO2], true
		b.peInputs = []Kind{KindMixedExpiredCO2}
		b.peTerms = []Term{{"PĒCO2", b.pe, "mm[Hg]"}}
		b.omit(CodeMixedExpiredCO2, ReasonNotApplicable, "PĒCO2 was measured within ±%s of the sample time", ClinicalDuration(b.window))
		return
	}
	if !b.have[KindVCO2] || !b.have[KindMinuteVolume] {
		var missing []string
		for _, k := range []Kind{KindVCO2, KindMinuteVolume} {
			if !b.have[k] {
				missing = append(missing, k.String())
			}
		}
		b.omit(CodeMixedExpiredCO2, ReasonMissingInput, "no measured PĒCO2, and no %s reading within ±%s of the sample time", strings.Join(missing, ", "), ClinicalDuration(b.window))
		return
	}
	vco2, ve := b.med[KindVCO2], b.med[KindMinuteVolume]
	pe := MixedExpiredFromVCO2(vco2, ve)
	if ok, lo, hi := Plausible(KindMixedExpiredCO2, pe); !ok {
		b.peBad = fmt.Sprintf("0.863 × VCO2 %v / VE %v gives PĒCO2 %v mm[Hg], outside %v–%v; suspect VCO2 or VE", vco2, ve, pe, lo, hi)
		b.omit(CodeMixedExpiredCO2, ReasonInconsistent, "%s", b.peBad)
		return
	}
	// Expired gas is alveolar gas diluted by dead-space gas, so its PCO2
	// is below the arterial: one at or above it means the VCO2 or the VE
	// is wrong (their gas conditions, a leak), and neither it nor anything
	// built on it (the fractions, or an estimate beside it) is written.
	if pe >= b.pa {
		b.peBad = fmt.Sprintf("0.863 × VCO2 %v / VE %v gives PĒCO2 %v mm[Hg], not below PaCO2 %v mm[Hg]; suspect VCO2 or VE (their gas conditions, a leak)", vco2, ve, pe, b.pa)
		b.omit(CodeMixedExpiredCO2, ReasonInconsistent, "%s", b.peBad)
		return
	}
	b.peInputs = []Kind{KindVCO2, KindMinuteVolume}
	b.peTerms = []Term{{"VCO2", vco2, "mL/min"}, {"VE", ve, "L/min"}, {"PĒCO2", pe, "mm[Hg]"}}
	b.peEq = "PĒCO2 = 0.863 × VCO2 (STPD) / VE (BTPS)"
	b.pe = pe
	v := Value{
		Code: CodeMixedExpiredCO2, Value: pe, Unit: "mm[Hg]",
		Inputs:   slices.Clone(b.peInputs),
		Equation: b.peEq + " (Siddiki H et al., Crit Care 2010;14:R141 use 0.86)",
		Terms:    []Term{{"VCO2", vco2, "mL/min"}, {"VE", ve, "L/min"}},
		Notes:    []string{"valid only for VCO2 at STPD and VE at BTPS"},
	}
	b.notSteady(&v)
	b.peOK = b.emit(v)
}

// peMissing records why a value needing PĒCO2 cannot have it.
func (b *builder) peMissing(c Code) {
	if b.peBad != "" {
		b.omit(c, ReasonInconsistent, "%s", b.peBad)
		return
	}
	b.omit(c, ReasonMissingInput, "no mixed-expired-co2 reading, nor vco2 and minute-volume, within ±%s of the sample time", ClinicalDuration(b.window))
}

func (b *builder) peEquation(base string) string {
	if b.peEq == "" {
		return base
	}
	return base + "; " + b.peEq
}

func (b *builder) physiologic(pa float64) {
	const c = CodePhysiologic
	if !b.need(c, true) {
		return
	}
	if !b.peOK {
		b.peMissing(c)
		return
	}
	if b.pe >= pa {
		b.omit(c, ReasonInconsistent, "PĒCO2 %v is not below PaCO2 %v mm[Hg]; suspect timing, sampling or units", b.pe, pa)
		return
	}
	f := EnghoffFraction(pa, b.pe)
	if !inFraction(f) {
		b.omit(c, ReasonFractionBounds, "(PaCO2 − PĒCO2)/PaCO2 gives %v, outside [0, 1)", f)
		return
	}
	if b.implausibleVDVT(c, f, "suspect VCO2, VE or PĒCO2, or a PaCO2 in another unit") {
		b.physImplausible = true
		return
	}
	inputs := b.paInputs(b.peInputs...)
	v := Value{
		Code: c, Value: f, Unit: "1",
		Inputs:   inputs,
		Equation: b.peEquation("Enghoff: (PaCO2 − PĒCO2)/PaCO2 (Anderson CT, Breen PH, Crit Care 2000;4:207)"),
		Terms:    b.paTermsWith(b.peTerms...),
		// The healthy range is shown for reference; the flag is against
		// the outcome threshold for ventilated adults, which is above it,
		// so the two never disagree.
		Range: &Range{
			Low: ptr(0.2), High: ptr(0.35),
			Text: "healthy adult at rest, about 0.3; ventilated adults commonly 0.35 to 0.6; 0.60 or more is flagged high",
		},
	}
	switch {
	case b.child():
		v.Notes = append(v.Notes, fmt.Sprintf("no flag: the outcome threshold (0.60) was found in adults, and the patient is %d", b.age))
	case asWritten(f, 3) >= PhysiologicHigh:
		v.Flag = FlagHigh
		v.Notes = append(v.Notes, "markedly elevated (≥ 0.60), associated with higher mortality in ventilated adults with ARDS (Kallet RH et al., Respir Care 2014;59:1611; Nuckton TJ et al., NEJM 2002;346:1281)")
	}
	v.Notes = append(v.Notes, "shunt raises Enghoff VD/VT as well as dead space does (Tusman G et al., Anesth Analg 2012)")
	b.notSteady(&v)
	if b.emit(v) {
		b.phys, b.physOK, b.physInputs = f, true, inputs
	}
}

func (b *builder) airway(et float64) {
	const c = CodeAirwayFraction
	if !b.need(c, false, KindEtCO2) {
		return
	}
	if !b.peOK {
		b.peMissing(c)
		return
	}
	if b.pe >= et {
		b.omit(c, ReasonInconsistent, "PĒCO2 %v is not below PetCO2 %v mm[Hg]", b.pe, et)
		return
	}
	f := BohrAirwayFraction(et, b.pe)
	if !inFraction(f) {
		b.omit(c, ReasonFractionBounds, "(PetCO2 − PĒCO2)/PetCO2 gives %v, outside [0, 1)", f)
		return
	}
	if b.implausibleVDVT(c, f, "suspect VCO2, VE or PĒCO2, or the end-tidal reading") {
		return
	}
	v := Value{
		Code: c, Value: f, Unit: "1",
		Inputs:   union([]Kind{KindEtCO2}, b.peInputs),
		Equation: b.peEquation("Bohr with PetCO2 for PACO2: (PetCO2 − PĒCO2)/PetCO2 (Tusman G et al., Anesth Analg 2012;114:866)"),
		Terms:    append([]Term{{"PetCO2", et, "mm[Hg]"}}, b.peTerms...),
	}
	b.notSteady(&v)
	b.emit(v)
}

// fromPhysiologic emits a value computed from the physiologic fraction and
// one more windowed kind: dead-space volume from tidal volume, alveolar
// ventilation from minute volume.
func (b *builder) fromPhysiologic(c Code, k Kind) {
	if b.physImplausible {
		// Not missing: computed and refused, and a value computed from an
		// implausible fraction would carry the same wrong input.
		b.omit(c, ReasonImplausibleVDVT, "needs the physiologic VD/VT, which was left out as implausible (see its omission)")
		return
	}
	if !b.physOK {
		b.omit(c, ReasonMissingInput, "needs the physiologic VD/VT, which was not computed (see its omission)")
		return
	}
	if !b.need(c, false, k) {
		return
	}
	x := b.med[k]
	v := Value{
		Code: c, Inputs: union(b.physInputs, []Kind{k}),
		Terms: []Term{{"VD/VT", b.phys, "1"}},
	}
	switch c {
	case CodeDeadSpaceVolume:
		v.Value, v.Unit = DeadSpaceVolume(b.phys, x), "mL"
		v.Equation = "VD = VD/VT × VT"
		v.Terms = append(v.Terms, Term{"VT", x, "mL"})
	default:
		v.Value, v.Unit = AlveolarVentilation(x, b.phys), "L/min"
		v.Equation = "VA = VE × (1 − VD/VT), the per-minute form of VA = (VT − VD) × RR"
		v.Terms = append(v.Terms, Term{"VE", x, "L/min"})
	}
	b.notSteady(&v)
	b.emit(v)
}

func (b *builder) ventilatoryRatio(pa float64) {
	const c = CodeVentilatoryRatio
	if b.child() {
		b.omit(c, ReasonNotAdult, "the ventilatory ratio and the ARDS Network predicted body weight are for adults; the patient is %d", b.age)
		return
	}
	if !b.need(c, true, KindMinuteVolume) {
		return
	}
	var facts []string
	if b.d.Patient.Sex != SexMale && b.d.Patient.Sex != SexFemale {
		facts = append(facts, "sex unknown")
	}
	if !b.have[KindHeight] {
		facts = append(facts, b.heightWhy)
	}
	if len(facts) > 0 {
		b.omit(c, ReasonPatientFacts, "predicted body weight needs sex and height: %s", strings.Join(facts, "; "))
		return
	}
	h := b.med[KindHeight]
	pbw, err := PredictedBodyWeight(b.d.Patient.Sex, h)
	if err != nil {
		b.omit(c, ReasonPatientFacts, "%v", err)
		return
	}
	ve := b.med[KindMinuteVolume] * 1000
	vr := VentilatoryRatio(ve, pa, pbw)
	v := Value{
		Code: c, Value: vr, Unit: "1",
		Inputs:      b.paInputs(KindMinuteVolume, KindHeight),
		UsesPatient: true,
		Equation: "VR = (VE × PaCO2)/(PBW × 100 × 37.5), VE in mL/min (Sinha P et al., Br J Anaesth 2009;102:692); " +
			"PBW = 50 (male) or 45.5 (female) + 0.91 × (height − 152.4) (ARDS Network, NEJM 2000;342:1301)",
		Terms: b.paTermsWith(
			Term{"VE", ve, "mL/min"},
			Term{"height", h, "cm"}, Term{"PBW", pbw, "kg"},
		),
		Range: &Range{High: ptr(VentilatoryRatioHigh), Text: "about 1 in healthy adults (Sinha 2009); above 2 is flagged high (adults with ARDS, ROSE trial secondary analysis, Crit Care 2022)"},
		Notes: []string{"about 1 in healthy people (Sinha 2009)"},
	}
	if asWritten(vr, 2) > VentilatoryRatioHigh {
		v.Flag = FlagHigh
		v.Notes = append(v.Notes, "above 2, associated with higher mortality in adults with ARDS (ROSE trial secondary analysis, Crit Care 2022)")
	}
	if h < PBWFormulaHeightCm {
		v.Notes = append(v.Notes, fmt.Sprintf("height %v cm is below %v cm (60 in), the height the predicted body weight formula is anchored at: the predicted body weight is extrapolated", h, PBWFormulaHeightCm))
	}
	if !b.ageOK {
		v.Notes = append(v.Notes, fmt.Sprintf("age unknown (%s): the ventilatory ratio and predicted body weight are defined for adults", b.ageWhy))
	}
	b.emit(v)
}

// PBWFormulaHeightCm is the height the ARDS Network predicted body weight
// formula is anchored at, 60 in (152.4 cm): "height (inches) − 60". Below
// it the formula is extrapolated; values are still computed down to
// [MinAdultHeightCm], with a note.
const PBWFormulaHeightCm = 152.4

// estimated emits the regression estimate only inside the population it
// was derived in (ventilated adults, a non-negative gradient) and only when
// the measured inputs do not contradict each other.
func (b *builder) estimated(pa, et float64) {
	const c = CodeEstimatedFraction
	if b.physOK {
		b.omit(c, ReasonNotApplicable, "the physiologic VD/VT was computed from expired CO2")
		return
	}
	if b.physImplausible {
		b.omit(c, ReasonInconsistent, "the physiologic VD/VT computed from expired CO2 was implausible (see its omission): the inputs contradict each other, and an estimate would hide that")
		return
	}
	if b.child() {
		b.omit(c, ReasonNotAdult, "the regression estimate was derived in ventilated adults; the patient is %d", b.age)
		return
	}
	if !b.need(c, true, KindEtCO2, KindRespRate) {
		return
	}
	if !b.ageOK {
		b.omit(c, ReasonPatientFacts, "the regression needs age; %s", b.ageWhy)
		return
	}
	if b.have[KindMixedExpiredCO2] && b.med[KindMixedExpiredCO2] >= pa {
		b.omit(c, ReasonInconsistent, "measured PĒCO2 %v is not below PaCO2 %v mm[Hg]: the inputs contradict each other", b.med[KindMixedExpiredCO2], pa)
		return
	}
	if b.peBad != "" {
		b.omit(c, ReasonInconsistent, "%s", b.peBad)
		return
	}
	g := Gradient(pa, et)
	if g < 0 {
		b.omit(c, ReasonInconsistent, "PetCO2 %v above PaCO2 %v mm[Hg]: outside the population the regression was derived in", et, pa)
		return
	}
	age := float64(b.age)
	rr := b.med[KindRespRate]
	f := EstimatedFraction(g, rr, age)
	if !inFraction(f) {
		b.omit(c, ReasonFractionBounds, "the regression gives %v, outside [0, 1)", f)
		return
	}
	if b.implausibleVDVT(c, f, "suspect the gradient or the rate") {
		return
	}
	b.emit(Value{
		Code: c, Value: f, Unit: "1",
		Inputs:      b.paInputs(KindEtCO2, KindRespRate),
		UsesPatient: true,
		Equation:    "VD/VT = 0.320 + 0.0106 × (PaCO2 − PetCO2) + 0.003 × RR + 0.0015 × age, a regression estimate for ventilated adults",
		Terms: b.paTermsWith(
			Term{"PetCO2", et, "mm[Hg]"}, Term{"gradient", g, "mm[Hg]"},
			Term{"RR", rr, "/min"}, Term{"age", age, "a"},
		),
		Estimate: true,
		Notes:    []string{"an estimate from a regression, not a measurement"},
	})
}

// ageYears is the age in completed years at the instant at, on the
// calendar furthest west (UTC−12, [WestmostZone]): a birth date is a date
// where the patient lives, the sample's own zone is not kept, and on the
// westmost calendar the date is the earliest any local calendar shows. So
// the age is never older than at the bedside, and the adult indices are
// never computed for a patient who is 17 there; the price is an age one
// year younger for up to half a day after a birthday. Birth dates carry no
// zone; the adapter builds them at UTC midnight.
func ageYears(birth, at time.Time) int {
	b, a := birth.UTC(), at.UTC().Add(-WestmostZone)
	y := a.Year() - b.Year()
	if a.Month() < b.Month() || (a.Month() == b.Month() && a.Day() < b.Day()) {
		y--
	}
	return y
}

// union returns the kinds of a and b once each, in Kind order, so Inputs do
// not depend on the order the steps met them.
func union(a, b []Kind) []Kind {
	out := slices.Concat(a, b)
	slices.Sort(out)
	return slices.Compact(out)
}

func ptr(v float64) *float64 { return &v }

// addSat adds without wrapping, so extreme times cannot turn a window
// inside out.
func addSat(a, b int64) int64 {
	s := a + b
	if b > 0 && s < a {
		return math.MaxInt64
	}
	if b < 0 && s > a {
		return math.MinInt64
	}
	return s
}

// ClinicalDuration writes a duration as clinicians read it, in the largest
// unit that holds it whole: "5 min", "90 s", "250 ms" (a pairing window,
// a look-back, a search), where Go's own form is "5m0s".
func ClinicalDuration(d time.Duration) string {
	sign := ""
	if d < 0 {
		sign, d = "−", -d
	}
	switch {
	case d == 0:
		return "0 s"
	case d%time.Minute == 0:
		return fmt.Sprintf("%s%d min", sign, d/time.Minute)
	case d%time.Second == 0:
		return fmt.Sprintf("%s%d s", sign, d/time.Second)
	case d%time.Millisecond == 0:
		return fmt.Sprintf("%s%d ms", sign, d/time.Millisecond)
	}
	return sign + d.String()
}

// days formats whole-day durations as days, which is how people state a
// height's age.
func days(d time.Duration) string {
	const day = 24 * time.Hour
	if d > 0 && d%day == 0 {
		return fmt.Sprintf("%d days", d/day)
	}
	return d.String()
}

// DetectFalls finds end-tidal CO2 fall and rise episodes in one patient's
// EtCO2 series, sorted by AtMillis. Readings of other kinds, and readings
// outside [Plausible], are skipped. The rules, all design choices:
//
//   - The baseline at a reading is the median of the readings in the
//     Baseline before it (readings at the same instant excluded), and it
//     needs MinBaselineReadings of them; with sparse charting, the last
//     MinBaselineReadings readings within BaselineMax. No reading may be
//     more than MaxGap from the next; a series that fails this is too
//     sparse or gappy to judge ([DetectEpisodes] lists such readings).
//     Readings that belonged to an episode, confirmed or cancelled, never
//     enter the baseline, so an episode does not drag its own reference. A
//     baseline below 10 mm[Hg] is not an end-tidal baseline and is not
//     judged against.
//   - A reading is low when it is below baseline − threshold, and high when
//     it is above baseline + threshold, where
//     threshold = min(Drop, DropFraction × baseline). The first low (high)
//     reading opens a candidate fall (rise) and freezes the baseline and
//     threshold.
//   - The candidate is confirmed at the first reading at least Sustain after
//     onset, provided it has MinEpisodeReadings readings and every reading
//     from onset to it was past the threshold. A reading that is not
//     cancels it, and so does a gap of more than MaxGap between readings:
//     the episode must have been observed throughout, not inferred across a
//     silent monitor. After a cancellation the same reading is judged
//     afresh, so it may open a new candidate.
//   - A confirmed episode ends at the first reading back within
//     Recover × threshold of the baseline, on either side of it. That
//     reading joins the baseline but cannot open a new episode; the next
//     can. One episode gives one finding however long it lasts, unless a
//     change of its own takes its place (next).
//   - While a confirmed episode is open its readings form its level: the
//     median of them by the baseline's rules (the Baseline window, else the
//     last MinBaselineReadings within BaselineMax, else, right after the
//     confirmation, those that confirmed it). A reading past the threshold
//     of the level, min(Drop, DropFraction × level), opens a candidate
//     against it, as against a baseline: a further fall during a fall (a
//     further rise during a rise), or a crossing to the far side of the
//     episode's baseline past its recovery band (a fall below it during a
//     rise, a rise above it during a fall), whose readings must all stay
//     past that band too. A move back towards the baseline that stops
//     short of that is a partial recovery. Once confirmed, the candidate
//     is a finding with the level as its baseline, and takes the place of
//     the episode it opened in; cancelled, its readings join neither the
//     level nor the baseline. A reading that could not be judged (the
//     series too sparse or gappy) or that opens nothing joins the level.
//     A level below 10 mm[Hg] is not judged against.
//   - After a long episode the baseline may hold too few readings; no new
//     episode opens until it has MinBaselineReadings again.
//
// A finding depends only on readings up to its confirmation, so running
// over the whole series or over any prefix that includes the confirmation
// gives the same finding: a streaming caller may simply re-run it as
// readings arrive.
func DetectFalls(cfg FallConfig, series []Reading) []Fall {
	falls, _ := detectFalls(cfg, series)
	return falls
}

// DetectEpisodes is [DetectFalls] that also returns the readings it could
// not judge because the series was too sparse or gappy, each with
// [ReasonTooSparse], so that a reviewer sees why no finding was possible.
func DetectEpisodes(cfg FallConfig, series []Reading) ([]Fall, []Omission) {
	return detectFalls(cfg, series)
}
