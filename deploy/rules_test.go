package deploy

import (
	"bytes"
	"context"
	"log/slog"
	"net/url"
	"os"
	"path/filepath"
	"regexp"
	"sort"
	"strings"
	"testing"
	"time"

	"github.com/prometheus/common/model"
	"github.com/prometheus/prometheus/model/labels"
	"github.com/prometheus/prometheus/model/rulefmt"
	"github.com/prometheus/prometheus/promql"
	"github.com/prometheus/prometheus/promql/parser"
	"github.com/prometheus/prometheus/template"
)

// The rule file is read with Prometheus's own rule-file parser
// (github.com/prometheus/prometheus v0.316.0, model/rulefmt), the code
// Prometheus and promtool load rule files with: it rejects unknown fields,
// bad PromQL and unparsable templates.

const rulesFile = "prometheus/deadspace-rules.yaml"

// exportedMetrics are the series the service exports (api/metrics'
// package documentation, kept in step with it by hand) plus the ones
// Prometheus adds to every target. Histograms appear as their _bucket,
// _sum and _count series.
var exportedMetrics = map[string]bool{
	"up":                                         true, // added by Prometheus to every scraped target
	"deadspace_build_info":                       true,
	"deadspace_resources_received_total":         true,
	"deadspace_inputs_left_out_total":            true,
	"deadspace_inputs_left_out":                  true,
	"deadspace_values_not_emitted":               true,
	"deadspace_derived_values_total":             true,
	"deadspace_fhir_request_duration_seconds":    true,
	"deadspace_outbox_attempts_total":            true,
	"deadspace_outbox_writes":                    true,
	"deadspace_outbox_oldest_age_seconds":        true,
	"deadspace_dead_letters":                     true,
	"deadspace_dead_lettered_total":              true,
	"deadspace_pending_patients":                 true,
	"deadspace_stats_errors_total":               true,
	"deadspace_store_transactions_total":         true,
	"deadspace_store_write_calls_total":          true,
	"deadspace_store_busy_seconds_total":         true,
	"deadspace_subscription_gaps_total":          true,
	"deadspace_catchups_total":                   true,
	"deadspace_evaluations_total":                true,
	"deadspace_watch_subscribers":                true,
	"deadspace_webhook_requests_total":           true,
	"deadspace_webhook_request_duration_seconds": true,
	"deadspace_webhook_requests_in_flight":       true,
	"deadspace_writes_stopped":                   true,
}

var histograms = []string{"deadspace_fhir_request_duration_seconds", "deadspace_webhook_request_duration_seconds"}

// knownMetric accepts an exported name, or a histogram's derived series.
func knownMetric(name string) bool {
	if exportedMetrics[name] {
		return true
	}
	for _, h := range histograms {
		for _, suffix := range []string{"_bucket", "_sum", "_count"} {
			if name == h+suffix {
				return true
			}
		}
	}
	return false
}

var promParser = parser.NewParser(parser.Options{})

func loadRules(t *testing.T) *rulefmt.RuleGroups {
	t.Helper()
	b, err := os.ReadFile(filepath.FromSlash(rulesFile))
	if err != nil {
		t.Fatal(err)
	}
	var logs bytes.Buffer
	groups, errs := rulefmt.Parse(b, false, model.LegacyValidation, promParser, slog.New(slog.NewTextHandler(&logs, nil)))
	for _, err := range errs {
		t.Errorf("%s: %v", rulesFile, err)
	}
	if logs.Len() > 0 {
		t.Errorf("%s: the parser warned: %s", rulesFile, logs.String())
	}
	if groups == nil || len(groups.Groups) == 0 {
		t.Fatalf("%s: no rule groups", rulesFile)
	}
	return groups
}

// selectors returns every vector selector in an expression.
func selectors(t *testing.T, expr string) []*parser.VectorSelector {
	t.Helper()
	e, err := promParser.ParseExpr(expr)
	if err != nil {
		t.Fatalf("%q: %v", expr, err)
	}
	var out []*parser.VectorSelector
	parser.Inspect(e, func(n parser.Node, _ []parser.Node) error {
		if vs, ok := n.(*parser.VectorSelector); ok {
			out = append(out, vs)
		}
		return nil
	})
	return out
}

func TestRulesParse(t *testing.T) {
	groups := loadRules(t)
	seen := map[string]bool{}
	for _, g := range groups.Groups {
		for _, r := range g.Rules {
			name := r.Alert
			t.Run(name, func(t *testing.T) {
				if r.Alert == "" {
					t.Fatalf("recording rule %q: this file holds alerts only", r.Record)
				}
				if seen[name] {
					t.Errorf("alert name used twice")
				}
				seen[name] = true
				switch r.Labels["severity"] {
				case "critical", "warning", "info":
				default:
					t.Errorf("severity %q, want critical, warning or info", r.Labels["severity"])
				}
				for _, a := range []string{"summary", "description"} {
					if strings.TrimSpace(r.Annotations[a]) == "" {
						t.Errorf("no %s annotation", a)
					}
				}
				for _, vs := range selectors(t, r.Expr) {
					if !knownMetric(vs.Name) {
						t.Errorf("%s is not a metric the service exports", vs.Name)
					}
					for _, m := range vs.LabelMatchers {
						if m.Name == "job" && !m.Matches("deadspace") {
							t.Errorf("%s: job matcher %s does not match the scrape job \"deadspace\"", vs.Name, m)
						}
					}
				}
			})
		}
	}
}

// TestRulesCoverTheService checks each condition the operators asked to be
// alerted on has a rule that reads the metric saying so.
func TestRulesCoverTheService(t *testing.T) {
	used := map[string]bool{}
	for _, g := range loadRules(t).Groups {
		for _, r := range g.Rules {
			for _, vs := range selectors(t, r.Expr) {
				used[vs.Name] = true
			}
		}
	}
	for _, m := range []string{
		"up",                                            // service down
		"deadspace_outbox_writes",                       // backlog
		"deadspace_outbox_oldest_age_seconds",           // results late
		"deadspace_dead_letters",                        // writes given up on
		"deadspace_subscription_gaps_total",             // lost notifications
		"deadspace_resources_received_total",            // no input
		"deadspace_fhir_request_duration_seconds_count", // FHIR server errors
		"deadspace_store_busy_seconds_total",            // the embedded store at its limit
		"deadspace_writes_stopped",                      // no software Device to cite
	} {
		if !used[m] {
			t.Errorf("no rule reads %s", m)
		}
	}
}

func TestKnownMetricRejects(t *testing.T) {
	for _, name := range []string{"deadspace_outbox_backlog", "deadspace_outbox_writes_total", "deadspace_dead_letters_count", "deadspace_build_info_bucket"} {
		if knownMetric(name) {
			t.Errorf("%s accepted", name)
		}
	}
}

// TestFHIRErrorMatcher checks the status matcher against the values
// api/metrics documents for the status label: the HTTP status class (2xx,
// 3xx, 4xx, 5xx, with 429 apart), or "error" when no response came. PromQL regex matchers are anchored at both
// ends (Prometheus documentation, "Querying basics").
func TestFHIRErrorMatcher(t *testing.T) {
	var status *labels.Matcher
	for _, g := range loadRules(t).Groups {
		for _, r := range g.Rules {
			for _, vs := range selectors(t, r.Expr) {
				for _, m := range vs.LabelMatchers {
					if vs.Name == "deadspace_fhir_request_duration_seconds_count" && m.Name == "status" {
						status = m
					}
				}
			}
		}
	}
	if status == nil {
		t.Fatal("no status matcher on deadspace_fhir_request_duration_seconds_count")
	}
	tests := []struct {
		status string
		want   bool
	}{
		{"5xx", true}, {"error", true},
		{"2xx", false}, {"3xx", false}, {"4xx", false}, {"429", false},
		{"5000", false}, {"errors", false},
	}
	for _, tc := range tests {
		t.Run(tc.status, func(t *testing.T) {
			if got := status.Matches(tc.status); got != tc.want {
				t.Errorf("%s matches %q = %v, want %v", status, tc.status, got, tc.want)
			}
		})
	}
}

// TestAnnotationsRender expands every annotation the way the rule manager
// does when an alert fires, with the template functions Prometheus
// provides, so a misspelt function or label fails here.
func TestAnnotationsRender(t *testing.T) {
	lbls := map[string]string{"job": "deadspace", "instance": "deadspace:8080"}
	external, _ := url.Parse("http://prometheus.invalid/")
	for _, g := range loadRules(t).Groups {
		for _, r := range g.Rules {
			for k, text := range r.Annotations {
				t.Run(r.Alert+"/"+k, func(t *testing.T) {
					data := template.AlertTemplateData(lbls, nil, "", promql.Sample{F: 0.25})
					defs := "{{$labels := .Labels}}{{$externalLabels := .ExternalLabels}}{{$externalURL := .ExternalURL}}{{$value := .Value}}"
					exp := template.NewTemplateExpander(context.Background(), defs+text, "__alert_"+r.Alert, data,
						model.TimeFromUnixNano(time.Date(2026, 1, 1, 0, 0, 0, 0, time.UTC).UnixNano()), nil, external, nil)
					got, err := exp.Expand()
					if err != nil {
						t.Fatal(err)
					}
					if strings.Contains(got, "<no value>") || strings.Contains(got, "{{") {
						t.Errorf("renders as %q", got)
					}
				})
			}
		}
	}
}

// targetLabels are the labels Prometheus attaches to every series it
// scrapes (Prometheus documentation, "Jobs and instances").
var targetLabels = []string{"job", "instance"}

// outputLabels is the set of labels an expression's result is known to
// carry, counting only target labels and label matchers: enough to check
// that an annotation's {{ $labels.x }} can have a value. A template reads a
// missing label as empty rather than failing, so only this catches it.
func outputLabels(n parser.Expr) map[string]bool {
	set := func(names ...string) map[string]bool {
		m := map[string]bool{}
		for _, n := range names {
			m[n] = true
		}
		return m
	}
	switch e := n.(type) {
	case *parser.VectorSelector:
		return set(targetLabels...)
	case *parser.MatrixSelector:
		return outputLabels(e.VectorSelector)
	case *parser.ParenExpr:
		return outputLabels(e.Expr)
	case *parser.AggregateExpr:
		if e.Without {
			m := outputLabels(e.Expr)
			for _, g := range e.Grouping {
				delete(m, g)
			}
			return m
		}
		return set(e.Grouping...)
	case *parser.Call:
		if e.Func.Name == "absent" || e.Func.Name == "absent_over_time" {
			// The result carries the selector's equality matchers only.
			m := map[string]bool{}
			parser.Inspect(e, func(n parser.Node, _ []parser.Node) error {
				if vs, ok := n.(*parser.VectorSelector); ok {
					for _, lm := range vs.LabelMatchers {
						if lm.Type == labels.MatchEqual && lm.Name != model.MetricNameLabel {
							m[lm.Name] = true
						}
					}
				}
				return nil
			})
			return m
		}
		for _, a := range e.Args {
			if a.Type() == parser.ValueTypeVector || a.Type() == parser.ValueTypeMatrix {
				return outputLabels(a)
			}
		}
		return set()
	case *parser.BinaryExpr:
		l, r := e.LHS.Type() == parser.ValueTypeVector, e.RHS.Type() == parser.ValueTypeVector
		switch {
		case l && r:
			// Keep what both sides carry: "or" may return either side's series.
			a, b := outputLabels(e.LHS), outputLabels(e.RHS)
			for k := range a {
				if !b[k] {
					delete(a, k)
				}
			}
			return a
		case l:
			return outputLabels(e.LHS)
		case r:
			return outputLabels(e.RHS)
		}
	}
	return map[string]bool{}
}

var labelRef = regexp.MustCompile(`(?:\$labels|\.Labels)\.([A-Za-z_][A-Za-z0-9_]*)`)

func TestAnnotationLabelsExist(t *testing.T) {
	for _, g := range loadRules(t).Groups {
		for _, r := range g.Rules {
			e, err := promParser.ParseExpr(r.Expr)
			if err != nil {
				t.Fatal(err)
			}
			have := outputLabels(e)
			for k, text := range r.Annotations {
				for _, m := range labelRef.FindAllStringSubmatch(text, -1) {
					if !have[m[1]] {
						t.Errorf("%s %s uses label %q, which the expression's result does not carry (it has %v)", r.Alert, k, m[1], have)
					}
				}
			}
		}
	}
}

func TestOutputLabels(t *testing.T) {
	tests := []struct {
		expr string
		want string
	}{
		{`up == 0`, "instance,job"},
		{`sum(rate(x[5m])) == 0`, ""},
		{`sum by (job) (x) / sum by (job) (y) > 0.1`, "job"},
		{`sum by (job, instance) (rate(x[30m])) == 0 or absent(x{job="a"})`, "job"},
		{`absent(up{job="a", instance=~".+"})`, "job"},
		{`sum without (instance) (x)`, "job"},
		{`increase(x[15m]) > 0`, "instance,job"},
	}
	for _, tc := range tests {
		t.Run(tc.expr, func(t *testing.T) {
			e, err := promParser.ParseExpr(tc.expr)
			if err != nil {
				t.Fatal(err)
			}
			var got []string
			for k := range outputLabels(e) {
				got = append(got, k)
			}
			sort.Strings(got)
			if strings.Join(got, ",") != tc.want {
				t.Errorf("got %v, want %s", got, tc.want)
			}
		})
	}
}
