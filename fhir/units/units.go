// Package units converts the UCUM units of incoming Quantities to each
// [derive.Kind]'s canonical unit ([derive.Kind.Unit]).
//
// It accepts a short, fixed list of units and nothing else, because a wrong
// guess at a unit gives a plausible-looking wrong number: mm[Hg] and kPa
// (pressure); % (expired-gas CO2 only, see below); mL and L (volume); L/min
// and mL/min (flow); /min (rate); cm, m and [in_i] (length). Spellings that
// are the same UCUM unit are accepted too, as the UCUM reference library
// @lhncbc/ucum-lhc 7.1.10 does: the liter's lower-case symbol (ml, l/min),
// exponent forms (min-1, L.min-1), 1/min, curly-brace annotations, which carry
// no dimension ({breaths}/min, L/min{BTPS}), and surrounding white space. A
// unit outside the list is [derive.ReasonUnitUnknown]; a listed unit (or a
// common unit of another dimension, such as kg or mmol/L) that cannot measure
// the kind is [derive.ReasonUnitMismatch].
//
// UCUM codes are case-sensitive: "mmHg", "kpa" and "ML" are not UCUM and are
// not accepted.
//
// # Percent CO2
//
// A CO2 fraction F (value/100) is turned into a partial pressure with the
// barometric pressure PB, on one of two bases (Intensive Care Med 2004 dead
// space review, doi 10.1007/s00134-004-2194-8):
//
//	dry (uncorrected): PCO2 = F × PB
//	wet (BTPS):        PCO2 = F × (PB − 47 mm[Hg])
//
// 47 mm[Hg] is the water vapour pressure at 37 °C. The default basis is dry,
// for this reason (from memory, not verified against a device manual):
// capnographs measure the partial pressure of CO2 by infrared absorption and
// display a percentage by dividing it by the ambient pressure, so F × PB
// gives back what the device measured. The wet basis is for fractions
// measured on a dried gas sample (a Douglas bag, a mass spectrometer) and
// referred to saturated alveolar gas. Choosing dry for a wet-basis device
// overstates PCO2 by PB/(PB − 47), about 6.6 % at sea level. The basis is set
// per site ([Options.PercentBasis]) and per code (the code table's co2Basis).
// A percentage whose annotation names its gas conditions is converted on
// the basis they name, whatever the site's: {BTPS} (any case) on the wet
// basis, {STPD} and {ATPD} (dry gas) on the dry one; {ATPS} (saturated at
// the room's temperature, whose water vapour pressure is not known here)
// is refused ([derive.ReasonUnitUnknown]).
// A PaCO2 in % is a unit mismatch: blood PCO2 is a tension measured by an
// electrode and has no gas fraction.
//
// # Gas conditions
//
// A gas volume depends on the conditions it is reported at, and the
// mixed-expired equation PĒCO2 = 0.863 × VCO2 / VE is valid only for VCO2
// at STPD (0 °C, 760 mm[Hg], dry) and VE at BTPS (body temperature,
// ambient pressure, saturated with water vapour): its 0.863 is
// 760 × (310/273)/1000, from memory. So
// VCO2's canonical unit is mL/min STPD, and minute and tidal volume's are
// at BTPS; an unannotated unit is taken to be so. A UCUM annotation naming
// other conditions ({STPD}, {BTPS}, {ATPS}, {ATPD}; any case) is not
// dropped: by the gas laws (Boyle and Charles),
//
//	V(STPD) = V(BTPS) × (PB − 47)/760 × 273.15/310.15
//
// with PB the site's barometric pressure ([Options.BarometricPressure]),
// 47 mm[Hg] the water vapour pressure at 37 °C and 37 °C (310.15 K) the
// body temperature BTPS names, so a BTPS volume is converted to STPD and
// back ([Conversion.Conditions] is the factor). Ambient conditions (ATPS,
// ATPD) need the ambient temperature, which is not known here, and are
// refused ([derive.ReasonUnitUnknown]) rather than guessed.
package units

import (
	"errors"
	"fmt"
	"math"
	"strconv"
	"strings"

	"github.com/deadspace-fhir/deadspace/derive"
	"github.com/deadspace-fhir/deadspace/fhir/codes"
)

// MMHgPascal is UCUM's own definition of the millimetre of mercury:
// m[Hg] = 133.3220 kPa, so 1 mm[Hg] = 133.3220 Pa. The conventional value is
// 133.322387415 Pa; the 3 ppm difference is far below any blood-gas or
// capnograph precision, and using UCUM's value keeps this package in exact
// agreement with UCUM libraries.
const MMHgPascal = 133.3220

// WaterVapourMMHg is the saturated water vapour pressure at 37 °C, in
// mm[Hg], used for the wet (BTPS) percent basis.
const WaterVapourMMHg = 47.0

// DefaultBarometricPressure is standard sea-level pressure in mm[Hg], used
// when [Options.BarometricPressure] is zero.
const DefaultBarometricPressure = 760.0

// Basis is the basis on which a CO2 percentage is converted to a partial
// pressure.
type Basis uint8

// The bases. BasisDry is the zero value and the default.
const (
	BasisDry Basis = iota // PCO2 = F × PB
	BasisWet              // PCO2 = F × (PB − 47 mm[Hg])
)

// String returns "dry" or "wet".
func (b Basis) String() string {
	switch b {
	case BasisDry:
		return "dry"
	case BasisWet:
		return "wet"
	}
	return fmt.Sprintf("Basis(%d)", b)
}

// ParseBasis is the inverse of [Basis.String].
func ParseBasis(s string) (Basis, error) {
	switch s {
	case "dry":
		return BasisDry, nil
	case "wet":
		return BasisWet, nil
	}
	return 0, fmt.Errorf("CO2 basis must be dry or wet, got %q", s)
}

// Options are the site's conversion settings. The zero value means the
// defaults: 760 mm[Hg], dry basis.
type Options struct {
	// BarometricPressure in mm[Hg]; zero means [DefaultBarometricPressure].
	BarometricPressure float64
	// PercentBasis is used for codes whose table row sets no basis.
	PercentBasis Basis
}

// pb returns the barometric pressure with the default applied.
func (o Options) pb() float64 {
	if o.BarometricPressure == 0 {
		return DefaultBarometricPressure
	}
	return o.BarometricPressure
}

// Validate reports every problem with the options.
func (o Options) Validate() error {
	var errs []error
	// 250–2300 mm[Hg] spans the highest inhabited altitudes and a hyperbaric
	// chamber at 3 atm (both from memory), and rejects a pressure typed in
	// kPa (about 101) by mistake.
	if pb := o.pb(); math.IsNaN(pb) || pb < 250 || pb > 2300 {
		errs = append(errs, fmt.Errorf("barometric pressure must be 250–2300 mm[Hg], got %v", o.BarometricPressure))
	}
	if o.PercentBasis != BasisDry && o.PercentBasis != BasisWet {
		errs = append(errs, fmt.Errorf("unknown percent basis %d", o.PercentBasis))
	}
	if err := errors.Join(errs...); err != nil {
		return fmt.Errorf("unit options: %w", err)
	}
	return nil
}

// Error is a unit that cannot be used. Reason is [derive.ReasonUnitUnknown]
// or [derive.ReasonUnitMismatch].
type Error struct {
	Reason derive.Reason
	Unit   string
	Kind   derive.Kind
	Detail string
}

func (e *Error) Error() string {
	if e.Kind == derive.KindUnknown {
		return fmt.Sprintf("unit %q: %s", e.Unit, e.Detail)
	}
	return fmt.Sprintf("unit %q for %s: %s", e.Unit, e.Kind, e.Detail)
}

// dimension is what a unit measures.
type dimension uint8

const (
	dimNone dimension = iota
	dimPressure
	dimFraction
	dimVolume
	dimFlow
	dimRate
	dimLength
	// Dimensions of units that are recognised only to say "wrong dimension".
	dimUnity
	dimMass
	dimTemperature
	dimConcentration
	dimTime
)

var dimNames = [...]string{
	dimNone: "none", dimPressure: "pressure", dimFraction: "fraction", dimVolume: "volume",
	dimFlow: "volume flow", dimRate: "rate", dimLength: "length", dimUnity: "dimensionless",
	dimMass: "mass", dimTemperature: "temperature", dimConcentration: "concentration", dimTime: "time",
}

func (d dimension) String() string { return dimNames[d] }

type unitDef struct {
	dim dimension
	// factor multiplies a value in this unit to give the dimension's base:
	// Pa, L, L/min, /min, cm; 0.01 for %.
	factor float64
}

// supported are the units that convert. Keys are UCUM codes with
// annotations removed.
var supported = map[string]unitDef{
	"mm[Hg]":   {dimPressure, MMHgPascal},
	"kPa":      {dimPressure, 1000},
	"%":        {dimFraction, 0.01},
	"mL":       {dimVolume, 1e-3},
	"ml":       {dimVolume, 1e-3},
	"L":        {dimVolume, 1},
	"l":        {dimVolume, 1},
	"L/min":    {dimFlow, 1},
	"l/min":    {dimFlow, 1},
	"L.min-1":  {dimFlow, 1},
	"l.min-1":  {dimFlow, 1},
	"mL/min":   {dimFlow, 1e-3},
	"ml/min":   {dimFlow, 1e-3},
	"mL.min-1": {dimFlow, 1e-3},
	"ml.min-1": {dimFlow, 1e-3},
	"/min":     {dimRate, 1},
	"1/min":    {dimRate, 1},
	"min-1":    {dimRate, 1},
	"cm":       {dimLength, 1},
	"m":        {dimLength, 100},
	"[in_i]":   {dimLength, 2.54},
	"Cel":      {dimTemperature, 1},
	// [degF] has an offset, not only a factor; convert handles it.
	"[degF]": {dimTemperature, 5.0 / 9},
}

// recognised are common Observation units of other dimensions, known only so
// that a PaCO2 in mmol/L is reported as the wrong dimension rather than as an
// unknown unit. "" is what a bare annotation such as "{score}" leaves.
var recognised = map[string]dimension{
	"":        dimUnity,
	"1":       dimUnity,
	"kg":      dimMass,
	"g":       dimMass,
	"[lb_av]": dimMass,
	"K":       dimTemperature,
	"mmol/L":  dimConcentration,
	"mg/dL":   dimConcentration,
	"g/dL":    dimConcentration,
	"s":       dimTime,
	"min":     dimTime,
	"h":       dimTime,
}

// SupportedUnits returns the annotation-free unit codes this package
// converts, for documentation and tests.
func SupportedUnits() []string {
	out := make([]string, 0, len(supported))
	for u := range supported {
		out = append(out, u)
	}
	return out
}

// Unit is a parsed UCUM unit.
type Unit struct {
	// Code is the unit as given.
	Code string
	// Bare is Code without annotations and surrounding white space.
	Bare string
	dim  dimension
	def  unitDef
}

// Supported reports whether the unit converts to some kind's unit.
func (u Unit) Supported() bool { return u.def.dim != dimNone }

// Dimension names what the unit measures.
func (u Unit) Dimension() string { return u.dim.String() }

// Parse reads a UCUM unit code. It returns an *[Error] with
// [derive.ReasonUnitUnknown] for anything that is neither a supported unit
// nor a recognised unit of another dimension.
func Parse(code string) (Unit, error) {
	bare, err := strip(code)
	if err != nil {
		return Unit{}, &Error{Reason: derive.ReasonUnitUnknown, Unit: code, Detail: err.Error()}
	}
	if d, ok := supported[bare]; ok {
		return Unit{Code: code, Bare: bare, dim: d.dim, def: d}, nil
	}
	if d, ok := recognised[bare]; ok {
		return Unit{Code: code, Bare: bare, dim: d}, nil
	}
	return Unit{}, &Error{Reason: derive.ReasonUnitUnknown, Unit: code, Detail: "not a unit this service converts (UCUM codes are case-sensitive)"}
}

// strip removes surrounding white space and annotations, following the
// rules ucum-lhc 7.1.10 applies: an annotation holds printable ASCII other
// than braces, and may follow a unit symbol or stand alone, but must be
// followed by the end, "/", "." or ")".
func strip(code string) (string, error) {
	s := strings.Trim(code, " \t\r\n")
	if s == "" {
		return "", errors.New("empty unit")
	}
	if !strings.ContainsAny(s, "{}") {
		return s, validChars(s)
	}
	var b strings.Builder
	for i := 0; i < len(s); i++ {
		c := s[i]
		switch c {
		case '}':
			return "", errors.New("closing brace without an opening one")
		case '{':
			j := strings.IndexByte(s[i+1:], '}')
			if j < 0 {
				return "", errors.New("annotation without a closing brace")
			}
			ann := s[i+1 : i+1+j]
			for k := 0; k < len(ann); k++ {
				if ann[k] < 33 || ann[k] > 126 || ann[k] == '{' {
					return "", fmt.Errorf("invalid character in annotation {%s}", ann)
				}
			}
			i += j + 1
			if i+1 < len(s) && !strings.ContainsRune("/.)", rune(s[i+1])) {
				return "", fmt.Errorf("text directly after annotation {%s}", ann)
			}
		default:
			b.WriteByte(c)
		}
	}
	out := b.String()
	return out, validChars(out)
}

func validChars(s string) error {
	for i := 0; i < len(s); i++ {
		if s[i] < 33 || s[i] > 126 {
			return errors.New("white space or non-ASCII character inside the unit")
		}
	}
	return nil
}

// Conversion records how a value was brought to its kind's canonical unit,
// for audits.
type Conversion struct {
	FromValue float64
	FromUnit  string
	ToValue   float64
	ToUnit    string
	// Factor is ToValue/FromValue: the unit factor, or for a percent the
	// pressure each 1 % stands for.
	Factor float64
	// Source says where the unit came from: "code", or "unit" when the
	// Quantity had no code (see [FromQuantity]).
	Source string
	// Text is a one-line human account, e.g.
	// "5.3 kPa × 7.50064 = 39.7534 mm[Hg]".
	Text string
	// Conditions is the factor that brought a gas volume from the
	// conditions its annotation names to the kind's own (see the package
	// documentation); 1 when none was applied. It is part of Factor.
	Conditions float64
	// Percent is set when a CO2 percentage was turned into a partial
	// pressure with an assumed barometric pressure and basis: the value is
	// a substitute for a measured partial pressure.
	Percent bool
}

// BodyTemperatureK is the body temperature BTPS names, 37 °C, in kelvin.
const BodyTemperatureK = 310.15

// StandardTemperatureK is the temperature STPD names, 0 °C, in kelvin.
const StandardTemperatureK = 273.15

// StandardPressureMMHg is the pressure STPD names.
const StandardPressureMMHg = 760.0

// gasBTPS and gasSTPD are the conditions of a kind's canonical unit.
const (
	gasNone = ""
	gasBTPS = "BTPS"
	gasSTPD = "STPD"
)

// canonicalConditions says at which conditions kind k's canonical unit is,
// or gasNone for a kind that is not a gas volume.
func canonicalConditions(k derive.Kind) string {
	switch k {
	case derive.KindVCO2:
		return gasSTPD
	case derive.KindMinuteVolume, derive.KindTidalVolume:
		return gasBTPS
	}
	return gasNone
}

// annotatedConditions returns the gas conditions a UCUM code's annotations
// name ("BTPS", "STPD", "ATPS", "ATPD"), "" when none does, or an error
// when two name different conditions.
func annotatedConditions(code string) (string, error) {
	var found string
	for rest := code; ; {
		i := strings.IndexByte(rest, '{')
		if i < 0 {
			return found, nil
		}
		j := strings.IndexByte(rest[i:], '}')
		if j < 0 {
			return found, nil
		}
		a := strings.ToUpper(strings.TrimSpace(rest[i+1 : i+j]))
		rest = rest[i+j+1:]
		switch a {
		case "BTPS", "STPD", "ATPS", "ATPD":
			if found != "" && found != a {
				return "", fmt.Errorf("annotations name two gas conditions, %s and %s", found, a)
			}
			found = a
		}
	}
}

// conditions returns the factor that brings a gas volume of kind k from
// the conditions named by code's annotations to the kind's own, with a
// text, or an error for conditions that cannot be converted here.
func conditions(k derive.Kind, code string, o Options) (float64, string, error) {
	want := canonicalConditions(k)
	if want == gasNone {
		return 1, "", nil
	}
	got, err := annotatedConditions(code)
	if err != nil {
		return 0, "", &Error{Reason: derive.ReasonUnitUnknown, Unit: code, Kind: k, Detail: err.Error()}
	}
	switch got {
	case "", want:
		return 1, "", nil
	case "ATPS", "ATPD":
		return 0, "", &Error{Reason: derive.ReasonUnitUnknown, Unit: code, Kind: k,
			Detail: fmt.Sprintf("a volume at ambient conditions (%s) needs the ambient temperature to be brought to %s, and it is not known", got, want)}
	}
	pb := o.pb()
	btpsToStpd := (pb - WaterVapourMMHg) / StandardPressureMMHg * StandardTemperatureK / BodyTemperatureK
	if got == gasBTPS { // to STPD
		return btpsToStpd, fmt.Sprintf("BTPS to STPD × (%s − %s)/%s × %s/%s = × %s", num(pb), num(WaterVapourMMHg), num(StandardPressureMMHg),
			num(StandardTemperatureK), num(BodyTemperatureK), num6(btpsToStpd)), nil
	}
	return 1 / btpsToStpd, fmt.Sprintf("STPD to BTPS × %s/(%s − %s) × %s/%s = × %s", num(StandardPressureMMHg), num(pb), num(WaterVapourMMHg),
		num(BodyTemperatureK), num(StandardTemperatureK), num6(1/btpsToStpd)), nil
}

// Convert brings v, in the UCUM unit code, to kind k's canonical unit.
// Errors are *[Error]. o must be valid ([Options.Validate]).
func Convert(k derive.Kind, v float64, code string, o Options) (Conversion, error) {
	u, err := Parse(code)
	if err != nil {
		var ue *Error
		if errors.As(err, &ue) {
			ue.Kind = k
		}
		return Conversion{}, err
	}
	f, text, err := conditions(k, code, o)
	if err != nil {
		return Conversion{}, err
	}
	c, err := convert(k, v, u, o)
	if err != nil || f == 1 {
		if err == nil {
			c.Conditions = 1
		}
		return c, err
	}
	c.ToValue *= f
	c.Factor *= f
	c.Conditions = f
	c.Text += "; " + text + " = " + num6(c.ToValue) + " " + c.ToUnit + " " + canonicalConditions(k)
	return c, nil
}

func convert(k derive.Kind, v float64, u Unit, o Options) (Conversion, error) {
	target, ok := supported[k.Unit()]
	if !ok {
		return Conversion{}, &Error{Reason: derive.ReasonUnitMismatch, Unit: u.Code, Kind: k, Detail: "the kind has no canonical unit"}
	}
	c := Conversion{FromValue: v, FromUnit: u.Code, ToUnit: k.Unit(), Source: "code"}
	switch {
	case u.dim == dimFraction && (k == derive.KindEtCO2 || k == derive.KindMixedExpiredCO2):
		c.Percent = true
		pb := o.pb()
		basis, named, err := percentBasis(k, u.Code, o.PercentBasis)
		if err != nil {
			return Conversion{}, err
		}

		switch basis {
		case BasisWet:
			c.Factor = (pb - WaterVapourMMHg) / 100
			c.ToValue = v / 100 * (pb - WaterVapourMMHg)
			c.Text = fmt.Sprintf("%s %s × (%s − %s) mm[Hg] / 100 = %s mm[Hg] (wet basis, BTPS)",
				num(v), u.Code, num(pb), num(WaterVapourMMHg), num6(c.ToValue))
		default:
			c.Factor = pb / 100
			c.ToValue = v / 100 * pb
			c.Text = fmt.Sprintf("%s %s × %s mm[Hg] / 100 = %s mm[Hg] (dry basis, ambient pressure)",
				num(v), u.Code, num(pb), num6(c.ToValue))
		}
		if named {
			c.Text += "; the basis its annotation names"
		}
		return c, nil
	case u.dim == dimFraction:
		return Conversion{}, &Error{Reason: derive.ReasonUnitMismatch, Unit: u.Code, Kind: k,
			Detail: "a percent is accepted only for expired-gas CO2"}
	case u.dim != target.dim:
		return Conversion{}, &Error{Reason: derive.ReasonUnitMismatch, Unit: u.Code, Kind: k,
			Detail: fmt.Sprintf("the unit measures %s, %s needs %s", u.dim, k, target.dim)}
	}
	if u.def.dim == dimNone {
		return Conversion{}, &Error{Reason: derive.ReasonUnitUnknown, Unit: u.Code, Kind: k,
			Detail: fmt.Sprintf("a %s unit this service does not convert", u.dim)}
	}
	if u.Bare == "[degF]" {
		c.ToValue = (v - 32) * 5 / 9
		c.Factor = 5.0 / 9
		c.Text = fmt.Sprintf("(%s [degF] − 32) × 5/9 = %s Cel", num(v), num6(c.ToValue))
		return c, nil
	}
	if u.def.factor == target.factor {
		c.Factor, c.ToValue = 1, v
		c.Text = fmt.Sprintf("%s %s (canonical unit, no conversion)", num(v), u.Code)
		return c, nil
	}
	// Multiply before dividing, as ucum-lhc does, so results agree to the
	// last bit more often.
	c.ToValue = v * u.def.factor / target.factor
	c.Factor = u.def.factor / target.factor
	c.Text = fmt.Sprintf("%s %s × %s = %s %s", num(v), u.Code, num6(c.Factor), num6(c.ToValue), c.ToUnit)
	return c, nil
}

// percentBasis is the basis a CO2 percentage in unit code is converted on:
// the one its annotation names, else site (the site's or the code's). A
// percentage at BTPS ({BTPS}, any case) is a fraction of saturated gas at
// body temperature: the wet basis. At STPD or ATPD it is a fraction of dry
// gas: the dry basis (a fraction of a dry gas is the same at any
// temperature). At ATPS it is a fraction of gas saturated at the room's
// temperature, whose water vapour pressure is not known here: refused.
// An annotation that names no conditions ({CO2}) is a label.
func percentBasis(k derive.Kind, code string, site Basis) (b Basis, named bool, err error) {
	got, err := annotatedConditions(code)
	if err != nil {
		return 0, false, &Error{Reason: derive.ReasonUnitUnknown, Unit: code, Kind: k, Detail: err.Error()}
	}
	switch got {
	case gasBTPS:
		return BasisWet, true, nil
	case gasSTPD, "ATPD":
		return BasisDry, true, nil
	case "ATPS":
		return 0, false, &Error{Reason: derive.ReasonUnitUnknown, Unit: code, Kind: k,
			Detail: "a CO2 percentage at ambient conditions, saturated (ATPS), needs the water vapour pressure at the room's temperature, which is not known"}
	}
	return site, false, nil
}

// Quantity is the unit part of a FHIR Quantity.
type Quantity struct {
	System, Code, Unit string
}

// FromQuantity converts a Quantity's value. The computable code is used when
// present; its system must be UCUM, or absent (FHIR's qty-3 requires the
// system with a code, but a bare code is still the sender's unit code, more
// trustworthy than the display text). Only when there is no code is the
// display unit read as a UCUM code, and then Source is "unit" and Text says
// so: devices often put a UCUM string there, but nothing guarantees it.
func FromQuantity(k derive.Kind, v float64, q Quantity, o Options) (Conversion, error) {
	switch {
	case q.Code != "":
		if q.System != "" && q.System != codes.UCUM {
			return Conversion{}, &Error{Reason: derive.ReasonUnitUnknown, Unit: q.Code, Kind: k,
				Detail: fmt.Sprintf("unit system %q is not UCUM", q.System)}
		}
		return Convert(k, v, q.Code, o)
	case q.Unit != "":
		c, err := Convert(k, v, q.Unit, o)
		if err != nil {
			var ue *Error
			if errors.As(err, &ue) {
				ue.Detail += " (read from Quantity.unit: no code)"
			}
			return c, err
		}
		c.Source = "unit"
		c.Text += "; unit read from Quantity.unit as the Quantity has no code"
		return c, nil
	}
	return Conversion{}, &Error{Reason: derive.ReasonUnitUnknown, Kind: k, Detail: "the Quantity has no unit"}
}

func num(v float64) string  { return strconv.FormatFloat(v, 'g', -1, 64) }
func num6(v float64) string { return strconv.FormatFloat(v, 'g', 6, 64) }
