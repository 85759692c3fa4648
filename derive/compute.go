package derive

import (
	"errors"
	"fmt"
	"math"
	"slices"
	"sort"
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
//   - Fall: a 30 min trailing baseline of at least 5 readings; a reading is
//     fallen when it is 8 mm[Hg] or 25 % below baseline, whichever is
//     smaller (so a low baseline still gives a proportionate threshold); the
//     fall must last 3 min, long enough to pass over suction, a sigh or a
//     brief sampling artefact; and it ends when a reading is back within
//     half the threshold of the baseline, a hysteresis that keeps a value
//     hovering at the threshold from producing a stream of findings.
func DefaultConfig() Config {
	return Config{
		Window:       5 * time.Minute,
		HeightMaxAge: 365 * 24 * time.Hour,
		Fall: FallConfig{
			Baseline:            30 * time.Minute,
			MinBaselineReadings: 5,
			Drop:                8,
			DropFraction:        0.25,
			Sustain:             3 * time.Minute,
			Recover:             0.5,
		},
	}
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
	if err := errors.Join(errs...); err != nil {
		return fmt.Errorf("derive config: %w", err)
	}
	return nil
}

// plausibleRange holds the physiological range of each kind, inclusive.
// These are design choices, wide enough for any live patient (a neonate's
// height, an exercising adult's minute volume) and narrow enough to catch a
// wrong unit, such as kPa read as mm[Hg] or mL as L. The range rules we know
// of are from memory, so nothing here is a published limit.
// EtCO2 includes 0 on purpose: a disconnected circuit reads 0 and the fall
// detector must see it.
var plausibleRange = [kindCount]struct {
	lo, hi float64
	known  bool
}{
	KindPaCO2:           {5, 200, true},
	KindEtCO2:           {0, 150, true},
	KindMixedExpiredCO2: {0.5, 150, true},
	KindVCO2:            {20, 2000, true},
	KindTidalVolume:     {20, 3000, true},
	KindMinuteVolume:    {0.5, 60, true},
	KindRespRate:        {1, 100, true},
	KindHeight:          {40, 250, true},
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

// windowedKinds are the kinds summarised over the pairing window, in Kind
// order. Height is chosen differently: it changes slowly and is measured
// rarely.
var windowedKinds = [...]Kind{
	KindEtCO2, KindMixedExpiredCO2, KindVCO2, KindTidalVolume, KindMinuteVolume, KindRespRate,
}

func isWindowed(k Kind) bool { return slices.Contains(windowedKinds[:], k) }

// Derive computes every value it can for one blood gas. readings are the
// same patient's accepted readings of any kind, sorted by AtMillis; readings
// of KindPaCO2 are ignored. The pairing uses only AtMillis, which the adapter
// sets from the physiological (sample) time, never from when a result was
// reported.
//
// A reading outside [Plausible] is not used and is listed in Omitted with
// [ReasonImplausible]; the adapters should already have removed such
// readings, this is a second line of defence. Every value that is not
// emitted is listed in Omitted with its reason, so the output always
// accounts for every [Code] except [CodeEtCO2Drop], which [DetectFalls]
// produces.
func Derive(cfg Config, gas Reading, patient Patient, readings []Reading) Derivation {
	b := builder{
		d:      Derivation{Gas: gas, Patient: patient},
		window: cfg.Window,
	}
	b.collect(cfg, readings)
	b.values()
	return b.d
}

// builder carries one derivation's state between its steps.
type builder struct {
	d      Derivation
	window time.Duration

	med  [kindCount]float64
	have [kindCount]bool

	heightWhy string // why no height was found, when none was

	paOK  bool
	paWhy string

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
		rs := byKind[k]
		if len(rs) == 0 {
			continue
		}
		vals := make([]float64, len(rs))
		for j, r := range rs {
			vals[j] = r.Value
		}
		m := Median(vals)
		b.med[k], b.have[k] = m, true
		rule := fmt.Sprintf("median of %d readings within ±%v of sample time", len(rs), cfg.Window)
		if len(rs) == 1 {
			rule = fmt.Sprintf("the only reading within ±%v of sample time", cfg.Window)
		}
		b.d.Used = append(b.d.Used, Summary{Kind: k, Median: m, Readings: rs, Rule: rule})
	}

	var lo, hi float64
	b.paOK, lo, hi = Plausible(KindPaCO2, b.d.Gas.Value)
	if !b.paOK {
		b.paWhy = fmt.Sprintf("PaCO2 %v mm[Hg] is outside %v–%v", b.d.Gas.Value, lo, hi)
		b.d.Omitted = append(b.d.Omitted, Omission{Ref: b.d.Gas.Ref, Reason: ReasonImplausible, Detail: b.paWhy})
	}
}

// plausible checks r and records it as omitted when it is not.
func (b *builder) plausible(r Reading) bool {
	ok, lo, hi := Plausible(r.Kind, r.Value)
	if !ok {
		b.d.Omitted = append(b.d.Omitted, Omission{
			Ref:    r.Ref,
			Reason: ReasonImplausible,
			Detail: fmt.Sprintf("%s %v %s is outside %v–%v", r.Kind, r.Value, r.Kind.Unit(), lo, hi),
		})
	}
	return ok
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
			return r, fmt.Sprintf("first body height within %v after sample time (none in the %s before)", cfg.Window, days(cfg.HeightMaxAge)), true
		}
	}
	b.heightWhy = fmt.Sprintf("no body height in the %s before the sample time or within %v after", days(cfg.HeightMaxAge), cfg.Window)
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
	b.d.Values = append(b.d.Values, v)
	return true
}

// need checks that the PaCO2 (when pa) and the windowed kinds are available,
// and records an omission naming everything missing when they are not.
func (b *builder) need(c Code, pa bool, kinds ...Kind) bool {
	var missing []string
	for _, k := range kinds {
		if !b.have[k] {
			missing = append(missing, k.String())
		}
	}
	switch {
	case pa && !b.paOK && len(missing) > 0:
		b.omit(c, ReasonMissingInput, "%s; and no %s reading within ±%v of the sample time", b.paWhy, strings.Join(missing, ", "), b.window)
	case pa && !b.paOK:
		b.omit(c, ReasonMissingInput, "%s", b.paWhy)
	case len(missing) > 0:
		b.omit(c, ReasonMissingInput, "no %s reading within ±%v of the sample time", strings.Join(missing, ", "), b.window)
	default:
		return true
	}
	return false
}

// inFraction is the bound every dead-space fraction must meet.
func inFraction(f float64) bool { return f >= 0 && f < 1 }

func (b *builder) values() {
	pa := b.d.Gas.Value
	et := b.med[KindEtCO2]

	// 1. Arterial to end-tidal gradient.
	if b.need(CodeGradient, true, KindEtCO2) {
		g := Gradient(pa, et)
		v := Value{
			Code: CodeGradient, Value: g, Unit: "mm[Hg]",
			Inputs:   []Kind{KindPaCO2, KindEtCO2},
			Equation: "PaCO2 − PetCO2 (Malley WJ, Clinical Blood Gases, 2nd ed., 2005)",
			Terms:    []Term{{"PaCO2", pa, "mm[Hg]"}, {"PetCO2", et, "mm[Hg]"}},
			Flag:     FlagNormal,
			Range:    &Range{High: ptr(5), Text: "normally below 5 mm[Hg]", Source: "common practice; Malley WJ, Clinical Blood Gases, 2005"},
		}
		if g >= 5 {
			v.Flag = FlagHigh
		}
		if g < 0 {
			v.Notes = append(v.Notes, "end-tidal above arterial PCO2 occurs with low V/Q units (Malley 2005) but suggests a timing or sampling error")
		}
		b.emit(v)
	}

	// 2. End-tidal alveolar dead-space fraction.
	if b.need(CodeAlveolarFraction, true, KindEtCO2) {
		f := AlveolarFraction(pa, et)
		switch {
		case f < 0:
			b.omit(CodeAlveolarFraction, ReasonFractionBounds, "PetCO2 %v above PaCO2 %v mm[Hg] gives %v; see the gradient's note", et, pa, f)
		case !inFraction(f):
			b.omit(CodeAlveolarFraction, ReasonFractionBounds, "PetCO2 %v mm[Hg] gives %v, outside [0, 1)", et, f)
		default:
			b.emit(Value{
				Code: CodeAlveolarFraction, Value: f, Unit: "1",
				Inputs:   []Kind{KindPaCO2, KindEtCO2},
				Equation: "(PaCO2 − PetCO2)/PaCO2, end-tidal alveolar dead-space fraction (name: Bhalla AK et al., Respir Care 2015;60:1548)",
				Terms:    []Term{{"PaCO2", pa, "mm[Hg]"}, {"PetCO2", et, "mm[Hg]"}},
			})
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

func (b *builder) mixedExpired() {
	if b.have[KindMixedExpiredCO2] {
		b.pe, b.peOK = b.med[KindMixedExpiredCO2], true
		b.peInputs = []Kind{KindMixedExpiredCO2}
		b.peTerms = []Term{{"PĒCO2", b.pe, "mm[Hg]"}}
		b.omit(CodeMixedExpiredCO2, ReasonNotApplicable, "PĒCO2 was measured within ±%v of the sample time", b.window)
		return
	}
	if !b.have[KindVCO2] || !b.have[KindMinuteVolume] {
		var missing []string
		for _, k := range []Kind{KindVCO2, KindMinuteVolume} {
			if !b.have[k] {
				missing = append(missing, k.String())
			}
		}
		b.omit(CodeMixedExpiredCO2, ReasonMissingInput, "no measured PĒCO2, and no %s reading within ±%v of the sample time", strings.Join(missing, ", "), b.window)
		return
	}
	vco2, ve := b.med[KindVCO2], b.med[KindMinuteVolume]
	pe := MixedExpiredFromVCO2(vco2, ve)
	if ok, lo, hi := Plausible(KindMixedExpiredCO2, pe); !ok {
		b.peBad = fmt.Sprintf("0.863 × VCO2 %v / VE %v gives PĒCO2 %v mm[Hg], outside %v–%v; suspect VCO2 or VE", vco2, ve, pe, lo, hi)
		b.omit(CodeMixedExpiredCO2, ReasonInconsistent, "%s", b.peBad)
		return
	}
	b.peInputs = []Kind{KindVCO2, KindMinuteVolume}
	b.peTerms = []Term{{"VCO2", vco2, "mL/min"}, {"VE", ve, "L/min"}, {"PĒCO2", pe, "mm[Hg]"}}
	b.peEq = "PĒCO2 = 0.863 × VCO2 (STPD) / VE (BTPS)"
	b.pe = pe
	b.peOK = b.emit(Value{
		Code: CodeMixedExpiredCO2, Value: pe, Unit: "mm[Hg]",
		Inputs:   slices.Clone(b.peInputs),
		Equation: b.peEq + " (constant: common practice; Siddiki H et al., Crit Care 2010;14:R141 use 0.86)",
		Terms:    []Term{{"VCO2", vco2, "mL/min"}, {"VE", ve, "L/min"}},
		Notes:    []string{"valid only for VCO2 at STPD and VE at BTPS"},
	})
}

// peMissing records why a value needing PĒCO2 cannot have it.
func (b *builder) peMissing(c Code) {
	if b.peBad != "" {
		b.omit(c, ReasonInconsistent, "%s", b.peBad)
		return
	}
	b.omit(c, ReasonMissingInput, "no mixed-expired-co2 reading, nor vco2 and minute-volume, within ±%v of the sample time", b.window)
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
	inputs := union([]Kind{KindPaCO2}, b.peInputs)
	v := Value{
		Code: c, Value: f, Unit: "1",
		Inputs:   inputs,
		Equation: b.peEquation("Enghoff: (PaCO2 − PĒCO2)/PaCO2 (Anderson CT, Breen PH, Crit Care 2000;4:207)"),
		Terms:    append([]Term{{"PaCO2", pa, "mm[Hg]"}}, b.peTerms...),
		Flag:     FlagNormal,
		Range: &Range{
			Low: ptr(0.2), High: ptr(0.35),
			Text:   "healthy adult at rest (about 0.3)",
			Source: "common practice",
		},
	}
	switch {
	case f < 0.2:
		v.Flag = FlagLow
	case f > 0.35:
		v.Flag = FlagHigh
	}
	if f >= 0.60 {
		v.Notes = append(v.Notes, "markedly elevated (≥ 0.60; Kallet RH et al., Respir Care 2014;59:1611)")
	}
	v.Notes = append(v.Notes, "shunt raises Enghoff VD/VT as well as dead space does (Tusman G et al., Anesth Analg 2012)")
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
	b.emit(Value{
		Code: c, Value: f, Unit: "1",
		Inputs:   union([]Kind{KindEtCO2}, b.peInputs),
		Equation: b.peEquation("Bohr with PetCO2 for PACO2: (PetCO2 − PĒCO2)/PetCO2 (Tusman G et al., Anesth Analg 2012;114:866)"),
		Terms:    append([]Term{{"PetCO2", et, "mm[Hg]"}}, b.peTerms...),
	})
}

// fromPhysiologic emits a value computed from the physiologic fraction and
// one more windowed kind: dead-space volume from tidal volume, alveolar
// ventilation from minute volume.
func (b *builder) fromPhysiologic(c Code, k Kind) {
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
	b.emit(v)
}

func (b *builder) ventilatoryRatio(pa float64) {
	const c = CodeVentilatoryRatio
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
	b.emit(Value{
		Code: c, Value: VentilatoryRatio(ve, pa, pbw), Unit: "1",
		Inputs:      []Kind{KindPaCO2, KindMinuteVolume, KindHeight},
		UsesPatient: true,
		Equation: "VR = (VE × PaCO2)/(PBW × 100 × 37.5), VE in mL/min (Sinha P et al., Br J Anaesth 2009;102:692); " +
			"PBW = 50 (male) or 45.5 (female) + 0.91 × (height − 152.4) (ARDS Network, NEJM 2000;342:1301)",
		Terms: []Term{
			{"VE", ve, "mL/min"}, {"PaCO2", pa, "mm[Hg]"},
			{"height", h, "cm"}, {"PBW", pbw, "kg"},
		},
		Notes: []string{"about 1 in healthy people (Sinha 2009)"},
	})
}

func (b *builder) estimated(pa, et float64) {
	const c = CodeEstimatedFraction
	if b.physOK {
		b.omit(c, ReasonNotApplicable, "the physiologic VD/VT was computed from expired CO2")
		return
	}
	if !b.need(c, true, KindEtCO2, KindRespRate) {
		return
	}
	birth := b.d.Patient.BirthDate
	if birth.IsZero() {
		b.omit(c, ReasonPatientFacts, "the regression needs age; birth date unknown")
		return
	}
	at := b.d.Gas.At()
	if at.Before(birth) {
		b.omit(c, ReasonPatientFacts, "birth date %s is after the sample time", birth.Format(time.DateOnly))
		return
	}
	age := float64(ageYears(birth, at))
	g, rr := Gradient(pa, et), b.med[KindRespRate]
	f := EstimatedFraction(g, rr, age)
	if !inFraction(f) {
		b.omit(c, ReasonFractionBounds, "the regression gives %v, outside [0, 1)", f)
		return
	}
	b.emit(Value{
		Code: c, Value: f, Unit: "1",
		Inputs:      []Kind{KindPaCO2, KindEtCO2, KindRespRate},
		UsesPatient: true,
		Equation: "VD/VT = 0.320 + 0.0106 × (PaCO2 − PetCO2) + 0.003 × RR + 0.0015 × age " +
			"(believed Frankenfield DC et al., Crit Care Med 2010;38:288; attribution from memory)",
		Terms: []Term{
			{"PaCO2", pa, "mm[Hg]"}, {"PetCO2", et, "mm[Hg]"}, {"gradient", g, "mm[Hg]"},
			{"RR", rr, "/min"}, {"age", age, "a"},
		},
		Estimate: true,
		Notes:    []string{"an estimate from a regression, not a measurement"},
	})
}

// ageYears is the age in completed years, on the UTC calendar: birth dates
// carry no zone, and the adapter builds them at UTC midnight.
func ageYears(birth, at time.Time) int {
	b, a := birth.UTC(), at.UTC()
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

// days formats whole-day durations as days, which is how people state a
// height's age.
func days(d time.Duration) string {
	const day = 24 * time.Hour
	if d > 0 && d%day == 0 {
		return fmt.Sprintf("%d days", d/day)
	}
	return d.String()
}

// DetectFalls finds end-tidal CO2 fall episodes in one patient's EtCO2
// series, sorted by AtMillis. Readings of other kinds, and readings outside
// [Plausible], are skipped. The rules, all design choices:
//
//   - The baseline at a reading is the median of the readings in the
//     Baseline before it (readings at the same instant excluded), and it
//     needs MinBaselineReadings of them. Readings that belonged to an
//     episode, confirmed or cancelled, never enter a baseline, so a fall
//     does not drag its own reference down.
//   - A reading is low when it is below baseline − threshold, where
//     threshold = min(Drop, DropFraction × baseline). The first low reading
//     opens a candidate episode and freezes the baseline and threshold.
//   - The candidate is confirmed at the first reading at least Sustain after
//     onset, provided every reading from onset to it was low. A reading that
//     is not low cancels it, and so does a gap of more than Sustain between
//     readings: the fall must have been observed throughout, not inferred
//     across a silent monitor. After a cancellation the same reading is
//     judged afresh, so it may open a new candidate.
//   - A confirmed episode ends at the first reading above
//     baseline − Recover × threshold. That reading joins the baseline but
//     cannot open a new episode; the next can. One episode gives one
//     finding however long it lasts.
//   - After a long episode the baseline may hold too few readings; no new
//     episode opens until it has MinBaselineReadings again.
//
// A finding depends only on readings up to its confirmation, so running
// over the whole series or over any prefix that includes the confirmation
// gives the same finding: a streaming caller may simply re-run it as
// readings arrive.
func DetectFalls(cfg FallConfig, series []Reading) []Fall { return detectFalls(cfg, series) }
