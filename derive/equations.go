package derive

import (
	"errors"
	"fmt"
	"math"
	"slices"
)

// The equations are kept as small exported functions, apart from [Derive],
// so each can be checked on its own against the worked example of its
// source. They do no range checking beyond refusing to divide by a
// non-positive pressure or volume (they return NaN then): deciding whether a
// result is usable is [Derive]'s job, which knows the context.

// Errors returned by [PredictedBodyWeight].
var (
	// ErrUnknownSex means the patient's sex is not known; the ARDS Network
	// equation has no sex-neutral form.
	ErrUnknownSex = errors.New("sex unknown")
	// ErrHeightOutOfRange means the height is outside the range the
	// equation is meant for, or not a number.
	ErrHeightOutOfRange = errors.New("height outside the adult range")
)

// MixedExpiredConstant converts VCO2 (mL/min STPD) over VE (L/min BTPS) to a
// partial pressure in mm[Hg]. The value 0.863 is the one commonly used
// (ozemedicine: "conversion constant (usually 0.863)"); it is
// 760 mm[Hg] × (310 K / 273 K) / 1000 mL/L, so barometric pressure cancels
// (derivation from memory).
const MixedExpiredConstant = 0.863

// MinAdultHeightCm is the lowest height [PredictedBodyWeight] accepts. The
// ARDS Network equation was built for adults; below 120 cm it is an
// extrapolation that gives weights no clinician would use (6.9 kg for a
// 110 cm female, below zero at 100 cm). The cut-off is our design choice, not published.
const MinAdultHeightCm = 120.0

// Gradient is the arterial to end-tidal PCO2 difference, PaCO2 − PetCO2, in
// mm[Hg]. Source: Malley WJ, Clinical Blood Gases, 2nd ed., 2005: "Normally,
// the gradient is less than 5 mm Hg".
func Gradient(paco2, petco2 float64) float64 { return paco2 - petco2 }

// AlveolarFraction is the end-tidal alveolar dead-space fraction,
// (PaCO2 − PetCO2)/PaCO2. The name is from Bhalla AK et al., Respir Care
// 2015;60:1548 ("end-tidal alveolar dead-space fraction [AVDSF]"); the
// formula is the common one, recalled from memory.
func AlveolarFraction(paco2, petco2 float64) float64 {
	if !(paco2 > 0) {
		return math.NaN()
	}
	return (paco2 - petco2) / paco2
}

// EnghoffFraction is the physiologic dead-space fraction
// (PaCO2 − PĒCO2)/PaCO2. Source: Anderson CT, Breen PH, Crit Care
// 2000;4:207: "VDphy/VT = (PaCO2 - PĒCO2)/PaCO2".
func EnghoffFraction(paco2, pe float64) float64 {
	if !(paco2 > 0) {
		return math.NaN()
	}
	return (paco2 - pe) / paco2
}

// MixedExpiredFromVCO2 is the mixed-expired PCO2 in mm[Hg] from CO2
// production (mL/min STPD) and expired minute volume (L/min BTPS):
// [MixedExpiredConstant] × VCO2 / VE. Valid only for those conditions; a
// device reporting VE at ATPS would need a different constant.
func MixedExpiredFromVCO2(vco2, ve float64) float64 {
	if !(ve > 0) {
		return math.NaN()
	}
	return MixedExpiredConstant * vco2 / ve
}

// BohrAirwayFraction is the Bohr dead-space fraction with PetCO2 standing in
// for the mean alveolar PCO2, (PetCO2 − PĒCO2)/PetCO2. Bohr's equation uses
// PACO2 (Tusman G et al., Anesth Analg 2012;114:866: "mean alveolar partial
// pressure of CO2 (PACO2)"); PetCO2 is the usual bedside substitute, which
// makes this closer to airway than to physiologic dead space.
func BohrAirwayFraction(petco2, pe float64) float64 {
	if !(petco2 > 0) {
		return math.NaN()
	}
	return (petco2 - pe) / petco2
}

// DeadSpaceVolume is VD = VD/VT × VT, in the unit of vt (mL); common
// practice, the definition of the fraction read backwards.
func DeadSpaceVolume(fraction, vt float64) float64 { return fraction * vt }

// AlveolarVentilation is VE × (1 − VD/VT) in L/min, the per-minute form of
// VA = (VT − VD) × RR (Medbullets: "VA = (TV - VD) x RR").
func AlveolarVentilation(ve, fraction float64) float64 { return ve * (1 - fraction) }

// PredictedBodyWeight is the ARDS Network predicted body weight in kg:
// male 50 + 0.91 (height cm − 152.4), female 45.5 + 0.91 (height cm − 152.4)
// (ARDS Network, NEJM 2000;342:1301; the protocol card gives the inch form
// 50 + 2.3 (height in − 60)). Heights below [MinAdultHeightCm] are refused.
func PredictedBodyWeight(sex Sex, heightCm float64) (float64, error) {
	var base float64
	switch sex {
	case SexMale:
		base = 50
	case SexFemale:
		base = 45.5
	default:
		return 0, fmt.Errorf("predicted body weight: %w", ErrUnknownSex)
	}
	if math.IsNaN(heightCm) || math.IsInf(heightCm, 0) || heightCm < MinAdultHeightCm {
		return 0, fmt.Errorf("predicted body weight: %v cm, need at least %v cm: %w",
			heightCm, MinAdultHeightCm, ErrHeightOutOfRange)
	}
	return base + 0.91*(heightCm-152.4), nil
}

// VentilatoryRatio is (VE × PaCO2)/(PBW × 100 × 37.5), with VE in mL/min,
// PaCO2 in mm[Hg] and PBW in kg. Source: Sinha P et al., Br J Anaesth
// 2009;102:692: predicted VE "taken to be 100 (ml kg-1 min-1)" and predicted
// PaCO2 5 kPa, i.e. 37.5 mm[Hg]. About 1 in healthy people.
func VentilatoryRatio(veMLmin, paco2, pbw float64) float64 {
	if !(pbw > 0) {
		return math.NaN()
	}
	return veMLmin * paco2 / (pbw * 100 * 37.5)
}

// EstimatedFraction is a regression estimate of VD/VT from the arterial to
// end-tidal gradient (mm[Hg]), the respiratory rate (/min) and age (years):
// 0.320 + 0.0106·gradient + 0.003·RR + 0.0015·age. Attribution from memory:
// believed to be Frankenfield DC et al., Crit Care Med 2010;38:288 (used as
// "VD/VT phys" by Beitler 2015 and Morales-Quinteros 2019). Coefficients not
// checked against the paper.
func EstimatedFraction(gradient, rr, ageYears float64) float64 {
	return 0.320 + 0.0106*gradient + 0.003*rr + 0.0015*ageYears
}

// Median returns the median of values, the mean of the two middle values
// for an even count, and NaN for none. values is not modified.
func Median(values []float64) float64 {
	n := len(values)
	if n == 0 {
		return math.NaN()
	}
	s := slices.Clone(values)
	slices.Sort(s)
	if n%2 == 1 {
		return s[n/2]
	}
	return (s[n/2-1] + s[n/2]) / 2
}
