package ui

// The adapter over a replay: the report of `deadspace replay --html`.

import (
	"fmt"
	"slices"
	"time"

	"github.com/deadspace-fhir/deadspace/api/replay"
	"github.com/deadspace-fhir/deadspace/derive"
	"github.com/deadspace-fhir/deadspace/fhir/decode"
	"github.com/deadspace-fhir/deadspace/fhir/encode"
	fhirref "github.com/deadspace-fhir/deadspace/fhir/ref"
)

// Recorder keeps what a report needs beyond a replay's outcome: every
// reading as its source wrote it, and where each input belongs. Give its
// Add to [replay.Options.Observe]. It holds one small record per reading,
// so a report of a large export costs memory in proportion.
type Recorder struct {
	detail  map[string]InputDetail
	inputs  map[string]recorded // by versioned reference
	subject map[string][]string // subject → references, in reading order
}

type recorded struct {
	subject string
	reading derive.Reading
	ok      bool // a usable reading (not an omitted item)
	status  string
	// updated is the version's meta.lastUpdated, which orders the
	// versions of one resource for the plot.
	updated time.Time
}

// NewRecorder returns an empty recorder.
func NewRecorder() *Recorder {
	return &Recorder{detail: map[string]InputDetail{}, inputs: map[string]recorded{}, subject: map[string][]string{}}
}

// Add records one decoded item.
func (r *Recorder) Add(it decode.Item) {
	switch it.Type {
	case decode.ItemReading:
		r.detail[it.Reading.Ref] = InputDetail{Available: true, Original: it.Original, Conversion: it.Conversion}
		r.put(it.Reading.Ref, recorded{subject: it.Subject, reading: it.Reading, ok: true, status: StatusFinal, updated: it.LastUpdated})
	case decode.ItemOmitted:
		ref := it.Ref
		if ref == "" {
			ref = it.Omission.Ref
		}
		if ref == "" || it.Subject == "" {
			return
		}
		rd := it.Reading
		rd.Ref = ref
		r.put(ref, recorded{subject: it.Subject, reading: rd, status: StatusWithdrawn, updated: it.LastUpdated})
	}
}

func (r *Recorder) put(ref string, rec recorded) {
	if _, ok := r.inputs[ref]; !ok {
		r.subject[rec.subject] = append(r.subject[rec.subject], ref)
	}
	r.inputs[ref] = rec
}

func (r *Recorder) lookup(ref string) InputDetail { return r.detail[ref] }

// FromReplay builds the report of a replay. cfg is the configuration the
// replay used: its pairing window, for the list of readings left out near
// each blood gas, and its fall detector, for the end of each episode.
func FromReplay(out replay.Outcome, rec *Recorder, cfg derive.Config, generated time.Time, source string) Report {
	window := cfg.Window
	rep := Report{Generated: generated}
	why := make(map[string]derive.Omission)
	for _, o := range out.Report.Inputs {
		why[o.Ref] = o
	}
	withdrawing := withdrawals(out.Report.Inputs, rec)
	notEmitted := make([]derive.Reason, 0, len(out.Report.Values))
	for _, o := range out.Report.Values {
		notEmitted = append(notEmitted, o.Reason)
	}
	unitLeftOut := make([]derive.Reason, 0, len(out.Report.Inputs)+out.Report.Unrecognised)
	for _, o := range out.Report.Inputs {
		unitLeftOut = append(unitLeftOut, o.Reason)
	}
	for range out.Report.Unrecognised {
		unitLeftOut = append(unitLeftOut, derive.ReasonUnrecognised)
	}
	rep.Overview = Overview{Source: source, LeftOut: countReasons(unitLeftOut), NotEmitted: countReasons(notEmitted)}

	bySubject := make(map[string][]int)
	var subjects []string
	for i, r := range out.Report.Results {
		if _, ok := bySubject[r.Subject]; !ok {
			subjects = append(subjects, r.Subject)
		}
		bySubject[r.Subject] = append(bySubject[r.Subject], i)
	}
	for s := range rec.subject {
		if _, ok := bySubject[s]; !ok {
			subjects = append(subjects, s)
			bySubject[s] = nil
		}
	}
	slices.Sort(subjects)

	for _, s := range subjects {
		id := PatientID(s)
		tl := Timeline{ID: id}
		row := PatientRow{ID: id, PendingWrites: -1}
		var leftOut []derive.Reason
		var nearby, untimed []OmittedInput
		for _, ref := range rec.subject[s] {
			in := rec.inputs[ref]
			o, omitted := why[ref]
			if omitted {
				leftOut = append(leftOut, o.Reason)
				nearby = append(nearby, OmittedInput{Ref: ref, Kind: in.reading.Kind.String(), At: atOf(in.reading), Reason: o.Reason, Detail: o.Detail})
			}
			if in.reading.AtMillis == 0 {
				if in.reading.Kind == derive.KindPaCO2 {
					untimed = append(untimed, OmittedInput{Ref: ref, Reason: o.Reason})
				}
				continue
			}
			pt := Point{At: in.reading.At(), Value: in.reading.Value, Ref: ref, Status: in.status}
			if omitted && (o.Reason == derive.ReasonSuperseded) {
				pt.Status, pt.Why = StatusSuperseded, o.Detail
			} else if !in.ok {
				pt.Why = leftOutText(o.Reason, o.Detail)
			}
			switch in.reading.Kind {
			case derive.KindEtCO2:
				tl.EtCO2 = append(tl.EtCO2, pt)
			case derive.KindPaCO2:
				tl.PaCO2 = append(tl.PaCO2, pt)
			}
		}
		showWithdrawn(tl.EtCO2, withdrawing, rec)
		showWithdrawn(tl.PaCO2, withdrawing, rec)
		markLeftOut(tl.PaCO2, func(ref string) (derive.Omission, bool) { o, ok := why[ref]; return o, ok })
		for _, u := range untimed {
			// A version without a time that withdraws a blood gas plotted
			// (drawn withdrawn above) needs no note of its own.
			l, _ := fhirref.Split(u.Ref)
			if !slices.ContainsFunc(tl.PaCO2, func(p Point) bool { q, _ := fhirref.Split(p.Ref); return q == l }) {
				tl.Notes = append(tl.Notes, fmt.Sprintf("%s: a blood gas left out (%s) without a usable time, not plotted", u.Ref, u.Reason))
			}
		}
		row.LeftOut = countReasons(leftOut)
		etco2Median := make(map[time.Time]float64)
		gasExplain := make(map[string]string)
		adjusted := make(map[string]float64)
		series := etco2Series(tl.EtCO2)
		for _, i := range bySubject[s] {
			r := out.Report.Results[i]
			if r.Fall != nil {
				ident, err := encode.FallIdentity(s, *r.Fall)
				if err != nil {
					continue
				}
				f := findingOf(*r.Fall, StatusFinal, ident.Key, cfg.Fall, series)
				tl.Findings = append(tl.Findings, f)
				ex := explainFall(id, *r.Fall, ident.Key, StatusFinal, rec.lookup, cfg.Fall, series)
				ex.Series, ex.AlgorithmVersion = ident.Series, derive.AlgorithmVersion
				rep.Explanations = append(rep.Explanations, ex)
				continue
			}
			d := r.Derivation
			if d.PaCO2 != 0 && d.PaCO2 != d.Gas.Value {
				adjusted[d.Gas.Ref] = d.PaCO2
			}
			for _, u := range d.Used {
				if u.Kind == derive.KindEtCO2 {
					etco2Median[d.Gas.At()] = u.Median
				}
			}
			var latest []Value
			for _, v := range d.Values {
				ident, err := encode.ValueIdentity(*d, v)
				if err != nil {
					continue
				}
				val := valueOf(d.Gas.At(), v, StatusFinal, ident.Key)
				tl.Values = append(tl.Values, val)
				latest = append(latest, val)
				if _, ok := gasExplain[d.Gas.Ref]; !ok {
					gasExplain[d.Gas.Ref] = ident.Key
				}
				ex := explainValue(id, d, v.Code, ident.Key, StatusFinal, rec.lookup, window, nearby)
				ex.Series, ex.AlgorithmVersion = ident.Series, derive.AlgorithmVersion
				ex.History = []Revision{{ID: ident.Key, Current: true}}
				rep.Explanations = append(rep.Explanations, ex)
			}
			if len(latest) > 0 && !d.Gas.At().Before(row.LatestGas) {
				row.LatestGas, row.Latest = d.Gas.At(), overviewValues(latest)
			}
		}
		for i := range tl.PaCO2 {
			tl.PaCO2[i].ExplainID = gasExplain[tl.PaCO2[i].Ref]
			tl.PaCO2[i].Adjusted = adjusted[tl.PaCO2[i].Ref]
		}
		row.Findings = activeFindings(tl.Findings, latestTime(&tl))
		sortValues(tl.Values)
		sortPoints(tl.EtCO2)
		sortPoints(tl.PaCO2)
		span(&tl)
		rowsOf(&tl, etco2Median)
		rep.Timelines = append(rep.Timelines, tl)
		rep.Overview.Patients = append(rep.Overview.Patients, row)
	}
	return rep
}

// withdrawals returns, by logical reference, the resources whose newest
// version withdraws them at their source: a version entered-in-error,
// deleted on the server, re-coded, re-filed under another patient or
// otherwise not usable. The replay leaves out every older version as
// superseded and gives the newest its own reason; a reason other than
// superseded on a version that is not a usable reading (a usable one is
// one the derivations left out, an artefact say) is such a withdrawal. A
// deletion is never read as a version, so the recorder does not hold it.
func withdrawals(inputs []derive.Omission, rec *Recorder) map[string]derive.Omission {
	out := make(map[string]derive.Omission)
	for _, o := range inputs {
		if o.Reason == derive.ReasonSuperseded {
			continue
		}
		if in, ok := rec.inputs[o.Ref]; ok && in.ok {
			continue
		}
		if l, _ := fhirref.Split(o.Ref); l != "" {
			out[l] = o
		}
	}
	return out
}

// showWithdrawn shows a resource withdrawn at its source as the live pages
// do: when its withdrawing version is not on the plot itself (it has no
// usable time, or is a deletion), the newest version plotted is drawn
// withdrawn, with the withdrawal's reason, rather than superseded as a
// correction would be.
func showWithdrawn(points []Point, withdrawing map[string]derive.Omission, rec *Recorder) {
	newest := make(map[string]int) // logical → index of its newest point
	for i, p := range points {
		l, _ := fhirref.Split(p.Ref)
		if _, ok := withdrawing[l]; !ok {
			continue
		}
		j, seen := newest[l]
		switch {
		case !seen:
			newest[l] = i
		case points[j].Status != StatusSuperseded:
			// the withdrawing version is plotted itself
		case p.Status != StatusSuperseded || rec.inputs[p.Ref].updated.After(rec.inputs[points[j].Ref].updated):
			newest[l] = i
		}
	}
	for l, i := range newest {
		p := &points[i]
		if p.Status != StatusSuperseded {
			continue // the withdrawing version is plotted itself
		}
		o := withdrawing[l]
		p.Status, p.Why = StatusWithdrawn, leftOutText(o.Reason, o.Detail)
	}
}

func atOf(r derive.Reading) time.Time {
	if r.AtMillis == 0 {
		return time.Time{}
	}
	return r.At()
}

func sortPoints(ps []Point) {
	slices.SortStableFunc(ps, func(a, b Point) int { return a.At.Compare(b.At) })
}

// overviewValues keeps the values the overview shows for a blood gas.
func overviewValues(vs []Value) []Value {
	var out []Value
	for _, v := range vs {
		switch v.Code {
		case derive.CodeGradient, derive.CodePhysiologic, derive.CodeEstimatedFraction:
			out = append(out, v)
		}
	}
	slices.SortStableFunc(out, func(a, b Value) int { return codeOrder(a.Code) - codeOrder(b.Code) })
	return out
}

// activeWithin is how recent a fall must be, before the patient's latest
// data, to count as active on the overview.
const activeWithin = 6 * time.Hour

func activeFindings(fs []Finding, latest time.Time) []Finding {
	var out []Finding
	for i := len(fs) - 1; i >= 0; i-- {
		f := fs[i]
		if f.Status == StatusWithdrawn || f.Status == StatusSuperseded {
			continue
		}
		if latest.Sub(f.End) <= activeWithin {
			out = append(out, f)
		}
	}
	return out
}

func latestTime(t *Timeline) time.Time {
	var latest time.Time
	for _, p := range t.EtCO2 {
		if p.At.After(latest) {
			latest = p.At
		}
	}
	for _, p := range t.PaCO2 {
		if p.At.After(latest) {
			latest = p.At
		}
	}
	return latest
}
