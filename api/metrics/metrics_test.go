package metrics

import (
	"context"
	"errors"
	"io"
	"net/http"
	"net/http/httptest"
	"regexp"
	"runtime"
	"slices"
	"strconv"
	"strings"
	"testing"
	"time"

	"github.com/prometheus/client_golang/prometheus/testutil"
	"github.com/prometheus/client_golang/prometheus/testutil/promlint"
	dto "github.com/prometheus/client_model/go"
	"github.com/prometheus/common/expfmt"
	"github.com/prometheus/common/model"

	"github.com/deadspace-fhir/deadspace/api/engine"
	"github.com/deadspace-fhir/deadspace/api/store"
	"github.com/deadspace-fhir/deadspace/derive"
)

// scrape fetches the handler's page the way Prometheus does, asking for
// nothing in particular, and returns the response.
func scrape(t *testing.T, m *Metrics) *http.Response {
	t.Helper()
	rec := httptest.NewRecorder()
	m.Handler().ServeHTTP(rec, httptest.NewRequest(http.MethodGet, "/metrics", nil))
	return rec.Result()
}

// feedEverything drives every hook and instrument once with ordinary values,
// so a scrape holds one of each series kind.
func feedEverything(t *testing.T, m *Metrics) {
	t.Helper()
	h := m.EngineHooks()
	h.Received("notification", "Observation")
	h.LeftOut(derive.ReasonNotArterial)
	h.Emitted(string(derive.CodePhysiologic), "final")
	h.Gap()
	h.CatchUp("gap")
	h.DeadLetter()
	h.WriteResult("dead-letter")
	obs := m.ClientObserver()
	obs("transaction", 200, 40*time.Millisecond)
	obs("search", 0, 2*time.Second)
	m.IncWatchSubscribers()
	m.SetStats(func(context.Context) (store.Stats, error) {
		return store.Stats{OutboxDepth: 3, OldestWrite: time.Unix(1_700_000_000, 0), DeadLetters: 1, DirtyPatients: 2}, nil
	})
	wh := m.InstrumentWebhook(http.HandlerFunc(func(w http.ResponseWriter, r *http.Request) {
		w.WriteHeader(http.StatusAccepted)
	}))
	wh.ServeHTTP(httptest.NewRecorder(), httptest.NewRequest(http.MethodPost, "/fhir/webhook", nil))
}

// Lint rules are promlint's, from github.com/prometheus/client_golang
// v1.25.0, which encode the Prometheus naming practices
// (prometheus.io/docs/practices/naming: _total on counters, base units,
// snake_case, help text on every family).
func TestScrapePassesPromlint(t *testing.T) {
	m := New("1.2.3")
	feedEverything(t, m)
	resp := scrape(t, m)
	defer resp.Body.Close()
	if resp.StatusCode != http.StatusOK {
		t.Fatalf("scrape status %d", resp.StatusCode)
	}
	problems, err := promlint.New(resp.Body).Lint()
	if err != nil {
		t.Fatalf("lint: %v", err)
	}
	for _, p := range problems {
		t.Errorf("promlint: %s: %s", p.Metric, p.Text)
	}
}

// The handler must answer a scraper that sends no Accept header with the
// text exposition format 0.0.4 (Prometheus "Exposition formats", text-based
// format), and the page must parse with the reference parser from
// github.com/prometheus/common (expfmt).
func TestHandlerServesTextFormat(t *testing.T) {
	m := New("1.2.3")
	feedEverything(t, m)
	resp := scrape(t, m)
	defer resp.Body.Close()
	ct := resp.Header.Get("Content-Type")
	if !strings.HasPrefix(ct, "text/plain") || !strings.Contains(ct, "version=0.0.4") {
		t.Fatalf("Content-Type %q, want text/plain; version=0.0.4", ct)
	}
	body, err := io.ReadAll(resp.Body)
	if err != nil {
		t.Fatal(err)
	}
	p := expfmt.NewTextParser(model.LegacyValidation)
	fams, err := p.TextToMetricFamilies(strings.NewReader(string(body)))
	if err != nil {
		t.Fatalf("page does not parse: %v", err)
	}
	for _, want := range []string{
		"deadspace_build_info", "deadspace_resources_received_total", "deadspace_inputs_left_out_total",
		"deadspace_derived_values_total", "deadspace_fhir_request_duration_seconds",
		"deadspace_outbox_attempts_total", "deadspace_outbox_writes", "deadspace_outbox_oldest_age_seconds",
		"deadspace_dead_letters", "deadspace_dead_lettered_total", "deadspace_pending_patients",
		"deadspace_stats_errors_total", "deadspace_subscription_gaps_total", "deadspace_catchups_total",
		"deadspace_evaluations_total", "deadspace_watch_subscribers", "deadspace_webhook_requests_total",
		"deadspace_webhook_request_duration_seconds", "deadspace_webhook_requests_in_flight",
		"deadspace_writes_stopped", "go_goroutines", "process_start_time_seconds",
	} {
		if _, ok := fams[want]; !ok {
			t.Errorf("scrape lacks %s", want)
		}
	}
	want := `deadspace_build_info{goversion="` + runtime.Version() + `",version="1.2.3"} 1`
	if !strings.Contains(string(body), want) {
		t.Errorf("scrape lacks %q", want)
	}
}

// identifier matches FHIR relative references (FHIR R4 §3.1.0.1.2
// "Relative references": Type/id) of the kinds this service handles.
var identifier = regexp.MustCompile(`Patient/|Observation/|Encounter/`)

// Every hook argument that could be misused to pass a reference gets one
// here; none may surface as a label value.
func TestNoIdentifierReachesALabel(t *testing.T) {
	m := New("1.2.3")
	h := m.EngineHooks()
	h.Received("Patient/p1", "Observation/o1")
	h.Received("notification", "Encounter/e1")
	h.LeftOut(derive.Reason("Observation/o2"))
	h.Emitted("Patient/p2", "Observation/o3")
	h.CatchUp("Encounter/e2")
	h.WriteResult("Patient/p3")
	m.ClientObserver()("Observation/o4", 404, time.Millisecond)
	m.InstrumentWebhook(http.HandlerFunc(func(w http.ResponseWriter, r *http.Request) {
		w.WriteHeader(http.StatusOK)
	})).ServeHTTP(httptest.NewRecorder(), httptest.NewRequest(http.MethodPut, "/fhir/webhook/Observation/o5?subject=Patient/p4", nil))

	fams, err := m.Registry().Gather()
	if err != nil {
		t.Fatal(err)
	}
	var seen int
	for _, f := range fams {
		for _, s := range f.GetMetric() {
			for _, l := range s.GetLabel() {
				seen++
				if identifier.MatchString(l.GetValue()) {
					t.Errorf("%s{%s=%q} carries an identifier", f.GetName(), l.GetName(), l.GetValue())
				}
			}
		}
	}
	if seen == 0 {
		t.Fatal("no labels gathered; the check above checked nothing")
	}
	// The fed values must have been counted, just not under their own name.
	if got := testutil.ToFloat64(m.received.WithLabelValues(other, other)); got != 1 {
		t.Errorf("received{other,other} = %v, want 1", got)
	}
}

// Counts must equal what was fed; the expected values are the feed itself.
func TestEngineHooksCount(t *testing.T) {
	tests := []struct {
		name  string
		feed  func(h engine.Hooks)
		check func(m *Metrics) float64
		want  float64
	}{
		{"received by mode and type", func(h engine.Hooks) {
			for range 3 {
				h.Received("poll", "Observation")
			}
			h.Received("poll", "Patient")
		}, func(m *Metrics) float64 { return testutil.ToFloat64(m.received.WithLabelValues("poll", "Observation")) }, 3},
		{"unknown resource type counts as other", func(h engine.Hooks) {
			h.Received("rest-hook", "Bundle")
			h.Received("rest-hook", "Device")
		}, func(m *Metrics) float64 { return testutil.ToFloat64(m.received.WithLabelValues("rest-hook", other)) }, 2},
		{"left out by reason", func(h engine.Hooks) {
			h.LeftOut(derive.ReasonCensored)
			h.LeftOut(derive.ReasonCensored)
			h.LeftOut(derive.ReasonNoTime)
		}, func(m *Metrics) float64 {
			return testutil.ToFloat64(m.leftOut.WithLabelValues(string(derive.ReasonCensored)))
		}, 2},
		{"emitted by code and status", func(h engine.Hooks) {
			h.Emitted(string(derive.CodeAlveolarFraction), "amended")
			h.Emitted(string(derive.CodeAlveolarFraction), "final")
		}, func(m *Metrics) float64 {
			return testutil.ToFloat64(m.derived.WithLabelValues(string(derive.CodeAlveolarFraction), "amended"))
		}, 1},
		{"emitted without a readable code", func(h engine.Hooks) { h.Emitted("", "final") },
			func(m *Metrics) float64 { return testutil.ToFloat64(m.derived.WithLabelValues(other, "final")) }, 1},
		{"gaps", func(h engine.Hooks) { h.Gap(); h.Gap() },
			func(m *Metrics) float64 { return testutil.ToFloat64(m.gaps) }, 2},
		{"catch-ups by trigger", func(h engine.Hooks) { h.CatchUp("heartbeat-missed"); h.CatchUp("start") },
			func(m *Metrics) float64 { return testutil.ToFloat64(m.catchUps.WithLabelValues("heartbeat-missed")) }, 1},
		{"catch-ups owed to reads deferred for the fetch budget", func(h engine.Hooks) { h.CatchUp("read-deferred"); h.CatchUp("gap") },
			func(m *Metrics) float64 { return testutil.ToFloat64(m.catchUps.WithLabelValues("read-deferred")) }, 1},
		{"dead letters", func(h engine.Hooks) { h.DeadLetter() },
			func(m *Metrics) float64 { return testutil.ToFloat64(m.deadLettered) }, 1},
		{"write outcomes", func(h engine.Hooks) {
			h.WriteResult("retry")
			h.WriteResult("retry")
			h.WriteResult("acknowledged")
		}, func(m *Metrics) float64 { return testutil.ToFloat64(m.attempts.WithLabelValues("retry")) }, 2},
	}
	for _, tt := range tests {
		t.Run(tt.name, func(t *testing.T) {
			m := New("test")
			tt.feed(m.EngineHooks())
			if got := tt.check(m); got != tt.want {
				t.Errorf("got %v, want %v", got, tt.want)
			}
		})
	}
}

// Every series a label can take exists at 0 before anything happens, so
// increase() and the alerts have a starting point: each known value (the
// sets in labels.go, derive.AllReasons() and encode.Codes()) and "other",
// which stands for anything outside them. Each case then feeds its metric
// every known value and one from outside the sets: no series may appear on
// first use.
func TestKnownSeriesStartAtZero(t *testing.T) {
	const unknown = "not-in-any-set"
	plusOther := func(values []string) int { return len(values) + 1 }
	// every is each value of a set and one outside it.
	every := func(values []string) []string { return append(slices.Clone(values), unknown) }
	tests := []struct {
		name   string
		metric string
		want   int
		// fallback is the labels of one series that only "other" can fill.
		fallback map[string]string
		use      func(m *Metrics)
	}{
		{"every reason", "deadspace_inputs_left_out_total", plusOther(reasons()), map[string]string{"reason": other}, func(m *Metrics) {
			for _, r := range every(reasons()) {
				m.EngineHooks().LeftOut(derive.Reason(r))
			}
		}},
		{"every code and status", "deadspace_derived_values_total", plusOther(codes()) * plusOther(entryStatuses), map[string]string{"code": other, "status": other}, func(m *Metrics) {
			for _, c := range every(codes()) {
				for _, st := range every(entryStatuses) {
					m.EngineHooks().Emitted(c, st)
				}
			}
		}},
		{"every trigger", "deadspace_catchups_total", plusOther(triggers), map[string]string{"trigger": other}, func(m *Metrics) {
			for _, tr := range every(triggers) {
				m.EngineHooks().CatchUp(tr)
			}
		}},
		{"every outcome", "deadspace_outbox_attempts_total", plusOther(outcomes), map[string]string{"outcome": other}, func(m *Metrics) {
			for _, o := range every(outcomes) {
				m.EngineHooks().WriteResult(o)
			}
		}},
		{"every mode and type", "deadspace_resources_received_total", plusOther(modes) * plusOther(resourceTypes), map[string]string{"mode": other, "resource_type": other}, func(m *Metrics) {
			for _, mode := range every(modes) {
				for _, rt := range every(resourceTypes) {
					m.EngineHooks().Received(mode, rt)
				}
			}
		}},
		// fhirStatus maps every answer to a class: no fallback there.
		{"every operation and status class", "deadspace_fhir_request_duration_seconds", plusOther(operations) * len(fhirStatuses), map[string]string{"operation": other, "status": "error"}, func(m *Metrics) {
			for _, op := range every(operations) {
				for _, code := range []int{0, -1, 101, 200, 204, 304, 404, 418, 429, 500, 503, 1000} {
					m.ClientObserver()(op, code, time.Millisecond)
				}
			}
		}},
		{"every webhook status", "deadspace_webhook_requests_total", plusOther(webhookStatuses), map[string]string{"status": other}, func(m *Metrics) {
			codes := []int{http.StatusTeapot, http.StatusNotImplemented, 299}
			for _, st := range webhookStatuses {
				n, err := strconv.Atoi(st)
				if err != nil {
					t.Fatal(err)
				}
				codes = append(codes, n)
			}
			for _, code := range codes {
				h := m.InstrumentWebhook(http.HandlerFunc(func(w http.ResponseWriter, r *http.Request) { w.WriteHeader(code) }))
				h.ServeHTTP(httptest.NewRecorder(), httptest.NewRequest(http.MethodPost, "/notify", nil))
			}
		}},
		{"inputs left out, every reason", "deadspace_inputs_left_out", plusOther(reasons()), map[string]string{"reason": other}, func(m *Metrics) {
			var omitted []derive.Omission
			for _, r := range every(reasons()) {
				omitted = append(omitted, derive.Omission{Ref: "Observation/o1", Reason: derive.Reason(r)})
				m.EngineHooks().LeftOut(derive.Reason(r))
			}
			m.EngineHooks().Evaluated("Patient/p1", omitted)
		}},
		{"values not emitted, every reason", "deadspace_values_not_emitted", plusOther(reasons()), map[string]string{"reason": other}, func(m *Metrics) {
			var omitted []derive.Omission
			for _, r := range every(reasons()) {
				omitted = append(omitted, derive.Omission{Code: derive.CodePhysiologic, Reason: derive.Reason(r)})
			}
			m.EngineHooks().Evaluated("Patient/p1", omitted)
		}},
	}
	for _, tt := range tests {
		t.Run(tt.name, func(t *testing.T) {
			m := New("test")
			if n := seriesOf(t, m, tt.metric); n != tt.want {
				t.Errorf("%s has %d series at the start, want %d", tt.metric, n, tt.want)
			}
			if v, ok := valueOf(t, m, tt.metric, tt.fallback); !ok || v != 0 {
				t.Errorf("%s%v at the start: %v (present %v), want 0", tt.metric, tt.fallback, v, ok)
			}
			tt.use(m)
			if n := seriesOf(t, m, tt.metric); n != tt.want {
				t.Errorf("%s has %d series after every value was used, want the %d it started with", tt.metric, n, tt.want)
			}
			if v, ok := valueOf(t, m, tt.metric, tt.fallback); !ok || v == 0 {
				t.Errorf("%s%v after a value outside the sets: %v (present %v), want it counted", tt.metric, tt.fallback, v, ok)
			}
		})
	}
	if got := testutil.ToFloat64(New("test").leftOut.WithLabelValues(string(derive.ReasonUnpaired))); got != 0 {
		t.Errorf("a fresh counter reads %v", got)
	}
}

// Evaluations are counted by what their new data held, both series from
// zero at the start.
func TestEvaluationsByData(t *testing.T) {
	m := New("test")
	const metric = "deadspace_evaluations_total"
	for _, d := range []string{"blood-gas", "device"} {
		if v, ok := valueOf(t, m, metric, map[string]string{"data": d}); !ok || v != 0 {
			t.Errorf("%s{data=%q} at the start: %v (present %v), want 0", metric, d, v, ok)
		}
	}
	hooks := m.EngineHooks()
	hooks.Evaluation(true)
	hooks.Evaluation(true)
	hooks.Evaluation(false)
	for d, want := range map[string]float64{"blood-gas": 2, "device": 1} {
		if v, _ := valueOf(t, m, metric, map[string]string{"data": d}); v != want {
			t.Errorf("%s{data=%q} = %v, want %v", metric, d, v, want)
		}
	}
	if n := seriesOf(t, m, metric); n != 2 {
		t.Errorf("%s has %d series, want 2", metric, n)
	}
}

// seriesOf counts the series of one metric in a scrape.
func seriesOf(t *testing.T, m *Metrics, metric string) int {
	t.Helper()
	n, err := testutil.GatherAndCount(m.Registry(), metric)
	if err != nil {
		t.Fatal(err)
	}
	return n
}

// valueOf is the value of the series of metric with exactly these labels
// (a histogram's sample count), and whether the scrape has it.
func valueOf(t *testing.T, m *Metrics, metric string, labels map[string]string) (float64, bool) {
	t.Helper()
	fams, err := m.Registry().Gather()
	if err != nil {
		t.Fatal(err)
	}
	for _, fam := range fams {
		if fam.GetName() != metric {
			continue
		}
	series:
		for _, s := range fam.GetMetric() {
			if len(s.GetLabel()) != len(labels) {
				continue
			}
			for _, l := range s.GetLabel() {
				if labels[l.GetName()] != l.GetValue() {
					continue series
				}
			}
			switch {
			case s.GetCounter() != nil:
				return s.GetCounter().GetValue(), true
			case s.GetGauge() != nil:
				return s.GetGauge().GetValue(), true
			case s.GetHistogram() != nil:
				return float64(s.GetHistogram().GetSampleCount()), true
			}
		}
	}
	return 0, false
}

func TestClientObserver(t *testing.T) {
	m := New("test")
	obs := m.ClientObserver()
	obs("transaction", 200, 30*time.Millisecond)
	obs("transaction", 200, 3*time.Second)
	obs("transaction", 0, 60*time.Second) // no response: network failure
	obs("read", 429, time.Millisecond)
	obs("patch", 200, time.Millisecond) // not an operation the client has
	obs("read", 1000, time.Millisecond) // not an HTTP status

	tests := []struct {
		op, status string
		count      uint64
		sum        float64
	}{
		{"transaction", "2xx", 2, 3.03},
		{"transaction", "error", 1, 60},
		{"read", "429", 1, 0.001},
		{other, "2xx", 1, 0.001},
		{"read", "error", 1, 0.001},
		{"read", "5xx", 0, 0},
	}
	for _, tt := range tests {
		t.Run(tt.op+" "+tt.status, func(t *testing.T) {
			var d dto.Metric
			h, err := m.fhirDuration.GetMetricWithLabelValues(tt.op, tt.status)
			if err != nil {
				t.Fatal(err)
			}
			if err := h.(interface{ Write(*dto.Metric) error }).Write(&d); err != nil {
				t.Fatal(err)
			}
			if got := d.GetHistogram().GetSampleCount(); got != tt.count {
				t.Errorf("count %d, want %d", got, tt.count)
			}
			if got := d.GetHistogram().GetSampleSum(); got < tt.sum-1e-9 || got > tt.sum+1e-9 {
				t.Errorf("sum %v, want %v", got, tt.sum)
			}
		})
	}
}

func TestStatsGauges(t *testing.T) {
	now := time.Date(2024, 3, 14, 3, 0, 0, 0, time.UTC)
	tests := []struct {
		name  string
		stats func(context.Context) (store.Stats, error)
		want  string
	}{
		{"outbox with an old write", func(context.Context) (store.Stats, error) {
			return store.Stats{OutboxDepth: 7, OldestWrite: now.Add(-90 * time.Second), DeadLetters: 2, DirtyPatients: 4}, nil
		}, `
# HELP deadspace_dead_letters Writes the FHIR server refused for good, held for an operator.
# TYPE deadspace_dead_letters gauge
deadspace_dead_letters 2
# HELP deadspace_outbox_oldest_age_seconds Age of the oldest write waiting in the outbox; 0 when it is empty.
# TYPE deadspace_outbox_oldest_age_seconds gauge
deadspace_outbox_oldest_age_seconds 90
# HELP deadspace_outbox_writes Writes waiting in the outbox.
# TYPE deadspace_outbox_writes gauge
deadspace_outbox_writes 7
# HELP deadspace_pending_patients Patients with new data waiting to be evaluated.
# TYPE deadspace_pending_patients gauge
deadspace_pending_patients 4
# HELP deadspace_stats_errors_total Scrapes where reading the store's outbox stats failed.
# TYPE deadspace_stats_errors_total counter
deadspace_stats_errors_total 0
`},
		{"empty outbox has age 0", func(context.Context) (store.Stats, error) {
			return store.Stats{}, nil
		}, `
# HELP deadspace_dead_letters Writes the FHIR server refused for good, held for an operator.
# TYPE deadspace_dead_letters gauge
deadspace_dead_letters 0
# HELP deadspace_outbox_oldest_age_seconds Age of the oldest write waiting in the outbox; 0 when it is empty.
# TYPE deadspace_outbox_oldest_age_seconds gauge
deadspace_outbox_oldest_age_seconds 0
# HELP deadspace_outbox_writes Writes waiting in the outbox.
# TYPE deadspace_outbox_writes gauge
deadspace_outbox_writes 0
# HELP deadspace_pending_patients Patients with new data waiting to be evaluated.
# TYPE deadspace_pending_patients gauge
deadspace_pending_patients 0
# HELP deadspace_stats_errors_total Scrapes where reading the store's outbox stats failed.
# TYPE deadspace_stats_errors_total counter
deadspace_stats_errors_total 0
`},
		{"unreadable store leaves the gauges out", func(context.Context) (store.Stats, error) {
			return store.Stats{}, errors.New("store closed")
		}, `
# HELP deadspace_stats_errors_total Scrapes where reading the store's outbox stats failed.
# TYPE deadspace_stats_errors_total counter
deadspace_stats_errors_total 1
`},
	}
	names := []string{"deadspace_outbox_writes", "deadspace_outbox_oldest_age_seconds", "deadspace_dead_letters",
		"deadspace_pending_patients", "deadspace_stats_errors_total"}
	for _, tt := range tests {
		t.Run(tt.name, func(t *testing.T) {
			m := New("test")
			m.now = func() time.Time { return now }
			m.SetStats(tt.stats)
			if err := testutil.GatherAndCompare(m.Registry(), strings.NewReader(tt.want), names...); err != nil {
				t.Error(err)
			}
		})
	}
	t.Run("no stats func yet", func(t *testing.T) {
		m := New("test")
		n, err := testutil.GatherAndCount(m.Registry(), names[:4]...)
		if err != nil || n != 0 {
			t.Errorf("got %d series, %v; want none", n, err)
		}
	})
}

// TestStoreCommitCounters: the embedded store's committer's counters are
// read at each scrape, and absent for a store without one.
func TestStoreCommitCounters(t *testing.T) {
	names := []string{"deadspace_store_transactions_total", "deadspace_store_write_calls_total", "deadspace_store_busy_seconds_total"}
	m := New("test")
	if n, err := testutil.GatherAndCount(m.Registry(), names...); err != nil || n != 0 {
		t.Errorf("with no committer: %d series, %v; want none", n, err)
	}
	st := store.CommitStats{Transactions: 3, Calls: 11, Busy: 1500 * time.Millisecond}
	m.SetCommits(func() store.CommitStats { return st })
	want := `
# HELP deadspace_store_busy_seconds_total Time the embedded store's single writer spent in transactions, syncs included; its rate is the share of time it is busy.
# TYPE deadspace_store_busy_seconds_total counter
deadspace_store_busy_seconds_total 1.5
# HELP deadspace_store_transactions_total Read-write transactions of the embedded store, committed or rolled back, one at a time.
# TYPE deadspace_store_transactions_total counter
deadspace_store_transactions_total 3
# HELP deadspace_store_write_calls_total Write calls the embedded store's transactions ran (concurrent calls share a transaction).
# TYPE deadspace_store_write_calls_total counter
deadspace_store_write_calls_total 11
`
	if err := testutil.GatherAndCompare(m.Registry(), strings.NewReader(want), names...); err != nil {
		t.Error(err)
	}
	st.Transactions = 4 // read again at the next scrape
	if err := testutil.GatherAndCompare(m.Registry(), strings.NewReader(strings.Replace(want, "transactions_total 3", "transactions_total 4", 1)), names...); err != nil {
		t.Error(err)
	}
	m.SetCommits(nil)
	if n, err := testutil.GatherAndCount(m.Registry(), names...); err != nil || n != 0 {
		t.Errorf("committer removed: %d series, %v; want none", n, err)
	}
}

func TestInstrumentWebhook(t *testing.T) {
	tests := []struct {
		name    string
		handler http.HandlerFunc
		status  string
	}{
		{"explicit status", func(w http.ResponseWriter, r *http.Request) { w.WriteHeader(http.StatusAccepted) }, "202"},
		{"a status the webhook never sends", func(w http.ResponseWriter, r *http.Request) { w.WriteHeader(http.StatusTeapot) }, other},
		{"body without a status is 200", func(w http.ResponseWriter, r *http.Request) { _, _ = w.Write([]byte("{}")) }, "200"},
		{"nothing written is 200", func(w http.ResponseWriter, r *http.Request) {}, "200"},
		{"error", func(w http.ResponseWriter, r *http.Request) { http.Error(w, "no", http.StatusBadRequest) }, "400"},
		{"first status wins", func(w http.ResponseWriter, r *http.Request) {
			w.WriteHeader(http.StatusServiceUnavailable)
			w.WriteHeader(http.StatusOK) // ignored by net/http too
		}, "503"},
		{"informational status then final", func(w http.ResponseWriter, r *http.Request) {
			w.WriteHeader(http.StatusEarlyHints)
			w.WriteHeader(http.StatusCreated)
		}, "201"},
	}
	for _, tt := range tests {
		t.Run(tt.name, func(t *testing.T) {
			m := New("test")
			var inFlight float64
			h := m.InstrumentWebhook(http.HandlerFunc(func(w http.ResponseWriter, r *http.Request) {
				inFlight = testutil.ToFloat64(m.webhookActive)
				tt.handler(w, r)
			}))
			h.ServeHTTP(httptest.NewRecorder(), httptest.NewRequest(http.MethodPost, "/fhir/webhook", nil))
			if got := testutil.ToFloat64(m.webhookCount.WithLabelValues(tt.status)); got != 1 {
				t.Errorf("requests{status=%s} = %v, want 1", tt.status, got)
			}
			if n := testutil.CollectAndCount(m.webhookCount); n != len(webhookStatuses)+1 {
				t.Errorf("%d status series, want the %d known ones and other", n, len(webhookStatuses))
			}
			if inFlight != 1 || testutil.ToFloat64(m.webhookActive) != 0 {
				t.Errorf("in flight during %v, after %v; want 1, 0", inFlight, testutil.ToFloat64(m.webhookActive))
			}
			var d dto.Metric
			if err := m.webhookDur.Write(&d); err != nil {
				t.Fatal(err)
			}
			if got := d.GetHistogram().GetSampleCount(); got != 1 {
				t.Errorf("duration histogram count %d, want 1", got)
			}
		})
	}
}

// The wrapper must not hide the writer's optional interfaces from
// http.ResponseController (net/http, Go 1.20+), which finds them through
// Unwrap.
func TestInstrumentWebhookKeepsFlush(t *testing.T) {
	m := New("test")
	rec := httptest.NewRecorder()
	var err error
	m.InstrumentWebhook(http.HandlerFunc(func(w http.ResponseWriter, r *http.Request) {
		err = http.NewResponseController(w).Flush()
	})).ServeHTTP(rec, httptest.NewRequest(http.MethodGet, "/", nil))
	if err != nil || !rec.Flushed {
		t.Errorf("flush through the wrapper: err %v, flushed %v", err, rec.Flushed)
	}
}

func TestWatchSubscribers(t *testing.T) {
	m := New("test")
	m.IncWatchSubscribers()
	m.IncWatchSubscribers()
	m.DecWatchSubscribers()
	if got := testutil.ToFloat64(m.watchers); got != 1 {
		t.Errorf("watchers = %v, want 1", got)
	}
}

// A nil *Metrics turns instrumentation off without the caller branching.
func TestNilMetricsIsInert(t *testing.T) {
	var m *Metrics
	h := m.EngineHooks()
	if h.Received != nil || h.WriteResult != nil {
		t.Error("nil metrics returned live hooks")
	}
	if m.ClientObserver() != nil {
		t.Error("nil metrics returned an observer")
	}
	m.SetStats(nil)
	m.IncWatchSubscribers()
	m.DecWatchSubscribers()
	inner := http.HandlerFunc(func(http.ResponseWriter, *http.Request) {})
	if got := m.InstrumentWebhook(inner); got == nil {
		t.Error("nil metrics dropped the handler")
	}
}

// Each Metrics has its own registry: two in one process must not collide
// (the default registry would panic on the second registration).
func TestTwoInstances(t *testing.T) {
	a, b := New("a"), New("b")
	a.EngineHooks().Gap()
	if testutil.ToFloat64(b.gaps) != 0 || testutil.ToFloat64(a.gaps) != 1 {
		t.Error("instances share state")
	}
}

// Whatever the engine passes, every label value stays in its closed set, so
// the number of series cannot grow with the input.
func FuzzLabelsStayBounded(f *testing.F) {
	f.Add("notification", "Observation", "value-censored", "19991-9", "final", "gap", "retry", "read", 200)
	f.Add("Patient/1", "Encounter/2", "Observation/3", "", "registered", "\xff", "x", "", -1)
	f.Fuzz(func(t *testing.T, mode, rt, reason, code, status, trigger, outcome, op string, httpCode int) {
		m := New("fuzz")
		h := m.EngineHooks()
		h.Received(mode, rt)
		h.LeftOut(derive.Reason(reason))
		h.Emitted(code, status)
		h.CatchUp(trigger)
		h.WriteResult(outcome)
		h.Evaluation(httpCode%2 == 0)
		m.ClientObserver()(op, httpCode, time.Millisecond)
		allowed := map[string]set{
			"mode": m.modes, "resource_type": m.resourceTypes, "reason": m.reasons, "code": m.codes,
			"trigger": m.triggers, "outcome": m.outcomes, "operation": m.operations,
			"data": newSet(evaluationData),
		}
		fams, err := m.Registry().Gather()
		if err != nil {
			t.Fatal(err)
		}
		for _, fam := range fams {
			if !strings.HasPrefix(fam.GetName(), "deadspace_") || fam.GetName() == "deadspace_build_info" {
				continue
			}
			for _, s := range fam.GetMetric() {
				for _, l := range s.GetLabel() {
					v := l.GetValue()
					switch {
					case l.GetName() == "status" && fam.GetName() == "deadspace_derived_values_total":
						if v != other && !m.statuses[v] {
							t.Errorf("%s status %q", fam.GetName(), v)
						}
					case l.GetName() == "status" && fam.GetName() == "deadspace_fhir_request_duration_seconds":
						if !slices.Contains(fhirStatuses, v) {
							t.Errorf("%s status %q", fam.GetName(), v)
						}
					case l.GetName() == "status":
						if v != other && !m.webhookStatuses[v] {
							t.Errorf("%s status %q", fam.GetName(), v)
						}
					case allowed[l.GetName()] != nil:
						if v != other && !allowed[l.GetName()][v] {
							t.Errorf("%s{%s=%q} outside its set", fam.GetName(), l.GetName(), v)
						}
					default:
						t.Errorf("%s has unexpected label %s", fam.GetName(), l.GetName())
					}
				}
			}
		}
	})
}
