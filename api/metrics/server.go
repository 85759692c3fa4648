package metrics

import "github.com/prometheus/client_golang/prometheus"

// SetFHIRServer adds deadspace_fhir_server_up, read at scrape time from
// the service's one tracker of the FHIR server (the same that readiness,
// gRPC health and the pages' operations view read): 1 while the server
// answers, 0 when it has not answered yet or its last request failed. A
// standalone service, with no server, never calls it.
func (m *Metrics) SetFHIRServer(up func() bool) {
	if m == nil || up == nil {
		return
	}
	m.reg.MustRegister(prometheus.NewGaugeFunc(prometheus.GaugeOpts{
		Namespace: namespace, Name: "fhir_server_up",
		Help: "1 while the FHIR server answers, 0 when it has not answered yet or its last request failed.",
	}, func() float64 {
		if up() {
			return 1
		}
		return 0
	}))
}
