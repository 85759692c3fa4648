// Package metrics exports the live service's Prometheus metrics. It owns a
// registry of its own, so nothing is registered globally and tests can build
// as many as they like. The engine, the FHIR client and the webhook are
// instrumented through the plain funcs they already accept
// ([Metrics.EngineHooks], [Metrics.ClientObserver],
// [Metrics.InstrumentWebhook]); the outbox gauges are read from the store
// when Prometheus scrapes ([Metrics.SetStats]), so they are never stale.
//
// Every label takes its value from a closed set and anything else is
// counted as "other". Hook arguments partly come from senders, and no label
// may ever carry a patient, encounter or observation identifier.
//
// # Metrics
//
//	| Metric                                     | Type      | Labels             | Meaning                                                                                   |
//	|--------------------------------------------|-----------|--------------------|-------------------------------------------------------------------------------------------|
//	| deadspace_build_info                       | gauge     | version, goversion | Always 1; the labels say which build is running.                                          |
//	| deadspace_resources_received_total         | counter   | mode, resource_type| Resources decoded, by input mode and resource type (Observation, Patient, other).         |
//	| deadspace_inputs_left_out_total            | counter   | reason             | Inputs not used, by reason code; every reason exists from start at 0.                     |
//	| deadspace_inputs_left_out                  | gauge     | reason             | Inputs left out of the derivations as they stand: replay's "inputs left out" for the same inputs. |
//	| deadspace_values_not_emitted               | gauge     | reason             | Values not emitted in the derivations as they stand: replay's "values not emitted".       |
//	| deadspace_derived_values_total             | counter   | code, status       | Derived Observations recorded, by code and FHIR status (final, amended, entered-in-error).|
//	| deadspace_fhir_request_duration_seconds    | histogram | operation, status  | FHIR request attempts and their latency; status is 2xx, 3xx, 4xx, 429, 5xx or "error" (no response).|
//	| deadspace_outbox_attempts_total            | counter   | outcome            | Outbox write attempts: acknowledged, retry, dead-letter.                                  |
//	| deadspace_outbox_writes                    | gauge     |                    | Writes waiting in the outbox (read from the store at scrape).                             |
//	| deadspace_outbox_oldest_age_seconds        | gauge     |                    | Age of the oldest waiting write; 0 when the outbox is empty.                              |
//	| deadspace_dead_letters                     | gauge     |                    | Writes the server refused for good, held for an operator (read at scrape).                |
//	| deadspace_dead_lettered_total              | counter   |                    | Writes moved to the dead letters since the process started.                               |
//	| deadspace_pending_patients                 | gauge     |                    | Patients with new data waiting to be evaluated (read at scrape).                          |
//	| deadspace_stats_errors_total               | counter   |                    | Scrapes where reading the store's stats failed; the four store gauges are then absent.    |
//	| deadspace_store_transactions_total         | counter   |                    | Embedded store only: read-write transactions, one at a time (bbolt has one writer).        |
//	| deadspace_store_write_calls_total          | counter   |                    | Embedded store only: write calls those transactions ran (concurrent ones share one).       |
//	| deadspace_store_busy_seconds_total         | counter   |                    | Embedded store only: time its writer spent in transactions, syncs included. Its rate is the share of time the writer is busy: near 1, the webhook is at the most it can accept. |
//	| deadspace_subscription_gaps_total          | counter   |                    | Gaps in subscription event numbers, i.e. notifications that never arrived.                |
//	| deadspace_catchups_total                   | counter   | trigger            | Catch-up searches started: start, poll, heartbeat-missed, gap, subscription-restart, retry, rest-hook, read-deferred. |
//	| deadspace_watch_subscribers                | gauge     |                    | Clients currently watching the derivation feed.                                           |
//	| deadspace_webhook_requests_total           | counter   | status             | Webhook requests answered, by HTTP status code.                                           |
//	| deadspace_webhook_request_duration_seconds | histogram |                    | Time to answer a webhook request.                                                         |
//	| deadspace_webhook_requests_in_flight       | gauge     |                    | Webhook requests being handled now.                                                       |
//
// The Go runtime (go_*) and process (process_*) collectors are included, and
// promhttp_metric_handler_errors_total counts failed scrapes.
package metrics

import (
	"context"
	"net/http"
	"runtime"
	"runtime/debug"
	"strconv"
	"sync/atomic"
	"time"

	"github.com/prometheus/client_golang/prometheus"
	"github.com/prometheus/client_golang/prometheus/collectors"
	"github.com/prometheus/client_golang/prometheus/promhttp"

	"github.com/deadspace-fhir/deadspace/api/engine"
	"github.com/deadspace-fhir/deadspace/api/store"
	"github.com/deadspace-fhir/deadspace/derive"
	"github.com/deadspace-fhir/deadspace/fhir/client"
)

const namespace = "deadspace"

// statsTimeout bounds the store read a scrape makes; Prometheus's own
// default scrape timeout is 10 s, and a scrape should answer well within it.
const statsTimeout = 5 * time.Second

// fhirBuckets span a fast local server up to the client's default 60 s
// timeout (client.DefaultTimeout).
var fhirBuckets = []float64{0.005, 0.01, 0.025, 0.05, 0.1, 0.25, 0.5, 1, 2.5, 5, 10, 30, 60}

// StatsFunc reads the outbox state; the store's Stats method fits.
type StatsFunc func(ctx context.Context) (store.Stats, error)

// Metrics is safe for concurrent use. A nil *Metrics is valid and
// instruments nothing, so callers need no branches when metrics are off.
type Metrics struct {
	reg *prometheus.Registry

	received      *prometheus.CounterVec
	leftOut       *prometheus.CounterVec
	derived       *prometheus.CounterVec
	fhirDuration  *prometheus.HistogramVec
	attempts      *prometheus.CounterVec
	deadLettered  prometheus.Counter
	gaps          prometheus.Counter
	catchUps      *prometheus.CounterVec
	evaluations   *prometheus.CounterVec
	watchers      prometheus.Gauge
	webhookCount  *prometheus.CounterVec
	webhookDur    prometheus.Histogram
	webhookActive prometheus.Gauge
	writesStopped prometheus.Gauge
	// statsErrors is reported by statsCollector itself, so a failure shows
	// in the very scrape it happened in.
	statsErrors atomic.Uint64

	picture *picture

	stats atomic.Pointer[StatsFunc]
	// commits reads the embedded store's committer (SetCommits).
	commits atomic.Pointer[func() store.CommitStats]
	now     func() time.Time

	modes, resourceTypes, reasons, codes, statuses, triggers, outcomes, operations, webhookStatuses set
}

// New returns metrics registered in a registry of their own. version is
// the build's version; when empty, the main module's version from the
// build info is used.
func New(version string) *Metrics {
	m := &Metrics{
		reg: prometheus.NewRegistry(),
		now: time.Now,

		modes: newSet(modes), resourceTypes: newSet(resourceTypes), reasons: newSet(reasons()),
		codes: newSet(codes()), statuses: newSet(entryStatuses), triggers: newSet(triggers),
		outcomes: newSet(outcomes), operations: newSet(operations), webhookStatuses: newSet(webhookStatuses),
	}
	m.picture = newPicture(m.reasons)
	counterVec := func(name, help string, labels ...string) *prometheus.CounterVec {
		return prometheus.NewCounterVec(prometheus.CounterOpts{Namespace: namespace, Name: name, Help: help}, labels)
	}
	counter := func(name, help string) prometheus.Counter {
		return prometheus.NewCounter(prometheus.CounterOpts{Namespace: namespace, Name: name, Help: help})
	}
	gauge := func(name, help string) prometheus.Gauge {
		return prometheus.NewGauge(prometheus.GaugeOpts{Namespace: namespace, Name: name, Help: help})
	}

	m.received = counterVec("resources_received_total",
		"Resources decoded by the engine, by input mode and resource type.", "mode", "resource_type")
	m.leftOut = counterVec("inputs_left_out_total",
		"Inputs not used, by reason code.", "reason")
	m.derived = counterVec("derived_values_total",
		"Derived Observations recorded in the ledger, by code and FHIR status.", "code", "status")
	m.fhirDuration = prometheus.NewHistogramVec(prometheus.HistogramOpts{
		Namespace: namespace, Name: "fhir_request_duration_seconds",
		Help:    "FHIR request attempts and their latency, by operation and HTTP status class (429 apart; \"error\" when no response arrived).",
		Buckets: fhirBuckets,
	}, []string{"operation", "status"})
	m.attempts = counterVec("outbox_attempts_total",
		"Outbox write attempts, by outcome.", "outcome")
	m.deadLettered = counter("dead_lettered_total",
		"Writes moved to the dead letters.")
	m.gaps = counter("subscription_gaps_total",
		"Gaps in subscription event numbers: skipped events that did not arrive within the gap grace.")
	m.catchUps = counterVec("catchups_total",
		"Catch-up searches started, by trigger.", "trigger")
	m.evaluations = counterVec("evaluations_total",
		"Patient evaluations begun, by what their new data held: a blood gas, or device readings and patient facts only (held back by --device-pace).", "data")
	m.watchers = gauge("watch_subscribers",
		"Clients currently watching the derivation feed.")
	m.webhookCount = counterVec("webhook_requests_total",
		"Webhook requests answered, by HTTP status.", "status")
	m.webhookDur = prometheus.NewHistogram(prometheus.HistogramOpts{
		Namespace: namespace, Name: "webhook_request_duration_seconds",
		Help:    "Time to answer a webhook request.",
		Buckets: prometheus.DefBuckets,
	})
	m.webhookActive = gauge("webhook_requests_in_flight",
		"Webhook requests being handled now.")
	m.writesStopped = gauge("writes_stopped",
		"1 while the writer sends nothing because the software Device cannot be resolved on the FHIR server, else 0.")

	if version == "" {
		version = "unknown"
		if bi, ok := debug.ReadBuildInfo(); ok && bi.Main.Version != "" {
			version = bi.Main.Version
		}
	}
	buildInfo := prometheus.NewGaugeVec(prometheus.GaugeOpts{
		Namespace: namespace, Name: "build_info",
		Help: "Always 1; the labels say which build is running.",
	}, []string{"version", "goversion"})
	buildInfo.WithLabelValues(version, runtime.Version()).Set(1)

	m.reg.MustRegister(
		collectors.NewGoCollector(),
		collectors.NewProcessCollector(collectors.ProcessCollectorOpts{}),
		buildInfo,
		m.received, m.leftOut, m.derived, m.fhirDuration, m.attempts, m.deadLettered,
		m.gaps, m.catchUps, m.evaluations, m.watchers, m.webhookCount, m.webhookDur, m.webhookActive, m.writesStopped,
		statsCollector{m}, commitCollector{m}, m.picture,
	)
	m.predeclare()
	return m
}

// predeclare creates every series a label can take, "other" included
// wherever a value goes through a closed set, so a rate or an alert on them
// has a 0 to start from instead of no data. The FHIR status classes have no
// fallback: fhirStatus maps every answer to one of them.
func (m *Metrics) predeclare() {
	for _, mode := range produced(modes) {
		for _, rt := range produced(resourceTypes) {
			m.received.WithLabelValues(mode, rt)
		}
	}
	for _, r := range produced(reasons()) {
		m.leftOut.WithLabelValues(r)
	}
	for _, c := range produced(codes()) {
		for _, s := range produced(entryStatuses) {
			m.derived.WithLabelValues(c, s)
		}
	}
	for _, o := range produced(outcomes) {
		m.attempts.WithLabelValues(o)
	}
	for _, t := range produced(triggers) {
		m.catchUps.WithLabelValues(t)
	}
	for _, d := range evaluationData {
		m.evaluations.WithLabelValues(d)
	}
	for _, op := range produced(operations) {
		for _, st := range fhirStatuses {
			m.fhirDuration.WithLabelValues(op, st)
		}
	}
	for _, st := range produced(webhookStatuses) {
		m.webhookCount.WithLabelValues(st)
	}
}

// Registry is the registry the metrics live in, for callers that gather
// directly or add collectors of their own.
func (m *Metrics) Registry() *prometheus.Registry { return m.reg }

// Handler serves the registry in the Prometheus text format (or another
// format the scraper asks for). A collector that fails leaves its metrics
// out of that scrape rather than failing the whole page.
func (m *Metrics) Handler() http.Handler {
	return promhttp.HandlerFor(m.reg, promhttp.HandlerOpts{
		Registry:      m.reg,
		ErrorHandling: promhttp.ContinueOnError,
	})
}

// EngineHooks returns hooks that count what the engine reports.
func (m *Metrics) EngineHooks() engine.Hooks {
	if m == nil {
		return engine.Hooks{}
	}
	return engine.Hooks{
		Received: func(mode, resourceType string) {
			m.received.WithLabelValues(m.modes.of(mode), m.resourceTypes.of(resourceType)).Inc()
		},
		LeftOut: func(reason derive.Reason) {
			m.leftOut.WithLabelValues(m.reasons.of(string(reason))).Inc()
			m.picture.leftOut(reason)
		},
		Evaluated: m.picture.evaluated,
		Emitted: func(code, status string) {
			m.derived.WithLabelValues(m.codes.of(code), m.statuses.of(status)).Inc()
		},
		Gap:        m.gaps.Inc,
		CatchUp:    func(trigger string) { m.catchUps.WithLabelValues(m.triggers.of(trigger)).Inc() },
		DeadLetter: m.deadLettered.Inc,
		Evaluation: func(bloodGas bool) {
			data := evaluationData[1]
			if bloodGas {
				data = evaluationData[0]
			}
			m.evaluations.WithLabelValues(data).Inc()
		},
		WriteResult: func(outcome string) {
			m.attempts.WithLabelValues(m.outcomes.of(outcome)).Inc()
		},
		WritesStopped: func(stopped bool) {
			if stopped {
				m.writesStopped.Set(1)
			} else {
				m.writesStopped.Set(0)
			}
		},
	}
}

// ClientObserver returns an observer that records each FHIR request
// attempt. Status 0 (no response: a network failure or timeout) is
// labelled "error".
func (m *Metrics) ClientObserver() client.Observer {
	if m == nil {
		return nil
	}
	return func(op string, status int, dur time.Duration) {
		m.fhirDuration.WithLabelValues(m.operations.of(op), fhirStatus(status)).Observe(dur.Seconds())
	}
}

// SetStats sets the function the outbox gauges are read from at scrape
// time. Until it is set, those gauges are absent.
func (m *Metrics) SetStats(f func(ctx context.Context) (store.Stats, error)) {
	if m == nil {
		return
	}
	if f == nil {
		m.stats.Store(nil)
		return
	}
	sf := StatsFunc(f)
	m.stats.Store(&sf)
}

// SetCommits installs the reading of the store's committer
// (store.Committer), read at each scrape; a store without one (PostgreSQL,
// whose server merges commits itself) leaves it unset, and its series out.
func (m *Metrics) SetCommits(f func() store.CommitStats) {
	if m == nil {
		return
	}
	if f == nil {
		m.commits.Store(nil)
		return
	}
	m.commits.Store(&f)
}

// IncWatchSubscribers counts a client that started watching the feed.
func (m *Metrics) IncWatchSubscribers() {
	if m != nil {
		m.watchers.Inc()
	}
}

// DecWatchSubscribers counts a client that stopped watching the feed.
func (m *Metrics) DecWatchSubscribers() {
	if m != nil {
		m.watchers.Dec()
	}
}

// InstrumentWebhook counts and times the requests h answers. Nothing about
// the request (path, query, headers) becomes a label: a rest-hook path can
// carry a resource id.
func (m *Metrics) InstrumentWebhook(h http.Handler) http.Handler {
	if m == nil {
		return h
	}
	return http.HandlerFunc(func(w http.ResponseWriter, r *http.Request) {
		m.webhookActive.Inc()
		defer m.webhookActive.Dec()
		start := time.Now()
		sw := &statusWriter{ResponseWriter: w}
		h.ServeHTTP(sw, r)
		// Counted only on a normal return: a panicking handler has its
		// connection aborted by net/http, so no status was ever sent.
		status := sw.status
		if status == 0 {
			status = http.StatusOK // what net/http sends when the handler writes nothing
		}
		m.webhookCount.WithLabelValues(m.webhookStatuses.of(strconv.Itoa(status))).Inc()
		m.webhookDur.Observe(time.Since(start).Seconds())
	})
}

// statusWriter remembers the status sent. Unwrap lets
// http.ResponseController reach the underlying writer's Flush and
// deadlines.
type statusWriter struct {
	http.ResponseWriter
	status int
}

func (w *statusWriter) WriteHeader(code int) {
	// 1xx responses are informational; the final status comes after them.
	if w.status == 0 && code >= 200 {
		w.status = code
	}
	w.ResponseWriter.WriteHeader(code)
}

func (w *statusWriter) Write(b []byte) (int, error) {
	if w.status == 0 {
		w.status = http.StatusOK
	}
	return w.ResponseWriter.Write(b)
}

func (w *statusWriter) Unwrap() http.ResponseWriter { return w.ResponseWriter }

// commitCollector reports the embedded store's committer's counters.
type commitCollector struct{ m *Metrics }

var (
	descStoreTransactions = prometheus.NewDesc(namespace+"_store_transactions_total",
		"Read-write transactions of the embedded store, committed or rolled back, one at a time.", nil, nil)
	descStoreWriteCalls = prometheus.NewDesc(namespace+"_store_write_calls_total",
		"Write calls the embedded store's transactions ran (concurrent calls share a transaction).", nil, nil)
	descStoreBusy = prometheus.NewDesc(namespace+"_store_busy_seconds_total",
		"Time the embedded store's single writer spent in transactions, syncs included; its rate is the share of time it is busy.", nil, nil)
)

func (c commitCollector) Describe(ch chan<- *prometheus.Desc) {
	ch <- descStoreTransactions
	ch <- descStoreWriteCalls
	ch <- descStoreBusy
}

func (c commitCollector) Collect(ch chan<- prometheus.Metric) {
	f := c.m.commits.Load()
	if f == nil {
		return
	}
	st := (*f)()
	ch <- prometheus.MustNewConstMetric(descStoreTransactions, prometheus.CounterValue, float64(st.Transactions))
	ch <- prometheus.MustNewConstMetric(descStoreWriteCalls, prometheus.CounterValue, float64(st.Calls))
	ch <- prometheus.MustNewConstMetric(descStoreBusy, prometheus.CounterValue, st.Busy.Seconds())
}

// statsCollector reads the store once per scrape and reports the outbox
// gauges from that one reading, so they agree with each other.
type statsCollector struct{ m *Metrics }

var (
	descOutboxWrites = prometheus.NewDesc(namespace+"_outbox_writes",
		"Writes waiting in the outbox.", nil, nil)
	descOutboxAge = prometheus.NewDesc(namespace+"_outbox_oldest_age_seconds",
		"Age of the oldest write waiting in the outbox; 0 when it is empty.", nil, nil)
	descDeadLetters = prometheus.NewDesc(namespace+"_dead_letters",
		"Writes the FHIR server refused for good, held for an operator.", nil, nil)
	descPending = prometheus.NewDesc(namespace+"_pending_patients",
		"Patients with new data waiting to be evaluated.", nil, nil)
	descStatsErrors = prometheus.NewDesc(namespace+"_stats_errors_total",
		"Scrapes where reading the store's outbox stats failed.", nil, nil)
)

func (c statsCollector) Describe(ch chan<- *prometheus.Desc) {
	ch <- descOutboxWrites
	ch <- descOutboxAge
	ch <- descDeadLetters
	ch <- descPending
	ch <- descStatsErrors
}

func (c statsCollector) Collect(ch chan<- prometheus.Metric) {
	f := c.m.stats.Load()
	if f == nil {
		ch <- prometheus.MustNewConstMetric(descStatsErrors, prometheus.CounterValue, float64(c.m.statsErrors.Load()))
		return
	}
	ctx, cancel := context.WithTimeout(context.Background(), statsTimeout)
	defer cancel()
	s, err := (*f)(ctx)
	if err != nil {
		// Leaving the gauges out, rather than reporting zeros, keeps an
		// alert on a growing outbox from clearing because the store is
		// unreadable; the error counter says why they are missing.
		ch <- prometheus.MustNewConstMetric(descStatsErrors, prometheus.CounterValue, float64(c.m.statsErrors.Add(1)))
		return
	}
	ch <- prometheus.MustNewConstMetric(descStatsErrors, prometheus.CounterValue, float64(c.m.statsErrors.Load()))
	age := 0.0
	if !s.OldestWrite.IsZero() {
		age = max(c.m.now().Sub(s.OldestWrite).Seconds(), 0)
	}
	ch <- prometheus.MustNewConstMetric(descOutboxWrites, prometheus.GaugeValue, float64(s.OutboxDepth))
	ch <- prometheus.MustNewConstMetric(descOutboxAge, prometheus.GaugeValue, age)
	ch <- prometheus.MustNewConstMetric(descDeadLetters, prometheus.GaugeValue, float64(s.DeadLetters))
	ch <- prometheus.MustNewConstMetric(descPending, prometheus.GaugeValue, float64(s.DirtyPatients))
}
