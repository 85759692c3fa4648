package derive

import (
	"fmt"
	"math"
	"slices"
	"sort"
	"time"
)

// SubstitutePriority is the code-table priority below which a source is a
// substitute for the quantity an equation needs: a set tidal volume, an
// inspired minute volume, a mechanical-only or spontaneous-only rate, an
// end-tidal CO2 converted from a percentage. The default code table (package
// fhir/codes) gives measured values 20 or 30 and substitutes 10 or 15; a
// site table that adds rows keeps to the same scale. A priority of 0 or
// less means none was given and is never disclosed as a substitute.
const SubstitutePriority = 20

// sameSample is how close in time a temperature-adjusted PaCO2 must be to
// the blood gas to be taken as the same sample. Both come from one analyser
// run and normally carry the same effective time; the minute allows for a
// feed that stamps them separately. A design choice.
const sameSample = time.Minute

// minPaCO2 is the lowest arterial PCO2, in mm[Hg], taken as a value in
// mm[Hg]. Below it, a number is only plausible in kPa (a PaCO2 of 5.3 kPa is
// 40 mm[Hg]). A design choice, from memory: PaCO2 around 13 mm[Hg] has been
// measured in climbers at extreme altitude and in severe metabolic
// acidosis, and nothing lower is usual in a living patient. A kPa value of
// 10 to 20 labelled mm[Hg] cannot be told apart by its size and passes.
const minPaCO2 = 10.0

// minPaCO2KPa is the lowest number read as a PaCO2 in kPa labelled
// mm[Hg]: 1 kPa is 7.5 mm[Hg], below anything measured in a living patient.
const minPaCO2KPa = 1.0

// CheckValue says whether v can be a value of kind k in its canonical unit.
// It returns "" when it can, [ReasonWrongUnit] when the value is only
// plausible in another unit (an arterial PCO2 from 1 to 10 "mm[Hg]", a body
// temperature in °F labelled Cel), and [ReasonImplausible] when it is
// outside the physiological range of the kind. The detail says which.
// End-tidal CO2 in the wrong unit is judged over a window of readings, not
// one at a time: a single low reading may be a disconnection.
func CheckValue(k Kind, v float64) (Reason, string) {
	ok, lo, hi := Plausible(k, v)
	if ok {
		return "", ""
	}
	switch {
	case (k == KindPaCO2 || k == KindPaCO2Adjusted) && v >= minPaCO2KPa && v < minPaCO2:
		return ReasonWrongUnit, fmt.Sprintf("%s %v mm[Hg] is below %v mm[Hg]: only plausible in kPa (%.4g kPa is %.3g mm[Hg])",
			k, v, minPaCO2, v, v*kPaToMMHg)
	case k == KindBodyTemperature && v >= 77 && v <= 113:
		return ReasonWrongUnit, fmt.Sprintf("body temperature %v Cel is only plausible in °F", v)
	}
	return ReasonImplausible, fmt.Sprintf("%s %v %s is outside %v–%v", k, v, k.Unit(), lo, hi)
}

// kPaToMMHg converts kPa to mm[Hg] for details only (1 kPa = 7.500616
// mm[Hg]); conversion proper is the adapter's job.
const kPaToMMHg = 7.500616

// etco2KPaBand is where a whole window of end-tidal readings sits when they
// are kPa labelled mm[Hg]: 2.5–10 kPa covers end-tidal CO2 from 19 to 75
// mm[Hg]. A design choice.
var etco2KPaBand = [2]float64{2.5, 10}

// windowedKinds are the kinds summarised over the pairing window, in Kind
// order. Height is chosen differently: it changes slowly and is measured
// rarely; temperature and the temperature-adjusted PaCO2 too (see
// [builder.temperature]).
var windowedKinds = [...]Kind{
	KindEtCO2, KindMixedExpiredCO2, KindVCO2, KindTidalVolume, KindMinuteVolume, KindRespRate,
}

func isWindowed(k Kind) bool { return slices.Contains(windowedKinds[:], k) }

// preferred keeps the readings of the highest priority among rs (one kind,
// one window) and records the others as left out. It returns the kept
// readings and, when their priority is below [SubstitutePriority], a
// sentence saying which source was used and why.
func (b *builder) preferred(k Kind, rs []Reading) ([]Reading, string) {
	best := rs[0].Priority
	for _, r := range rs {
		best = max(best, r.Priority)
	}
	kept := rs[:0:0]
	for _, r := range rs {
		if r.Priority < best {
			b.d.Omitted = append(b.d.Omitted, Omission{Ref: r.Ref, Reason: ReasonLowerPriority,
				Detail: fmt.Sprintf("%s of priority %d; priority %d was present in the same window", k, r.Priority, best)})
			continue
		}
		kept = append(kept, r)
	}
	if best >= SubstitutePriority || best <= 0 { // 0: no priority given, as for a caller without a code table
		return kept, ""
	}
	return kept, fmt.Sprintf("%s is from a lower-priority source (%s, code-table priority %d), used because no measured %s was within ±%s of the sample time%s",
		k, substituteName(k, sourceOf(kept)), best, k, ClinicalDuration(b.window), substituteRisk(k))
}

// sourceOf is the source of readings of one kind and priority: the one
// they share, else (rows of one priority that name different sources)
// [SourceUnspecified].
func sourceOf(rs []Reading) Source {
	s := rs[0].SourceKind()
	for _, r := range rs[1:] {
		if r.SourceKind() != s {
			return SourceUnspecified
		}
	}
	return s
}

// substituteName says what a low-priority source of kind k is, by the
// source its code-table row names (see [Reading.SourceKind]), never by its
// priority number.
func substituteName(k Kind, s Source) string {
	switch s {
	case SourceSet:
		switch k {
		case KindTidalVolume:
			return "a set tidal volume"
		case KindMinuteVolume:
			return "a set minute volume"
		case KindRespRate:
			return "a set rate"
		}
		return "a ventilator setting"
	case SourceInspired:
		switch k {
		case KindTidalVolume:
			return "a delivered (inspired) tidal volume"
		case KindMinuteVolume:
			return "an inspired minute volume"
		}
		return "an inspired value"
	case SourcePartialRate:
		return "a mechanical-only or spontaneous-only rate"
	case SourceConvertedPercent:
		return "a CO2 percentage converted with an assumed barometric pressure"
	case SourceMeasured:
		return "another measured " + k.String()
	}
	return "sources of this priority that differ in kind"
}

// substituteRisk says what the substitute does to the values; from the
// leak caveat (common practice).
func substituteRisk(k Kind) string {
	switch k {
	case KindTidalVolume, KindMinuteVolume:
		return "; it overstates the expired volume when there is a leak"
	case KindRespRate:
		return "; it misses the other breaths"
	}
	return ""
}

// inspiredSide reports whether s is a source a leak is judged against: a
// delivered or inspired volume, or a setting.
func inspiredSide(s Source) bool { return s == SourceInspired || s == SourceSet }

// leak compares, in one window, the measured volume of kind k (the
// readings of the highest priority present, at or above
// [SubstitutePriority]) with the inspired side: the delivered, inspired or
// set readings (their source, [Reading.SourceKind]) of the highest
// priority among them. Each measured reading is compared with the
// inspired-side reading in effect at its time: the latest one at or before
// it in the window (settings are charted when they change, so a setting
// holds until the next one; a measured reading before the window's first
// one is not compared). The loss is the median of the relative
// differences (inspired − measured)/inspired, judged as the note writes
// it, in per cent to one decimal. When it is more than cfg.LeakFraction,
// gas is lost between the two (a cuff or circuit leak, a bronchopleural
// fistula): the expired volumes and end-tidal CO2 read low, so every value
// computed from a volume or from end-tidal CO2 carries a note (a leak above
// about 10 %, from memory). A leak seen on either volume concerns the whole circuit, so the
// note goes on values from the other volume too. A set tidal volume counts
// as the inspired one, as it is in a volume-controlled mode.
func (b *builder) leak(cfg Config, k Kind, rs []Reading) {
	var best, sub int16
	for _, r := range rs {
		best = max(best, r.Priority)
		if r.Priority > 0 && r.Priority < SubstitutePriority && inspiredSide(r.SourceKind()) {
			sub = max(sub, r.Priority)
		}
	}
	if best < SubstitutePriority || sub == 0 {
		return
	}
	// rs is in time order: the inspired-side reading in effect at a
	// measured one is the last of insp at or before it.
	var insp []Reading
	for _, r := range rs {
		if r.Priority == sub && inspiredSide(r.SourceKind()) {
			insp = append(insp, r)
		}
	}
	var (
		inEffect          Reading
		sources           [sourceCount]bool
		losses, ins, outs []float64
	)
	j := 0
	for _, r := range rs {
		if r.Priority != best {
			continue
		}
		for ; j < len(insp) && insp[j].AtMillis <= r.AtMillis; j++ {
			inEffect = insp[j]
		}
		if j == 0 || !(inEffect.Value > 0) {
			continue // no inspired-side reading yet in the window
		}
		losses = append(losses, (inEffect.Value-r.Value)/inEffect.Value)
		ins, outs = append(ins, inEffect.Value), append(outs, r.Value)
		sources[inEffect.SourceKind()] = true
	}
	if len(losses) == 0 {
		return
	}
	lost := Median(losses)
	if !(asWritten(100*lost, 1) > 100*cfg.LeakFraction) {
		return
	}
	in, out := Median(ins), Median(outs)
	unit, name := "L/min", "minute volume"
	if k == KindTidalVolume {
		unit, name = "mL", "tidal volume"
	}
	side := substituteSide(k, sources)
	what := fmt.Sprintf("the measured %s %.3g %s is %.1f %% below the %s one in effect at its time (%.3g %s)", name, out, unit, 100*lost, side, in, unit)
	if len(losses) > 1 {
		what = fmt.Sprintf("the measured %s (median %.3g %s) is %.1f %% below the %s one in effect at each reading (median %.3g %s; median of %d comparisons)",
			name, out, unit, 100*lost, side, in, unit, len(losses))
	}
	if b.leakNote == "" {
		b.leakNote = "possible leak (cuff, circuit or bronchopleural): " + what +
			" in the pairing window; expired volumes and end-tidal CO2 then read low, so this value is unreliable"
	} else {
		b.leakNote += "; also " + what
	}
	b.leakTerms = append(b.leakTerms, Term{"inspired " + name, in, unit}, Term{"measured " + name, out, unit},
		Term{"measured below inspired " + name, asWritten(100*lost, 1), "%"})
}

// substituteSide names the inspired side of kind k by the sources
// compared with.
func substituteSide(k Kind, sources [sourceCount]bool) string {
	switch {
	case sources[SourceSet] && sources[SourceInspired]:
		if k == KindTidalVolume {
			return "delivered or set"
		}
		return "inspired or set"
	case sources[SourceSet]:
		return "set"
	case k == KindTidalVolume:
		return "delivered"
	}
	return "inspired"
}

// artefacts leaves out end-tidal readings that cannot be the patient's
// end-tidal value at that moment, records each, and returns the usable
// readings. ok is false when too few are left; why then says so.
func (b *builder) artefacts(cfg ArtefactConfig, rs []Reading) (usable []Reading, n int, why string) {
	var above []float64
	for _, r := range rs {
		if r.Value >= cfg.Floor {
			above = append(above, r.Value)
		}
	}
	ref := Median(above) // NaN when none: then every reading is below Floor
	for _, r := range rs {
		var detail string
		switch {
		case r.Value < cfg.Floor:
			detail = fmt.Sprintf("etco2 %v mm[Hg] is below %v mm[Hg]: no expired gas at the sensor (disconnection, suctioning, an occluded sampling line)", r.Value, cfg.Floor)
		case r.Value < cfg.Fraction*ref:
			detail = fmt.Sprintf("etco2 %v mm[Hg] is below %v × the window's median %v mm[Hg]", r.Value, cfg.Fraction, ref)
		default:
			usable = append(usable, r)
			continue
		}
		n++
		b.d.Omitted = append(b.d.Omitted, Omission{Ref: r.Ref, Reason: ReasonArtefact, Detail: detail})
	}
	if n > 0 && float64(len(usable)) < cfg.MinUsableFraction*float64(len(rs)) {
		why = fmt.Sprintf("%d of %d etco2 readings within ±%s of the sample time were artefacts; at least %v of them must be usable",
			n, len(rs), ClinicalDuration(b.window), cfg.MinUsableFraction)
		return nil, n, why
	}
	return usable, n, ""
}

// etco2InKPa reports whether a window of end-tidal readings looks like kPa
// labelled mm[Hg]: every reading inside [etco2KPaBand] while the arterial
// PCO2 is a plausible mm[Hg] value far above them, at least
// etco2KPaRatio times the highest. The test is relative, not a fixed
// PaCO2: a normal PaCO2 of 5.3 kPa (39.75 mm[Hg]) beside end-tidal
// readings of 5 in kPa is the same mix-up as at 40 mm[Hg]. A
// disconnection reads near zero, below the band.
func etco2InKPa(rs []Reading, pa float64) bool {
	if len(rs) == 0 {
		return false
	}
	highest := 0.0
	for _, r := range rs {
		if r.Value < etco2KPaBand[0] || r.Value > etco2KPaBand[1] {
			return false
		}
		highest = max(highest, r.Value)
	}
	return pa >= etco2KPaRatio*highest
}

// etco2KPaRatio is how far above every end-tidal reading in the kPa band
// the arterial PCO2 must be for the window to be taken as kPa: PaCO2 four
// times the end-tidal CO2 would be an alveolar dead-space fraction of 0.75
// or more if both were mm[Hg], while kPa read as mm[Hg] gives about 7.5
// times. A design choice; with the band's top (10) it asks for a PaCO2 of
// 40, the fixed cut-off it replaces.
const etco2KPaRatio = 4

// steady compares minute volume and end-tidal CO2 in the pairing window
// with their level in the Lookback before it. It returns a note and the
// figures when either changed materially, and nothing otherwise.
func (b *builder) steady(cfg Config, readings []Reading) (string, []Term) {
	t := b.d.Gas.AtMillis
	to := addSat(t, -cfg.Window.Milliseconds())
	from := addSat(to, -cfg.Steady.Lookback.Milliseconds())
	var earlier [kindCount][]float64
	i := sort.Search(len(readings), func(i int) bool { return readings[i].AtMillis >= from })
	for ; i < len(readings) && readings[i].AtMillis < to; i++ {
		r := readings[i]
		if r.Kind != KindMinuteVolume && r.Kind != KindEtCO2 {
			continue
		}
		if ok, _, _ := Plausible(r.Kind, r.Value); !ok || (r.Kind == KindEtCO2 && r.Value < cfg.Artefact.Floor) {
			continue
		}
		if r.Kind == KindMinuteVolume && r.Priority != b.priority[KindMinuteVolume] {
			continue // compare like with like
		}
		earlier[r.Kind] = append(earlier[r.Kind], r.Value)
	}
	var terms []Term
	var changes []string
	if b.have[KindMinuteVolume] && len(earlier[KindMinuteVolume]) > 0 {
		was, now := Median(earlier[KindMinuteVolume]), b.med[KindMinuteVolume]
		rel := (now - was) / was
		if math.Abs(rel) >= cfg.Steady.MinuteVolumeChange {
			changes = append(changes, fmt.Sprintf("minute volume changed from %.3g to %.3g L/min (%+.0f %%)", was, now, 100*rel))
			terms = append(terms, Term{"VE before the window", was, "L/min"}, Term{"VE in the window", now, "L/min"})
		}
	}
	if b.have[KindEtCO2] && len(earlier[KindEtCO2]) > 0 {
		was, now := Median(earlier[KindEtCO2]), b.med[KindEtCO2]
		if math.Abs(now-was) >= cfg.Steady.EtCO2Change {
			changes = append(changes, fmt.Sprintf("end-tidal CO2 changed from %.3g to %.3g mm[Hg] (%+.3g)", was, now, now-was))
			terms = append(terms, Term{"PetCO2 before the window", was, "mm[Hg]"}, Term{"PetCO2 in the window", now, "mm[Hg]"})
		}
	}
	if len(changes) == 0 {
		return "", nil
	}
	note := fmt.Sprintf("not at steady state: %s in the %s before the pairing window; the Enghoff and Bohr equations assume steady ventilation, so read this value with care",
		join(changes), ClinicalDuration(cfg.Steady.Lookback))
	return note, terms
}

func join(parts []string) string {
	switch len(parts) {
	case 0:
		return ""
	case 1:
		return parts[0]
	}
	out := parts[0]
	for _, p := range parts[1 : len(parts)-1] {
		out += ", " + p
	}
	return out + " and " + parts[len(parts)-1]
}

// TemperatureAdjusted returns PCO2 at temperature tempC (°C) from the value
// measured at 37 °C: PCO2(T) = PCO2(37) × 10^(coefficient × (T − 37)).
// The coefficient 0.019 per °C is the published in-vitro temperature
// coefficient of blood PCO2 (J Appl Physiol 1965: "Pco2 (hot)/Pco2 (cold)
// equal to 10 to the power of 0.019 x temperature difference").
func TemperatureAdjusted(pco2at37, tempC, coefficient float64) float64 {
	return pco2at37 * math.Pow(10, coefficient*(tempC-37))
}

// temperature decides the PaCO2 the equations use: a reported
// temperature-adjusted PaCO2 of the same sample when there is one (one
// reported on this blood gas itself, or a separate one within
// [sameSample]; never one reported on another blood gas), else the
// 37 °C value adjusted to the nearest body temperature within Search, else
// the value as reported. It records the readings it used in Used.
func (b *builder) temperature(cfg Config, readings []Reading) {
	b.pa = b.d.Gas.Value
	t := b.d.Gas.AtMillis
	nearest := func(k Kind, span time.Duration) (Reading, bool) {
		from, to := addSat(t, -span.Milliseconds()), addSat(t, span.Milliseconds())
		var best Reading
		found := false
		i := sort.Search(len(readings), func(i int) bool { return readings[i].AtMillis >= from })
		for ; i < len(readings) && readings[i].AtMillis <= to; i++ {
			r := readings[i]
			if r.Kind != k || !b.plausible(r) {
				continue
			}
			if k == KindPaCO2Adjusted && r.Ref != b.d.Gas.Ref {
				if onAnotherGas(readings, r) {
					continue // another sample's own value
				}
				nearer, tie := otherSampleNearer(b.d.Gas, readings, r)
				if nearer {
					continue // nearer another blood gas: that sample's
				}
				if tie {
					b.ambiguous(r)
					continue
				}
			}
			if !found || absInt(r.AtMillis-t) < absInt(best.AtMillis-t) ||
				(absInt(r.AtMillis-t) == absInt(best.AtMillis-t) && r.Priority > best.Priority) {
				best, found = r, true
			}
		}
		return best, found
	}
	temp, haveTemp := nearest(KindBodyTemperature, cfg.Temperature.Search)
	if adj, ok := nearest(KindPaCO2Adjusted, sameSample); ok {
		b.pa, b.paAdjusted = adj.Value, true
		rule := fmt.Sprintf("temperature-adjusted PaCO2 reported for the same sample (within ±%s), preferred to the 37 °C value", ClinicalDuration(sameSample))
		if adj.Ref == b.d.Gas.Ref {
			// The decoder gives an adjusted value reported on the blood
			// gas itself (a component) the gas's own reference and time.
			rule = "temperature-adjusted PaCO2 reported on the blood gas itself, preferred to the 37 °C value"
		}
		b.paUsed = append(b.paUsed, Summary{Kind: KindPaCO2Adjusted, Median: adj.Value, Readings: []Reading{adj}, Rule: rule})
		b.paTerms = []Term{{"PaCO2 at 37 °C", b.d.Gas.Value, "mm[Hg]"}, {"PaCO2 at patient temperature (reported)", adj.Value, "mm[Hg]"}}
		b.paNote = fmt.Sprintf("PaCO2 at the patient's temperature as reported by the analyser (%v mm[Hg]; %v mm[Hg] at 37 °C)", adj.Value, b.d.Gas.Value)
		return
	}
	if !haveTemp {
		return
	}
	rule := fmt.Sprintf("body temperature nearest the sample time, within ±%s", ClinicalDuration(cfg.Temperature.Search))
	if temp.Ref == b.d.Gas.Ref {
		// The decoder gives a temperature entered on the blood gas itself
		// the gas's own reference and time.
		rule = "patient temperature reported on the blood gas itself"
	}
	b.paUsed = append(b.paUsed, Summary{Kind: KindBodyTemperature, Median: temp.Value, Readings: []Reading{temp}, Rule: rule})
	if math.Abs(temp.Value-37) <= cfg.Temperature.Tolerance {
		b.paTerms = []Term{{"body temperature", temp.Value, "Cel"}}
		return
	}
	b.pa = TemperatureAdjusted(b.d.Gas.Value, temp.Value, cfg.Temperature.Coefficient)
	b.paAdjusted = true
	b.paTerms = []Term{{"PaCO2 at 37 °C", b.d.Gas.Value, "mm[Hg]"}, {"body temperature", temp.Value, "Cel"}, {"PaCO2 at patient temperature", b.pa, "mm[Hg]"}}
	b.paNote = fmt.Sprintf("PaCO2 adjusted from 37 °C to the patient's %v °C: PCO2(T) = PCO2(37) × 10^(%v × (T − 37)) (temperature coefficient of PCO2 of blood in vitro, J Appl Physiol 1965), %v → %.1f mm[Hg]",
		temp.Value, cfg.Temperature.Coefficient, b.d.Gas.Value, b.pa)
}

// ambiguous records that the separate temperature-adjusted PaCO2 r was
// as near another blood gas's sample time as this one's, so it was not
// used: an omission of r, and a note on every value computed from the
// PaCO2.
func (b *builder) ambiguous(r Reading) {
	off := ClinicalDuration(time.Duration(absInt(r.AtMillis-b.d.Gas.AtMillis)) * time.Millisecond)
	b.d.Omitted = append(b.d.Omitted, Omission{Ref: r.Ref, Reason: ReasonSampleAmbiguous,
		Detail: fmt.Sprintf("a temperature-adjusted PaCO2 %v mm[Hg] %s from two blood gases: it belongs to one sample, and which cannot be told, so neither uses it", r.Value, off)})
	b.paAmbiguous = fmt.Sprintf("a temperature-adjusted PaCO2 reported separately (%v mm[Hg]) was %s from this blood gas and from another one, within ±%s of both: which sample it belongs to cannot be told, so it was not used",
		r.Value, off, ClinicalDuration(sameSample))
}

// onAnotherGas reports whether r was reported on a blood gas of readings
// (a component: the decoder gives it the gas's reference and time). Such
// a value belongs to that sample only, and another blood gas, however
// close in time, never takes it as its own.
func onAnotherGas(readings []Reading, r Reading) bool {
	i := sort.Search(len(readings), func(i int) bool { return readings[i].AtMillis >= r.AtMillis })
	for ; i < len(readings) && readings[i].AtMillis == r.AtMillis; i++ {
		if readings[i].Kind == KindPaCO2 && readings[i].Ref == r.Ref {
			return true
		}
	}
	return false
}

func absInt(v int64) int64 {
	if v < 0 {
		return -v
	}
	return v
}

// DependencySpan returns the span of input time a blood gas sampled at
// sample depends on: a reading outside [from, to] cannot change its
// derivation. It covers the pairing window (±Window), the steady-state
// look-back (Window + Steady.Lookback before the sample), the
// temperature search (±Temperature.Search) and the blood gases that may
// take a separate temperature-adjusted PaCO2 instead (±2 min). Two kinds of input are outside
// it on purpose: body height, which is looked for up to HeightMaxAge back,
// and the Patient's facts; a caller re-derives every blood gas of a patient
// when either changes. Fall and rise findings depend on the whole series
// before their confirmation, not on this span.
func (c Config) DependencySpan(sample time.Time) (from, to time.Time) {
	back := max(c.Window+c.Steady.Lookback, c.Temperature.Search, c.Window, 2*sameSample)
	ahead := max(c.Window, c.Temperature.Search, 2*sameSample)
	return sample.Add(-back), sample.Add(ahead)
}

// Reach returns how far before a reading's own time the sample time of a
// blood gas it can change may lie: a reading of kind k taken at t leaves
// the derivation of every blood gas sampled before t − Reach(k) as it is
// (DependencySpan's "ahead" part, for one kind). A live caller re-derives
// only the blood gases sampled from then on, so a new end-tidal reading
// does not drag in the hour a body temperature can reach. Readings after
// a blood gas reach it through the pairing window; body temperature
// through its wider search; a temperature-adjusted PaCO2 only the sample
// it belongs to. A blood gas changes its own derivation, that of another
// report of its sample (the same time), and that of a blood gas up to two
// same-sample spans away, which a separate temperature-adjusted PaCO2
// between them may belong to instead. Body height is
// looked for a year back and the caller treats it as a change to the
// whole patient; so is a kind this package does not know.
func (c Config) Reach(k Kind) time.Duration {
	earlier, _ := c.reaches(k)
	return earlier
}

// ReachLater is Reach's other side: how far after a reading's own time
// the sample time of a blood gas it can change may lie (DependencySpan's
// "back" part, for one kind). A reading of kind k taken at t leaves the
// derivation of every blood gas sampled after t + ReachLater(k) as it is,
// so a live caller re-derives only the blood gases sampled in
// [t − Reach(k), t + ReachLater(k)], and a late reading does not re-derive
// every blood gas since. Readings before a blood gas reach it through the
// pairing window; minute volume and end-tidal CO2 also through the
// steady-state look-back before the window; body temperature through its
// search; a temperature-adjusted PaCO2 only the sample it belongs to. A
// blood gas reaches as far as in Reach. Body height and a kind this
// package does not know are as in Reach.
func (c Config) ReachLater(k Kind) time.Duration {
	_, later := c.reaches(k)
	return later
}

// reaches returns [Config.Reach] and [Config.ReachLater] of k, side by
// side so that a kind's two reaches are read together.
func (c Config) reaches(k Kind) (earlier, later time.Duration) {
	switch {
	case k == KindPaCO2:
		// Another blood gas at the same time is the same sample; one
		// within twice sameSample can take (or tie for) a separate
		// temperature-adjusted PaCO2 between the two.
		return 2 * sameSample, 2 * sameSample
	case k == KindEtCO2 || k == KindMinuteVolume:
		return c.Window, c.Window + c.Steady.Lookback
	case isWindowed(k):
		return c.Window, c.Window
	case k == KindPaCO2Adjusted:
		return sameSample, sameSample
	case k == KindBodyTemperature:
		return c.Temperature.Search, c.Temperature.Search
	}
	return c.MaxReach(), c.MaxReachLater()
}

// MaxReachLater is the largest [Config.ReachLater] over every kind that is
// not a whole-patient change.
func (c Config) MaxReachLater() time.Duration {
	from, _ := c.DependencySpan(time.Time{})
	return time.Time{}.Sub(from)
}

// MaxReach is the largest [Config.Reach] over every kind that is not a
// whole-patient change: how far back a change of unknown kind (a version
// replaced by one of another code, say) can reach.
func (c Config) MaxReach() time.Duration {
	_, to := c.DependencySpan(time.Time{})
	return to.Sub(time.Time{})
}

// PreferredSeries keeps, from one patient's readings of one kind sorted by
// time, those with no higher-priority reading of the same kind within
// ±window: the per-window source priority of [Derive], applied to a series
// (the fall and rise detector's end-tidal series). It returns the kept
// readings and an omission with [ReasonLowerPriority] for each other one.
func PreferredSeries(window time.Duration, series []Reading) ([]Reading, []Omission) {
	if len(series) == 0 || !slices.ContainsFunc(series, func(r Reading) bool { return r.Priority != series[0].Priority }) {
		return series, nil // one source: the usual case, and per-second series stay linear
	}
	w := window.Milliseconds()
	kept := make([]Reading, 0, len(series))
	var omitted []Omission
	lo := 0
	for i, r := range series {
		for lo < len(series) && series[lo].AtMillis < addSat(r.AtMillis, -w) {
			lo++
		}
		better := false
		for j := lo; j < len(series) && series[j].AtMillis <= addSat(r.AtMillis, w); j++ {
			if j != i && series[j].Kind == r.Kind && series[j].Priority > r.Priority {
				better = true
				break
			}
		}
		if better {
			omitted = append(omitted, Omission{Ref: r.Ref, Reason: ReasonLowerPriority,
				Detail: fmt.Sprintf("%s of priority %d; a higher-priority reading was within ±%s", r.Kind, r.Priority, ClinicalDuration(window))})
			continue
		}
		kept = append(kept, r)
	}
	return kept, omitted
}
