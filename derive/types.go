package derive

import (
	"time"
)

// AlgorithmVersion names the rules in this package. It is part of every
// derived value's identity: a change to an equation, a default or a pairing
// rule must change it, so that results computed under different rules are
// never mistaken for one another.
const AlgorithmVersion = "2.3.0"

// Kind is what a reading measures. Each kind has one canonical unit, and
// every [Reading] value is in it; unit conversion is the adapter's job.
type Kind uint8

// The kinds of input. The canonical unit of each is in its comment and in
// [Kind.Unit].
const (
	KindUnknown         Kind = iota
	KindPaCO2                // arterial PCO2, mm[Hg]
	KindEtCO2                // end-tidal PCO2, mm[Hg]
	KindMixedExpiredCO2      // measured mixed-expired PCO2 (PĒCO2), mm[Hg]
	KindVCO2                 // CO2 production, mL/min STPD
	KindTidalVolume          // tidal volume, mL
	KindMinuteVolume         // expired minute volume, L/min BTPS
	KindRespRate             // respiratory rate, /min
	KindHeight               // body height, cm
	// Kinds added later keep the numbers above stable: stores persist a
	// kind as its number.
	KindBodyTemperature // body (core) temperature, Cel
	KindPaCO2Adjusted   // arterial PCO2 reported at the patient's temperature, mm[Hg]
	kindCount
)

var kindInfo = [kindCount]struct {
	name, unit string
}{
	KindUnknown:         {"unknown", ""},
	KindPaCO2:           {"paco2", "mm[Hg]"},
	KindEtCO2:           {"etco2", "mm[Hg]"},
	KindMixedExpiredCO2: {"mixed-expired-co2", "mm[Hg]"},
	KindVCO2:            {"vco2", "mL/min"},
	KindTidalVolume:     {"tidal-volume", "mL"},
	KindMinuteVolume:    {"minute-volume", "L/min"},
	KindRespRate:        {"respiratory-rate", "/min"},
	KindHeight:          {"body-height", "cm"},
	KindBodyTemperature: {"body-temperature", "Cel"},
	KindPaCO2Adjusted:   {"paco2-temperature-adjusted", "mm[Hg]"},
}

// String returns the kind's stable name, used in configuration files and
// explanations.
func (k Kind) String() string {
	if k >= kindCount {
		return "unknown"
	}
	return kindInfo[k].name
}

// Unit returns the UCUM code of the kind's canonical unit.
func (k Kind) Unit() string {
	if k >= kindCount {
		return ""
	}
	return kindInfo[k].unit
}

// ParseKind is the inverse of [Kind.String].
func ParseKind(s string) (Kind, bool) {
	for k := KindPaCO2; k < kindCount; k++ {
		if kindInfo[k].name == s {
			return k, true
		}
	}
	return KindUnknown, false
}

// Kinds lists every known kind, in declaration order.
func Kinds() []Kind {
	out := make([]Kind, 0, kindCount-1)
	for k := KindPaCO2; k < kindCount; k++ {
		out = append(out, k)
	}
	return out
}

// Reading is one accepted measurement, already in its kind's canonical unit.
// It is deliberately small: a monitored patient buffers hours of
// minute-by-minute readings.
type Reading struct {
	// Ref is the versioned reference of the source resource,
	// "Observation/abc/_history/2". It is what derived values cite.
	Ref string
	// Encounter is the encounter reference of the source, or "".
	Encounter string
	// AtMillis is the effective (physiological) time in Unix milliseconds.
	AtMillis int64
	Value    float64
	Kind     Kind
	// Priority is the code table row's priority (higher is preferred; see
	// package fhir/codes). Pairing keeps, per kind and per window, only the
	// readings of the highest priority present, and discloses a priority
	// below [SubstitutePriority].
	Priority int16
	// Source says what the reading's source measures of its kind (a
	// measured value, a delivered or inspired volume, a setting, a partial
	// rate, a converted percentage). It names a substitute in notes and
	// decides which readings a leak is judged on; the priority alone
	// decides which source is used. Zero ([SourceUnspecified]) is read as
	// [DefaultSource] of the kind and priority.
	Source Source `json:",omitempty"`
}

// Source is what a reading's source measures of its kind, from its code
// table row ("source"), or set by the adapter for a CO2 percentage it
// converted. Stores persist it as its number: values never change meaning.
type Source uint8

// The sources.
const (
	SourceUnspecified      Source = iota // not given: see [DefaultSource]
	SourceMeasured                       // a measurement of the quantity itself (an expired volume, an end-tidal pressure)
	SourceInspired                       // a delivered or inspired volume: measured on the inspired side
	SourceSet                            // a ventilator setting
	SourcePartialRate                    // a mechanical-only or spontaneous-only rate
	SourceConvertedPercent               // a CO2 percentage converted with an assumed barometric pressure and basis
	sourceCount
)

var sourceNames = [sourceCount]string{
	SourceUnspecified:      "",
	SourceMeasured:         "measured",
	SourceInspired:         "inspired",
	SourceSet:              "set",
	SourcePartialRate:      "partial-rate",
	SourceConvertedPercent: "converted-percentage",
}

// String returns the source's name as code tables write it ("" when
// unspecified).
func (s Source) String() string {
	if s >= sourceCount {
		return "unknown"
	}
	return sourceNames[s]
}

// ParseSource is the inverse of [Source.String]; "delivered" is read as
// [SourceInspired] (a delivered tidal volume is measured on the inspired
// side).
func ParseSource(name string) (Source, bool) {
	if name == "delivered" {
		return SourceInspired, true
	}
	for s := SourceMeasured; s < sourceCount; s++ {
		if sourceNames[s] == name {
			return s, true
		}
	}
	return SourceUnspecified, false
}

// DefaultSource is the source of a reading of kind k and priority p whose
// source was not given (a site code-table row without "source", a caller
// without a code table): at or above [SubstitutePriority], or without a
// priority, a measurement; below it, the common substitute of the kind: a
// set tidal volume (a delivered volume is named so only when its row says
// "delivered"), an inspired minute volume, a partial rate. Any other kind
// below it is a lower-priority measurement: a CO2 percentage is marked
// [SourceConvertedPercent] by the adapter that converted it, whatever its
// row says.
func DefaultSource(k Kind, p int16) Source {
	if p >= SubstitutePriority || p <= 0 {
		return SourceMeasured
	}
	switch k {
	case KindTidalVolume:
		return SourceSet
	case KindMinuteVolume:
		return SourceInspired
	case KindRespRate:
		return SourcePartialRate
	}
	return SourceMeasured
}

// SourceKind returns r's source: [Reading.Source], or [DefaultSource] when
// it is unspecified.
func (r Reading) SourceKind() Source {
	if r.Source != SourceUnspecified && r.Source < sourceCount {
		return r.Source
	}
	return DefaultSource(r.Kind, r.Priority)
}

// At returns the effective time.
func (r Reading) At() time.Time { return time.UnixMilli(r.AtMillis).UTC() }

// Sex is the administrative sex used by the predicted body weight equation.
type Sex uint8

// The sexes the predicted body weight equation distinguishes.
const (
	SexUnknown Sex = iota
	SexMale
	SexFemale
)

// Patient holds the facts about a patient that some equations need.
type Patient struct {
	// Ref is the versioned reference of the Patient resource, or "" when
	// nothing is known about the patient.
	Ref string
	Sex Sex
	// BirthDate is zero when unknown.
	BirthDate time.Time
}

// Code names a derived value. The strings are the codes of the project's
// own CodeSystem and never change meaning.
type Code string

// The derived values.
const (
	CodeGradient          Code = "paco2-etco2-gradient"
	CodeAlveolarFraction  Code = "alveolar-dead-space-fraction"
	CodePhysiologic       Code = "physiologic-dead-space-fraction"
	CodeAirwayFraction    Code = "airway-dead-space-fraction"
	CodeDeadSpaceVolume   Code = "physiologic-dead-space-volume"
	CodeAlveolarVent      Code = "alveolar-minute-ventilation"
	CodeVentilatoryRatio  Code = "ventilatory-ratio"
	CodeEstimatedFraction Code = "estimated-dead-space-fraction"
	CodeMixedExpiredCO2   Code = "mixed-expired-co2"
	CodeEtCO2Drop         Code = "etco2-drop-from-baseline"
	CodeEtCO2Rise         Code = "etco2-rise-above-baseline"
)

// Flag is an interpretation against a published or common-practice
// threshold. FlagNone means no threshold applies or none was crossed.
type Flag uint8

// The interpretations a derived value can carry.
const (
	FlagNone Flag = iota
	FlagNormal
	FlagHigh
	FlagLow
)

// Range is a reference range. A nil bound is open. Source says where the
// bounds come from.
type Range struct {
	Low, High *float64
	Text      string
	Source    string
}

// Term is a named intermediate value of a computation, kept so an auditor
// can follow the arithmetic.
type Term struct {
	Name  string
	Value float64
	Unit  string
}

// Value is one derived number.
type Value struct {
	Code  Code
	Value float64
	// Unit is a UCUM code; fractions use "1".
	Unit string
	// Inputs are the kinds this value was computed from; the readings behind
	// each are in the owning Derivation's Used.
	Inputs []Kind
	// UsesPatient is true when the patient's sex or age entered the value.
	UsesPatient bool
	// Equation names the equation and its published source.
	Equation string
	Terms    []Term
	Flag     Flag
	Range    *Range
	// Estimate marks a value from a regression rather than a measurement.
	Estimate bool
	Notes    []string
}

// Summary is the robust summary of one kind's readings around a blood gas.
type Summary struct {
	Kind   Kind
	Median float64
	// Readings are the readings the median was taken over, in time order.
	Readings []Reading
	// Rule says how the readings were chosen, for explanations: the window,
	// the source priority and the artefacts left out.
	Rule string
	// Substitute is set when the readings came from a lower-priority source
	// (a setting, an inspired volume, a partial rate); it says which and why.
	Substitute string
	// Artefacts counts the readings of the window left out as artefacts.
	Artefacts int
}

// Omission is a value that was not emitted, or an input that was not used,
// with the reason.
type Omission struct {
	// Code is the value not emitted; empty when the omission is of an input.
	Code Code
	// Ref is the input not used; empty when the omission is of a value.
	Ref    string
	Reason Reason
	Detail string
}

// Derivation is everything computed for one blood gas.
type Derivation struct {
	Gas Reading
	// PaCO2 is the arterial PCO2 the equations used, mm[Hg]: Gas.Value, or
	// the value at the patient's temperature (reported, or adjusted from
	// 37 °C) when a temperature away from 37 °C was known.
	PaCO2   float64
	Patient Patient
	// Used holds one summary per kind that was found, in Kind order. The
	// blood gas itself is not repeated here; a summary of [KindPaCO2]
	// holds the other reports of its sample (the same time and value),
	// which every value cites too.
	Used    []Summary
	Values  []Value
	Omitted []Omission
}

// Fall is one episode of end-tidal CO2 falling below, or rising above
// (Rise), the patient's own trailing baseline.
type Fall struct {
	// Onset is the time of the first reading below the threshold.
	Onset time.Time
	// Confirmed is when the fall had lasted the sustain time; the finding is
	// fixed from this moment, so a streaming caller and a batch caller agree.
	Confirmed time.Time
	// Baseline is the median of the baseline readings, mm[Hg]: for a
	// finding that took the place of an open episode, that episode's
	// level, and its readings are the baseline readings.
	Baseline float64
	// Level is the median of the readings from onset to confirmation, mm[Hg].
	Level float64
	// Change is Level - Baseline, negative for a fall, mm[Hg].
	Change float64
	// Rise marks an episode above the baseline rather than below it; its
	// code is [CodeEtCO2Rise].
	Rise bool
	// BaselineReadings and EpisodeReadings are what the finding cites.
	BaselineReadings []Reading
	EpisodeReadings  []Reading
	Notes            []string
}

// Config holds the tunable rules. Start from [DefaultConfig].
type Config struct {
	// Window is the half-width of the pairing window around a blood gas's
	// sample time.
	Window time.Duration
	// HeightMaxAge is how old the latest height may be at the sample time.
	HeightMaxAge time.Duration
	// Artefact decides which end-tidal readings are artefacts.
	Artefact ArtefactConfig
	// Steady decides whether ventilation was at a steady state.
	Steady SteadyConfig
	// Temperature decides how a PaCO2 is brought to the patient's
	// temperature.
	Temperature TemperatureConfig
	// LeakFraction: when an inspired or delivered volume (a lower-priority
	// source of minute or tidal volume) and the measured one are in the
	// same pairing window, and the measured is below the inspired by more
	// than this fraction of it, the values computed from the volumes carry
	// a leak note.
	LeakFraction float64
	Fall         FallConfig
}

// ArtefactConfig tunes which end-tidal CO2 readings of a pairing window are
// artefacts (disconnection, suctioning, an occluded sampling line) rather
// than end-tidal values of the patient at that moment.
type ArtefactConfig struct {
	// Floor, in mm[Hg]: a reading below it is an artefact.
	Floor float64
	// Fraction: a reading below this fraction of the median of the window's
	// readings at or above Floor is an artefact.
	Fraction float64
	// MinUsableFraction: when fewer than this fraction of the window's
	// readings are usable, the window has no end-tidal value.
	MinUsableFraction float64
}

// SteadyConfig tunes the steady-state check of the Enghoff and Bohr values.
type SteadyConfig struct {
	// Lookback is how far before the pairing window the earlier level is
	// taken from: readings in [sample − Window − Lookback, sample − Window).
	Lookback time.Duration
	// MinuteVolumeChange is the relative change of minute volume, earlier
	// level to the window's median, that counts as not steady.
	MinuteVolumeChange float64
	// EtCO2Change is the change of end-tidal CO2, in mm[Hg], that counts as
	// not steady.
	EtCO2Change float64
}

// TemperatureConfig tunes the temperature correction of PaCO2.
type TemperatureConfig struct {
	// Search is how far from the sample time a body temperature is looked
	// for (the nearest one is used).
	Search time.Duration
	// Tolerance, in °C: within 37 ± Tolerance nothing is adjusted.
	Tolerance float64
	// Coefficient is the exponent per °C of
	// PCO2(T) = PCO2(37) × 10^(Coefficient × (T − 37)).
	Coefficient float64
}

// FallConfig tunes the end-tidal CO2 fall detector.
type FallConfig struct {
	// Baseline is how far back the trailing baseline reaches.
	Baseline time.Duration
	// MinBaselineReadings is how many readings a baseline needs.
	MinBaselineReadings int
	// Drop is the fall below baseline, in mm[Hg], that counts.
	Drop float64
	// DropFraction is the same as a fraction of the baseline; a reading
	// counts as fallen when it is below baseline by Drop or by DropFraction,
	// whichever is smaller.
	DropFraction float64
	// Sustain is how long the fall must last before it is a finding.
	Sustain time.Duration
	// MaxGap is the longest silence between readings that still counts as
	// observed; a longer gap cancels a candidate episode and makes the
	// series too sparse to judge until a baseline forms again. It lets the
	// detector work on charting every few seconds up to every 15 minutes.
	MaxGap time.Duration
	// BaselineMax is how far back the baseline may reach when Baseline holds
	// fewer than MinBaselineReadings (sparse charting).
	BaselineMax time.Duration
	// MinEpisodeReadings is how many readings past the threshold an episode
	// needs, however long it lasted.
	MinEpisodeReadings int
	// Recover ends an episode: a reading back within this fraction of the
	// drop threshold from the baseline, on either side, closes it, so one
	// episode gives one finding however long it lasts (unless a further
	// change from the level it settled at takes its place).
	Recover float64
}
