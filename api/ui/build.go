package ui

// Builders shared by both adapters: they turn derive's results into the
// view model, so a value reads the same on a live page and in a report.

import (
	"cmp"
	"fmt"
	"slices"
	"strconv"
	"strings"
	"time"

	"github.com/deadspace-fhir/deadspace/api/replay"
	"github.com/deadspace-fhir/deadspace/derive"
	"github.com/deadspace-fhir/deadspace/fhir/decode"
	"github.com/deadspace-fhir/deadspace/fhir/encode"
	"github.com/deadspace-fhir/deadspace/fhir/units"
)

// valueInfo is how each derived value is labelled, in the order the pages
// list them. The decimals shown are the encoder's (encode.PrecisionOf), so a
// page never shows a value rounded otherwise than the record holds it.
var valueInfo = []struct {
	code  derive.Code
	label string
}{
	{derive.CodeGradient, "PaCO2 − EtCO2"},
	{derive.CodePhysiologic, "VD/VT (Enghoff)"},
	{derive.CodeEstimatedFraction, "VD/VT estimated"},
	{derive.CodeAlveolarFraction, "Alveolar VD/VT"},
	{derive.CodeAirwayFraction, "Airway VD/VT"},
	{derive.CodeDeadSpaceVolume, "VD"},
	{derive.CodeAlveolarVent, "Alveolar ventilation"},
	{derive.CodeVentilatoryRatio, "Ventilatory ratio"},
	{derive.CodeMixedExpiredCO2, "Mixed-expired PCO2"},
	{derive.CodeEtCO2Drop, "EtCO2 fall from baseline"},
	{derive.CodeEtCO2Rise, "EtCO2 rise above baseline"},
}

// TableCodes are the values the timeline's table has a column for.
var TableCodes = []derive.Code{
	derive.CodeGradient, derive.CodePhysiologic, derive.CodeEstimatedFraction, derive.CodeAlveolarFraction,
	derive.CodeDeadSpaceVolume, derive.CodeAlveolarVent, derive.CodeVentilatoryRatio,
}

func labelOf(c derive.Code) (string, int) {
	for _, v := range valueInfo {
		if v.code == c {
			return v.label, decimalsOf(c)
		}
	}
	return string(c), decimalsOf(c)
}

// decimalsOf is how many decimals the encoder writes for c (2 for a code it
// does not know).
func decimalsOf(c derive.Code) int {
	if p, ok := encode.PrecisionOf(c); ok {
		return p.Decimals
	}
	return 2
}

func codeOrder(c derive.Code) int {
	for i, v := range valueInfo {
		if v.code == c {
			return i
		}
	}
	return len(valueInfo)
}

// Label returns a value's label and the digits it is shown with.
func Label(c derive.Code) string { l, _ := labelOf(c); return l }

func flagText(f derive.Flag) string {
	switch f {
	case derive.FlagHigh:
		return "H"
	case derive.FlagLow:
		return "L"
	case derive.FlagNormal:
		return "N"
	}
	return ""
}

// valueOf makes the view of one derived value.
func valueOf(at time.Time, v derive.Value, status, explainID string) Value {
	label, digits := labelOf(v.Code)
	return Value{
		Code: v.Code, Label: label, At: at, Value: v.Value, Unit: v.Unit, Digits: digits,
		Flag: flagText(v.Flag), Estimate: v.Estimate, Status: status, ExplainID: explainID,
	}
}

// findingOf makes the view of one fall finding. Its episode's end is
// found from the end-tidal series (etco2, sorted by time, only the usable
// readings) by the detector's own recovery rule, [derive.EpisodeEnd].
func findingOf(f derive.Fall, status, explainID string, cfg derive.FallConfig, etco2 []derive.Reading) Finding {
	end, ongoing := derive.EpisodeEnd(cfg, f, etco2)
	return Finding{
		Rise: f.Rise, Onset: f.Onset, Confirmed: f.Confirmed, End: end, Ongoing: ongoing, Baseline: f.Baseline, Level: f.Level,
		Change: f.Change, Status: status, ExplainID: explainID,
	}
}

// etco2Series returns the usable end-tidal readings among points, in time
// order, as the fall detector reads them.
func etco2Series(points []Point) []derive.Reading {
	out := make([]derive.Reading, 0, len(points))
	for _, p := range points {
		if p.Status == StatusFinal && !p.At.IsZero() {
			out = append(out, derive.Reading{Kind: derive.KindEtCO2, AtMillis: p.At.UnixMilli(), Value: p.Value, Ref: p.Ref})
		}
	}
	slices.SortStableFunc(out, func(a, b derive.Reading) int { return cmp.Compare(a.AtMillis, b.AtMillis) })
	return out
}

// InputDetail is what the store or the export holds about one input
// version beyond what pairing used.
type InputDetail struct {
	Available  bool
	Original   decode.Original
	Conversion units.Conversion
}

func inputOf(r derive.Reading, role string, d InputDetail) Input {
	in := Input{
		Role: role, Ref: r.Ref, Kind: r.Kind.String(), At: r.At(), Value: r.Value, Unit: r.Kind.Unit(),
		Available: d.Available,
	}
	if d.Available {
		in.OriginalValue = d.Original.Value
		in.OriginalUnit = d.Original.Code
		if in.OriginalUnit == "" {
			in.OriginalUnit = d.Original.Unit
		}
		in.Conversion = d.Conversion.Text
	}
	return in
}

// Roles of an input in an explanation.
const (
	RoleBloodGas     = "blood gas"
	RolePaired       = "paired"
	RoleFallBaseline = "fall baseline"
	RoleFallEpisode  = "fall episode"
)

// explainValue explains one value of a derivation. detail looks up what is
// known of each input version; nearby are omissions of the patient's inputs
// (for the left-out list), filtered here to the pairing window.
func explainValue(patientID string, d *derive.Derivation, code derive.Code, id, status string, detail func(ref string) InputDetail, window time.Duration, nearby []OmittedInput) Explanation {
	ex := Explanation{ID: id, PatientID: patientID, At: d.Gas.At(), Status: status}
	i := slices.IndexFunc(d.Values, func(v derive.Value) bool { return v.Code == code })
	sums := d.Used
	if i >= 0 {
		v := d.Values[i]
		val := valueOf(d.Gas.At(), v, status, id)
		ex.Value = &val
		ex.Title = fmt.Sprintf("%s at %s", val.Label, d.Gas.At().Format("2006-01-02 15:04 MST"))
		ex.Equation = v.Equation
		ex.Terms = v.Terms
		ex.Notes = append(ex.Notes, v.Notes...)
		if v.Range != nil {
			ex.Range = rangeText(*v.Range)
		}
		// The inputs the Observation cites in derivedFrom, by the
		// encoder's own rule.
		var err error
		if sums, err = d.CitedSummaries(v); err != nil {
			ex.Notes = append(ex.Notes, "the recorded derivation is incomplete: "+err.Error())
		}
		if v.UsesPatient {
			ex.Patient = patientText(d.Patient)
		}
	} else {
		ex.Title = fmt.Sprintf("%s at %s", Label(code), d.Gas.At().Format("2006-01-02 15:04 MST"))
		ex.Notes = append(ex.Notes, fmt.Sprintf("the recorded derivation has no value %q; its inputs are listed whole", code))
	}
	ex.Inputs = append(ex.Inputs, inputOf(d.Gas, RoleBloodGas, detail(d.Gas.Ref)))
	if d.PaCO2 != 0 && d.PaCO2 != d.Gas.Value {
		ex.Notes = append(ex.Notes, fmt.Sprintf("the equations used a PaCO2 of %.4g mm[Hg] at the patient's temperature, not the %.4g mm[Hg] reported at 37 °C", d.PaCO2, d.Gas.Value))
	}
	seen := map[string]bool{d.Gas.Ref: true}
	for _, s := range sums {
		p := Pairing{Kind: s.Kind.String(), Median: s.Median, Unit: s.Kind.Unit(), Rule: s.Rule, Substitute: s.Substitute, Artefacts: s.Artefacts}
		for _, r := range s.Readings {
			p.Refs = append(p.Refs, r.Ref)
			if !seen[r.Ref] {
				seen[r.Ref] = true
				ex.Inputs = append(ex.Inputs, inputOf(r, RolePaired, detail(r.Ref)))
			}
		}
		ex.Pairings = append(ex.Pairings, p)
	}
	for _, o := range d.Omitted {
		ex.NotEmitted = append(ex.NotEmitted, Omission{What: Label(o.Code), Reason: o.Reason, Detail: o.Detail})
	}
	for _, o := range nearby {
		// A reading near no blood gas is not near this one; one without a
		// time cannot be placed.
		if o.Reason == derive.ReasonUnpaired || o.At.IsZero() || absDuration(o.At.Sub(d.Gas.At())) > window {
			continue
		}
		ex.LeftOut = append(ex.LeftOut, Omission{What: o.Ref + " (" + o.Kind + ", " + o.At.Format("15:04") + ")", Reason: o.Reason, Detail: o.Detail})
	}
	return ex
}

// OmittedInput is an input left out, placed in time.
type OmittedInput struct {
	Ref    string
	Kind   string
	At     time.Time
	Reason derive.Reason
	Detail string
}

// leftOutText is why an input version was left out, as a plot's title
// says it.
func leftOutText(reason derive.Reason, detail string) string {
	if detail == "" {
		return string(reason)
	}
	return string(reason) + ": " + detail
}

// markLeftOut applies to a timeline's blood gases what the derivations
// left out of them: a blood gas usable at its source but left out (another
// report of a sample the values were derived from once, same-sample; or
// reports of one sample that disagree) is no current blood gas, so it is
// plotted as left out, with why, and takes no row of the table. why gives
// the omission of a versioned reference, if any. Both adapters call it, so
// a live timeline and a report plot one sample reported twice alike.
func markLeftOut(gases []Point, why func(ref string) (derive.Omission, bool)) {
	for i := range gases {
		p := &gases[i]
		if p.Status != StatusFinal {
			continue
		}
		if o, ok := why(p.Ref); ok && o.Reason != derive.ReasonSuperseded {
			p.Status, p.Why = StatusLeftOut, leftOutText(o.Reason, o.Detail)
		}
	}
}

func absDuration(d time.Duration) time.Duration {
	if d < 0 {
		return -d
	}
	return d
}

// explainFall explains one fall finding.
func explainFall(patientID string, f derive.Fall, id, status string, detail func(ref string) InputDetail, cfg derive.FallConfig, etco2 []derive.Reading) Explanation {
	fd := findingOf(f, status, id, cfg, etco2)
	what := "fall"
	if f.Rise {
		what = "rise"
	}
	ex := Explanation{
		ID: id, PatientID: patientID, At: f.Onset, Status: status, Fall: &fd,
		Title:    fmt.Sprintf("EtCO2 %s from %s", what, f.Onset.Format("2006-01-02 15:04 MST")),
		Equation: "change = median of the episode's readings − median of the baseline readings",
		Terms: []derive.Term{
			{Name: "baseline", Value: f.Baseline, Unit: "mm[Hg]"},
			{Name: "level", Value: f.Level, Unit: "mm[Hg]"},
			{Name: "change", Value: f.Change, Unit: "mm[Hg]"},
		},
		Notes: append([]string(nil), f.Notes...),
	}
	for _, r := range f.BaselineReadings {
		ex.Inputs = append(ex.Inputs, inputOf(r, RoleFallBaseline, detail(r.Ref)))
	}
	for _, r := range f.EpisodeReadings {
		ex.Inputs = append(ex.Inputs, inputOf(r, RoleFallEpisode, detail(r.Ref)))
	}
	return ex
}

func rangeText(r derive.Range) string {
	var parts []string
	switch {
	case r.Low != nil && r.High != nil:
		parts = append(parts, fmt.Sprintf("%s to %s", num(*r.Low), num(*r.High)))
	case r.Low != nil:
		parts = append(parts, "at least "+num(*r.Low))
	case r.High != nil:
		parts = append(parts, "up to "+num(*r.High))
	}
	if r.Text != "" {
		parts = append(parts, r.Text)
	}
	if r.Source != "" {
		parts = append(parts, "source: "+r.Source)
	}
	return strings.Join(parts, "; ")
}

func num(f float64) string { return strconv.FormatFloat(f, 'g', -1, 64) }

func patientText(p derive.Patient) string {
	var parts []string
	switch p.Sex {
	case derive.SexMale:
		parts = append(parts, "sex male")
	case derive.SexFemale:
		parts = append(parts, "sex female")
	default:
		parts = append(parts, "sex unknown")
	}
	if !p.BirthDate.IsZero() {
		parts = append(parts, "born "+p.BirthDate.Format("2006-01-02"))
	}
	if p.Ref != "" {
		parts = append(parts, "from "+p.Ref)
	}
	return strings.Join(parts, ", ")
}

// countReasons counts reasons in derive's vocabulary order, as replay's
// summary does.
func countReasons(rs []derive.Reason) []ReasonCount {
	om := make([]derive.Omission, len(rs))
	for i, r := range rs {
		om[i].Reason = r
	}
	var out []ReasonCount
	for _, c := range replay.ReasonCounts(om) {
		out = append(out, ReasonCount{Reason: c.Reason, N: c.N})
	}
	return out
}

// PatientID strips "Patient/" from a subject reference.
func PatientID(subject string) string { return strings.TrimPrefix(subject, "Patient/") }

// sortValues orders values by time, then display order.
func sortValues(vs []Value) {
	slices.SortStableFunc(vs, func(a, b Value) int {
		if c := a.At.Compare(b.At); c != 0 {
			return c
		}
		return codeOrder(a.Code) - codeOrder(b.Code)
	})
}

// rowsOf groups a timeline's values by blood gas time for the table.
func rowsOf(t *Timeline, etco2Median map[time.Time]float64) {
	byTime := make(map[time.Time]*Row)
	var times []time.Time
	for _, v := range t.Values {
		if v.Code == derive.CodeEtCO2Drop || v.Code == derive.CodeEtCO2Rise {
			continue
		}
		r, ok := byTime[v.At]
		if !ok {
			r = &Row{At: v.At, Values: make(map[derive.Code]Value), EtCO2: etco2Median[v.At]}
			byTime[v.At] = r
			times = append(times, v.At)
		}
		// A current value wins over a superseded or withdrawn one of the
		// same code at the same time; the plot shows them all.
		if old, ok := r.Values[v.Code]; !ok || old.Status == StatusSuperseded || old.Status == StatusWithdrawn {
			r.Values[v.Code] = v
		}
	}
	for i := range t.PaCO2 {
		p := &t.PaCO2[i]
		if p.Status != StatusFinal {
			continue
		}
		if r, ok := byTime[p.At]; ok {
			r.PaCO2 = p
		} else {
			byTime[p.At] = &Row{At: p.At, PaCO2: p, Values: map[derive.Code]Value{}}
			times = append(times, p.At)
		}
	}
	slices.SortFunc(times, time.Time.Compare)
	for _, at := range times {
		t.Rows = append(t.Rows, *byTime[at])
	}
}

// span sets a timeline's time range from everything on it.
func span(t *Timeline) {
	var from, to time.Time
	see := func(at time.Time) {
		if at.IsZero() {
			return
		}
		if from.IsZero() || at.Before(from) {
			from = at
		}
		if to.IsZero() || at.After(to) {
			to = at
		}
	}
	for _, p := range t.EtCO2 {
		see(p.At)
	}
	for _, p := range t.PaCO2 {
		see(p.At)
	}
	for _, v := range t.Values {
		see(v.At)
	}
	for _, f := range t.Findings {
		see(f.Onset)
		see(f.End)
	}
	t.From, t.To = from, to
}
