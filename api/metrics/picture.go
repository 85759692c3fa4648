package metrics

import (
	"maps"
	"sync"

	"github.com/prometheus/client_golang/prometheus"

	"github.com/deadspace-fhir/deadspace/derive"
)

// picture is what replay's summary says of the inputs the service has
// taken: inputs left out and values not emitted, by reason. Inputs left out
// as they arrived (refused, not recognised, superseded) only grow; what an
// evaluation leaves out is the patient's latest evaluation, replaced by
// the next, so a reading paired once a blood gas arrives stops counting as
// left out, as it would in a replay of everything received.
//
// The evaluation part is, for each patient, what a complete evaluation of
// the patient's stored data leaves out (the engine reports it after a
// complete evaluation, and after incremental ones by a complete
// re-derivation off the evaluation path), and it lives in memory: after a
// restart it counts the patients evaluated since.
type picture struct {
	mu        sync.Mutex
	arrived   map[string]int
	bySubject map[string]evaluation
	reasons   set
}

type evaluation struct {
	inputs, values map[string]int
}

var (
	descInputsLeftOut = prometheus.NewDesc(namespace+"_inputs_left_out",
		"Inputs left out of the derivations as they stand, by reason: what replay's summary counts for the same inputs.", []string{"reason"}, nil)
	descValuesNotEmitted = prometheus.NewDesc(namespace+"_values_not_emitted",
		"Values not emitted in the derivations as they stand, by reason: what replay's summary counts for the same inputs.", []string{"reason"}, nil)
)

func newPicture(reasons set) *picture {
	return &picture{arrived: map[string]int{}, bySubject: map[string]evaluation{}, reasons: reasons}
}

func (p *picture) leftOut(r derive.Reason) {
	p.mu.Lock()
	defer p.mu.Unlock()
	p.arrived[p.reasons.of(string(r))]++
}

func (p *picture) evaluated(subject string, omitted []derive.Omission) {
	ev := evaluation{inputs: map[string]int{}, values: map[string]int{}}
	for _, o := range omitted {
		if o.Code != "" {
			ev.values[p.reasons.of(string(o.Reason))]++
		} else {
			ev.inputs[p.reasons.of(string(o.Reason))]++
		}
	}
	p.mu.Lock()
	defer p.mu.Unlock()
	if len(omitted) == 0 {
		delete(p.bySubject, subject)
		return
	}
	p.bySubject[subject] = ev
}

func (p *picture) Describe(ch chan<- *prometheus.Desc) {
	ch <- descInputsLeftOut
	ch <- descValuesNotEmitted
}

// totals sums what arrived and every patient's latest evaluation.
func (p *picture) totals() (inputs, values map[string]int) {
	p.mu.Lock()
	defer p.mu.Unlock()
	inputs = make(map[string]int, len(p.arrived))
	values = make(map[string]int)
	for r, n := range p.arrived {
		inputs[r] += n
	}
	for _, ev := range p.bySubject {
		for r, n := range ev.inputs {
			inputs[r] += n
		}
		for r, n := range ev.values {
			values[r] += n
		}
	}
	return inputs, values
}

// of is one patient's latest complete evaluation, copied.
func (p *picture) of(subject string) (inputs, values map[string]int) {
	p.mu.Lock()
	defer p.mu.Unlock()
	ev := p.bySubject[subject]
	return maps.Clone(ev.inputs), maps.Clone(ev.values)
}

// Collect reports every known reason and "other", 0 included, so the
// series exist from the start.
func (p *picture) Collect(ch chan<- prometheus.Metric) {
	inputs, values := p.totals()
	for _, r := range produced(reasons()) {
		ch <- prometheus.MustNewConstMetric(descInputsLeftOut, prometheus.GaugeValue, float64(inputs[r]), r)
		ch <- prometheus.MustNewConstMetric(descValuesNotEmitted, prometheus.GaugeValue, float64(values[r]), r)
	}
}

// Omissions is one patient's part of the gauges deadspace_inputs_left_out
// and deadspace_values_not_emitted: what the patient's latest complete
// evaluation left out, by reason (nil maps when it left nothing out or the
// patient has not been evaluated since the start). Inputs left out as they
// arrive are not in it: the engine does not know whose they are. It is for
// the auditor's pages, which show patients; the metrics never label by
// patient.
func (m *Metrics) Omissions(subject string) (inputs, values map[string]int) {
	if m == nil {
		return nil, nil
	}
	return m.picture.of(subject)
}

// OmissionTotals is what the gauges deadspace_inputs_left_out and
// deadspace_values_not_emitted report, by reason.
func (m *Metrics) OmissionTotals() (inputs, values map[string]int) {
	if m == nil {
		return nil, nil
	}
	return m.picture.totals()
}
