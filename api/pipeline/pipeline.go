// Package pipeline turns decoded FHIR inputs into derived results: it keeps
// the latest version of each input, groups inputs by patient, prefers the
// better of two sources for one kind of reading, pairs each blood gas with the
// readings around its sample time, finds end-tidal CO2 falls, and encodes
// every result as FHIR resources. It also accounts for every input that did
// not become part of a result, with a reason.
//
// The replay command feeds it a whole export at once through [Collector]; the
// live engine calls [Evaluate] for one patient whenever that patient's inputs
// change. Both produce the same results for the same inputs, which is what
// lets a replay audit the live service.
package pipeline

import (
	"fmt"
	"slices"
	"sort"
	"strconv"
	"strings"
	"time"

	"github.com/deadspace-fhir/deadspace/derive"
	"github.com/deadspace-fhir/deadspace/fhir/decode"
	"github.com/deadspace-fhir/deadspace/fhir/encode"
)

// Result is one derivation (for a blood gas) or one fall finding, with the
// resources that represent it.
type Result struct {
	// Subject is the patient reference, "Patient/x".
	Subject    string
	Derivation *derive.Derivation
	Fall       *derive.Fall
	Bundle     encode.Bundle
}

// Time is the physiological time of the result: the blood gas's sample time
// or the fall's onset.
func (r Result) Time() time.Time {
	if r.Derivation != nil {
		return r.Derivation.Gas.At()
	}
	return r.Fall.Onset
}

// Input is one accepted reading with what the pipeline needs to rank it.
type Input struct {
	Reading  derive.Reading
	Priority int
}

// Evaluate derives every result for one patient. readings are the patient's
// accepted inputs of every kind (blood gases included), in any order. It
// returns the results in time order, the omissions of inputs that became no
// part of any result, and the omissions of values that were not emitted.
func Evaluate(cfg derive.Config, enc *encode.Encoder, subject string, facts derive.Patient, inputs []Input) ([]Result, []derive.Omission, error) {
	kept, omitted := preferSources(inputs)
	var gases, readings, etco2 []derive.Reading
	for _, r := range kept {
		switch r.Kind {
		case derive.KindPaCO2:
			gases = append(gases, r)
		case derive.KindEtCO2:
			etco2 = append(etco2, r)
			readings = append(readings, r)
		default:
			readings = append(readings, r)
		}
	}
	byTime := func(a, b derive.Reading) int {
		if c := cmpInt(a.AtMillis, b.AtMillis); c != 0 {
			return c
		}
		return strings.Compare(a.Ref, b.Ref)
	}
	slices.SortFunc(gases, byTime)
	slices.SortFunc(readings, byTime)
	slices.SortFunc(etco2, byTime)

	used := make(map[string]bool)
	var results []Result
	for _, gas := range gases {
		d := derive.Derive(cfg, gas, facts, readings)
		used[gas.Ref] = true
		for _, o := range d.Omitted {
			omitted = append(omitted, derive.Omission{Code: o.Code, Ref: gas.Ref, Reason: o.Reason, Detail: o.Detail})
		}
		if len(d.Values) == 0 {
			continue
		}
		for _, s := range d.Used {
			for _, r := range s.Readings {
				used[r.Ref] = true
			}
		}
		b, err := enc.Derivation(subject, d)
		if err != nil {
			return nil, nil, fmt.Errorf("pipeline: encode derivation of %s: %w", gas.Ref, err)
		}
		results = append(results, Result{Subject: subject, Derivation: &d, Bundle: b})
	}
	for _, f := range derive.DetectFalls(cfg.Fall, etco2) {
		for _, r := range f.BaselineReadings {
			used[r.Ref] = true
		}
		for _, r := range f.EpisodeReadings {
			used[r.Ref] = true
		}
		b, err := enc.Fall(subject, f)
		if err != nil {
			return nil, nil, fmt.Errorf("pipeline: encode fall: %w", err)
		}
		results = append(results, Result{Subject: subject, Fall: &f, Bundle: b})
	}
	for _, r := range readings {
		if !used[r.Ref] {
			omitted = append(omitted, derive.Omission{Ref: r.Ref, Reason: derive.ReasonUnpaired, Detail: r.Kind.String()})
		}
	}
	slices.SortStableFunc(results, func(a, b Result) int { return a.Time().Compare(b.Time()) })
	return results, omitted, nil
}

// preferSources keeps, for each kind, only the readings from the highest
// priority source the patient has, so a measured tidal volume is never
// averaged with a set one.
func preferSources(inputs []Input) ([]derive.Reading, []derive.Omission) {
	best := make(map[derive.Kind]int)
	for _, in := range inputs {
		if p, ok := best[in.Reading.Kind]; !ok || in.Priority > p {
			best[in.Reading.Kind] = in.Priority
		}
	}
	kept := make([]derive.Reading, 0, len(inputs))
	var omitted []derive.Omission
	for _, in := range inputs {
		if in.Priority < best[in.Reading.Kind] {
			omitted = append(omitted, derive.Omission{Ref: in.Reading.Ref, Reason: derive.ReasonLowerPriority, Detail: in.Reading.Kind.String()})
			continue
		}
		kept = append(kept, in.Reading)
	}
	return kept, omitted
}

// Collector gathers decoded items from a whole export, in any order, keeping
// the latest version of each resource.
type Collector struct {
	latest   map[string]decode.Item // by logical reference, "Observation/x"
	patients map[string]decode.Item // Patient resources by logical reference
	omitted  []derive.Omission
	// unrecognised counts Observations with no code this service uses. They
	// are only counted: a bulk export is mostly such lines, and keeping a
	// record of each would cost memory for no audit value.
	unrecognised int
}

// NewCollector returns an empty collector.
func NewCollector() *Collector {
	return &Collector{latest: make(map[string]decode.Item), patients: make(map[string]decode.Item)}
}

// Add takes one decoded item. Unrelated items are ignored.
func (c *Collector) Add(it decode.Item) {
	switch it.Type {
	case decode.ItemUnrelated:
		if it.ResourceType == "Observation" {
			c.unrecognised++
		}
		return
	case decode.ItemPatient:
		key := "Patient/" + it.ID
		if prev, ok := c.patients[key]; !ok || newer(it, prev) {
			c.patients[key] = it
		}
		return
	}
	if it.ID == "" {
		// Without an id nothing can supersede it, and nothing can cite it.
		c.omitted = append(c.omitted, it.Omission)
		return
	}
	key := it.ResourceType + "/" + it.ID
	prev, ok := c.latest[key]
	switch {
	case !ok:
		c.latest[key] = it
	case newer(it, prev):
		c.omitted = append(c.omitted, derive.Omission{Ref: refOf(prev), Reason: derive.ReasonSuperseded, Detail: "superseded by version " + it.VersionID})
		c.latest[key] = it
	case prev.VersionID == it.VersionID:
		// The same version twice (overlapping export files): nothing to do.
	default:
		c.omitted = append(c.omitted, derive.Omission{Ref: refOf(it), Reason: derive.ReasonSuperseded, Detail: "superseded by version " + prev.VersionID})
	}
}

func refOf(it decode.Item) string {
	if it.Ref != "" {
		return it.Ref
	}
	return it.Omission.Ref
}

// newer reports whether a is a later version than b. FHIR fixes no order
// for version ids, so the last-updated time decides, and version ids that
// are both numbers break ties.
func newer(a, b decode.Item) bool {
	if !a.LastUpdated.Equal(b.LastUpdated) {
		return a.LastUpdated.After(b.LastUpdated)
	}
	na, errA := strconv.ParseUint(a.VersionID, 10, 64)
	nb, errB := strconv.ParseUint(b.VersionID, 10, 64)
	if errA == nil && errB == nil {
		return na > nb
	}
	return a.VersionID > b.VersionID
}

// Report is what a whole export produced.
type Report struct {
	Results []Result
	// Inputs are the inputs left out, and Values the values not emitted.
	Inputs []derive.Omission
	Values []derive.Omission
	// Unrecognised counts Observations with no code this service uses
	// (reason code-not-recognised); they are not listed one by one.
	Unrecognised int
}

// Finish derives every patient's results. Patients are processed in order
// of their reference, so the output is deterministic.
func (c *Collector) Finish(cfg derive.Config, enc *encode.Encoder) (Report, error) {
	bySubject := make(map[string][]Input)
	rep := Report{Inputs: slices.Clone(c.omitted), Unrecognised: c.unrecognised}
	for _, it := range c.latest {
		switch it.Type {
		case decode.ItemReading:
			bySubject[it.Subject] = append(bySubject[it.Subject], Input{Reading: it.Reading, Priority: it.Priority})
		default:
			rep.Inputs = append(rep.Inputs, it.Omission)
		}
	}
	subjects := make([]string, 0, len(bySubject))
	for s := range bySubject {
		subjects = append(subjects, s)
	}
	sort.Strings(subjects)
	for _, s := range subjects {
		facts := derive.Patient{}
		if p, ok := c.patients[s]; ok {
			facts = p.Patient
		}
		results, omitted, err := Evaluate(cfg, enc, s, facts, bySubject[s])
		if err != nil {
			return Report{}, err
		}
		rep.Results = append(rep.Results, results...)
		for _, o := range omitted {
			if o.Code != "" {
				rep.Values = append(rep.Values, o)
			} else {
				rep.Inputs = append(rep.Inputs, o)
			}
		}
	}
	slices.SortFunc(rep.Inputs, func(a, b derive.Omission) int {
		if c := strings.Compare(a.Ref, b.Ref); c != 0 {
			return c
		}
		return strings.Compare(string(a.Reason), string(b.Reason))
	})
	return rep, nil
}

func cmpInt(a, b int64) int {
	switch {
	case a < b:
		return -1
	case a > b:
		return 1
	}
	return 0
}
