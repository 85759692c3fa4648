package derive

import (
	"fmt"
	"math"
	"sort"
	"strings"
)

// SameValue is how far apart, in mm[Hg], two PaCO2 readings of one
// patient at the same sample time may be and still be one sample reported
// twice (a laboratory that sends the arterial blood gas panel with its
// components and each result as its own Observation as well): 1 mm[Hg],
// the coarsest step a PaCO2 is commonly reported in (whole mm[Hg]; a kPa
// value to one decimal is a step of 0.75 mm[Hg]), so that one value sent
// once in kPa and once in mm[Hg] still agrees after conversion. Further
// apart they cannot both be the sample's value. A design choice.
const SameValue = 1.0

// sampleGroup is what a blood gas's derivation knows of the other blood
// gases (readings of [KindPaCO2]) at exactly its sample time.
type sampleGroup struct {
	// others are the patient's other blood gases at the same sample time,
	// of other resources, in the order of preference (see [preferGas]).
	others []Reading
	// primary is the blood gas whose derivation gives the sample's values:
	// the preferred one when they agree.
	primary Reading
	// disagree is set when the values are more than [SameValue] apart.
	disagree bool
	lo, hi   float64
}

// sameInstant gathers the blood gases of readings sampled at exactly gas's
// time (of resources other than gas's own), which, of one patient and one
// code, are the same sample.
func sameInstant(gas Reading, readings []Reading) sampleGroup {
	g := sampleGroup{primary: gas, lo: gas.Value, hi: gas.Value}
	own := logicalRef(gas.Ref)
	i := sort.Search(len(readings), func(i int) bool { return readings[i].AtMillis >= gas.AtMillis })
	for ; i < len(readings) && readings[i].AtMillis == gas.AtMillis; i++ {
		r := readings[i]
		if r.Kind != KindPaCO2 || logicalRef(r.Ref) == own {
			continue
		}
		g.others = append(g.others, r)
		g.lo, g.hi = math.Min(g.lo, r.Value), math.Max(g.hi, r.Value)
		if preferGas(r, g.primary) {
			g.primary = r
		}
	}
	sort.SliceStable(g.others, func(a, b int) bool { return preferGas(g.others[a], g.others[b]) })
	g.disagree = !(g.hi-g.lo <= SameValue)
	return g
}

// preferGas reports whether a is preferred to b as the blood gas a sample
// reported twice is derived from: the higher code-table priority, then the
// logical reference that sorts first (then the versioned one). The order
// depends on nothing but the two readings, so the values are filed under
// the same blood gas (their series) whichever representation arrived
// first.
func preferGas(a, b Reading) bool {
	if a.Priority != b.Priority {
		return a.Priority > b.Priority
	}
	if la, lb := logicalRef(a.Ref), logicalRef(b.Ref); la != lb {
		return la < lb
	}
	return a.Ref < b.Ref
}

// logicalRef is ref without its "/_history/{vid}".
func logicalRef(ref string) string {
	l, _, _ := strings.Cut(ref, "/_history/")
	return l
}

// sameSampleOnly is the derivation of a blood gas that is not derived on
// its own: another representation of its sample is preferred (the
// values are derived from that one, citing this one too), or the
// representations disagree and neither is used. Every value is accounted
// for in the second case, none in the first (the preferred one's
// derivation accounts for them).
func sameSampleOnly(gas Reading, patient Patient, g sampleGroup) Derivation {
	d := Derivation{Gas: gas, Patient: patient, PaCO2: gas.Value}
	if !g.disagree {
		d.Omitted = append(d.Omitted, Omission{Ref: gas.Ref, Reason: ReasonSameSample,
			Detail: fmt.Sprintf("another blood gas reports the same sample (the same time, PaCO2 within %v mm[Hg]): its values are derived once, from that one, and cite this one too", SameValue)})
		return d
	}
	why := fmt.Sprintf("%d blood gases report PaCO2 from %v to %v mm[Hg] for the same sample time, more than %v mm[Hg] apart: one sample cannot have two values, so none is used",
		len(g.others)+1, g.lo, g.hi, SameValue)
	d.Omitted = append(d.Omitted, Omission{Ref: gas.Ref, Reason: ReasonSampleDisagrees, Detail: why})
	for _, c := range valueCodes {
		d.Omitted = append(d.Omitted, Omission{Code: c, Reason: ReasonSampleDisagrees, Detail: why})
	}
	return d
}

// valueCodes are the codes [Derive] accounts for, in the order it emits
// them.
var valueCodes = [...]Code{
	CodeGradient, CodeAlveolarFraction, CodeMixedExpiredCO2, CodePhysiologic, CodeAirwayFraction,
	CodeDeadSpaceVolume, CodeAlveolarVent, CodeVentilatoryRatio, CodeEstimatedFraction,
}

// sameSampleSummary is the summary the preferred blood gas of a sample
// reported twice cites the others by: every value computed from the PaCO2
// cites them beside the blood gas itself.
func sameSampleSummary(gas Reading, g sampleGroup) Summary {
	rule := fmt.Sprintf("the same sample reported again at the same time (PaCO2 within %v mm[Hg]); the values are derived once, from the blood gas cited first", SameValue)
	return Summary{Kind: KindPaCO2, Median: gas.Value, Readings: g.others, Rule: rule}
}

// sameSampleNote is the note on every value computed from the PaCO2 of a
// sample reported twice.
func sameSampleNote(gas Reading, g sampleGroup) string {
	n := len(g.others) + 1
	what := "twice"
	if n > 2 {
		what = fmt.Sprintf("%d times", n)
	}
	return fmt.Sprintf("the same arterial sample was reported %s at its sample time (as a panel's component and as a separate Observation, say; PaCO2 %v to %v mm[Hg], within %v mm[Hg]): it is one blood gas, derived once from the %v mm[Hg] value, and every report is cited",
		what, g.lo, g.hi, SameValue, gas.Value)
}

// otherSampleNearer reports whether a separate temperature-adjusted PaCO2
// r (one not reported on a blood gas) is nearer in time to another blood
// gas of readings than to gas (nearer: it belongs to that sample) or as
// near (tie: which sample it belongs to cannot be told). Blood gases at
// gas's own sample time are the same sample, not another.
func otherSampleNearer(gas Reading, readings []Reading, r Reading) (nearer, tie bool) {
	own := absInt(r.AtMillis - gas.AtMillis)
	from, to := addSat(r.AtMillis, -own), addSat(r.AtMillis, own)
	i := sort.Search(len(readings), func(i int) bool { return readings[i].AtMillis >= from })
	for ; i < len(readings) && readings[i].AtMillis <= to; i++ {
		o := readings[i]
		if o.Kind != KindPaCO2 || o.AtMillis == gas.AtMillis {
			continue
		}
		switch d := absInt(r.AtMillis - o.AtMillis); {
		case d < own:
			return true, false
		case d == own:
			tie = true
		}
	}
	return false, tie
}
