package webhook_test

import (
	"bytes"
	"context"
	"encoding/json"
	"errors"
	"fmt"
	"io"
	"log/slog"
	"net/http"
	"net/http/httptest"
	"os"
	"path/filepath"
	"reflect"
	"regexp"
	"strings"
	"testing"
	"time"

	"github.com/deadspace-fhir/deadspace/api/webhook"
	"github.com/deadspace-fhir/deadspace/fhir/notify"
)

const secret = "s3cret-for-tests-0123456789"

// igFixture reads a notification built from the examples of HL7 FHIR
// Subscriptions R5 Backport IG STU 1.1.0 (fhir/notify/testdata/README.md).
func igFixture(t testing.TB, name string) string {
	t.Helper()
	b, err := os.ReadFile(filepath.Join("..", "..", "fhir", "notify", "testdata", name))
	if err != nil {
		t.Fatal(err)
	}
	return string(b)
}

// obs is an arterial PaCO2 result (LOINC 2019-8, as coded in the HL7 MCC IG; not checked on loinc.org).
const obs = `{"resourceType":"Observation","id":"abg-1","status":"final",
 "code":{"coding":[{"system":"http://loinc.org","code":"2019-8"}]},
 "subject":{"reference":"Patient/p1"},"effectiveDateTime":"2025-03-01T10:15:00Z",
 "valueQuantity":{"value":41,"unit":"mm[Hg]","system":"http://unitsofmeasure.org","code":"mm[Hg]"}}`

const patient = `{"resourceType":"Patient","id":"p1","gender":"male","birthDate":"1960-05-17"}`

// r4Notification builds an R4 backport notification with the IG's
// parameter names; focus and resource may be empty.
func r4Notification(typ, since string, focus, resource string) string {
	events := ""
	if typ == "event-notification" {
		f := ""
		if focus != "" {
			f = `,{"name":"focus","valueReference":{"reference":"` + focus + `"}}`
		}
		events = `,{"name":"notification-event","part":[{"name":"event-number","valueString":"` + since + `"},
			{"name":"timestamp","valueInstant":"2025-03-01T10:15:02Z"}` + f + `]}`
	}
	extra := ""
	if resource != "" {
		extra = `,{"fullUrl":"` + focus + `","resource":` + resource + `,"request":{"method":"PUT","url":"Observation/abg-1"},"response":{"status":"200"}}`
	}
	return `{"resourceType":"Bundle","type":"history","entry":[{"fullUrl":"urn:uuid:6f1e0c1e-0000-4000-8000-000000000001",
	 "resource":{"resourceType":"Parameters","parameter":[
	  {"name":"subscription","valueReference":{"reference":"https://ehr.example/fhir/Subscription/abg"}},
	  {"name":"status","valueCode":"active"},{"name":"type","valueCode":"` + typ + `"},
	  {"name":"events-since-subscription-start","valueString":"` + since + `"}` + events + `]},
	 "request":{"method":"GET","url":"https://ehr.example/fhir/Subscription/abg/$status"},"response":{"status":"200"}}` + extra + `]}`
}

func newHandler(t testing.TB, sink webhook.Sink, mod func(*webhook.Config)) (*webhook.Handler, *bytes.Buffer) {
	t.Helper()
	var logs bytes.Buffer
	cfg := webhook.Config{Sink: sink, Secret: secret,
		Logger: slog.New(slog.NewJSONHandler(&logs, &slog.HandlerOptions{Level: slog.LevelDebug}))}
	if mod != nil {
		mod(&cfg)
	}
	h, err := webhook.New(cfg)
	if err != nil {
		t.Fatal(err)
	}
	return h, &logs
}

// summary renders the sink calls compactly for comparison.
func summary(calls []call) []string {
	var out []string
	for _, c := range calls {
		switch c.method {
		case "Resources", "Notification":
			var types []string
			for _, r := range c.resources {
				var h struct{ ResourceType string }
				_ = json.Unmarshal(r, &h)
				types = append(types, h.ResourceType)
			}
			line := fmt.Sprintf("%s %s %s", c.method, c.src.Mode, strings.Join(types, ","))
			if c.method == "Notification" {
				line += fmt.Sprintf(" %s %d", c.n.Type, c.n.EventsSinceStart)
			}
			out = append(out, line)
		case "Fetch":
			out = append(out, fmt.Sprintf("Fetch %s %s", c.src.Mode, strings.Join(c.refs, ",")))
		case "Status":
			out = append(out, fmt.Sprintf("Status %s %s %d", c.src.Mode, c.n.Type, c.n.EventsSinceStart))
		case "Changed":
			out = append(out, "Changed "+c.src.Mode)
		case "Deleted":
			var refs []string
			for _, d := range c.deleted {
				r := d.Ref
				if !d.At.IsZero() {
					r += "@" + d.At.UTC().Format(time.RFC3339)
				}
				refs = append(refs, r)
			}
			out = append(out, fmt.Sprintf("Deleted %s %s", c.src.Mode, strings.Join(refs, ",")))
		}
	}
	return out
}

type outcomeBody struct {
	ResourceType string `json:"resourceType"`
	Issue        []struct {
		Severity    string `json:"severity"`
		Code        string `json:"code"`
		Diagnostics string `json:"diagnostics"`
	} `json:"issue"`
}

func decodeOutcome(t testing.TB, body []byte) outcomeBody {
	t.Helper()
	var oo outcomeBody
	if err := json.Unmarshal(body, &oo); err != nil {
		t.Fatalf("response is not JSON: %v: %s", err, body)
	}
	if oo.ResourceType != "OperationOutcome" || len(oo.Issue) == 0 {
		t.Fatalf("response is not an OperationOutcome with issues: %s", body)
	}
	return oo
}

var errDisk = errors.New("disk full")

// The statuses are this package's contract (doc.go). Where a rule comes
// from a standard it is named beside the case: RFC 9110 (HTTP semantics),
// RFC 6750 (Bearer tokens), FHIR R4 http.html, and HL7 FHIR Subscriptions R5
// Backport IG STU 1.1.0 for the notification shapes.
func TestHandler(t *testing.T) {
	t.Parallel()
	bearer := map[string]string{"Authorization": "Bearer " + secret}
	fhirJSON := map[string]string{"Authorization": "Bearer " + secret, "Content-Type": "application/fhir+json"}
	with := func(base map[string]string, kv ...string) map[string]string {
		m := map[string]string{}
		for k, v := range base {
			m[k] = v
		}
		for i := 0; i+1 < len(kv); i += 2 {
			if kv[i+1] == "" {
				delete(m, kv[i])
			} else {
				m[kv[i]] = kv[i+1]
			}
		}
		return m
	}
	cases := []struct {
		name    string
		method  string
		path    string
		headers map[string]string
		body    string
		sink    func(*fakeSink)
		cfg     func(*webhook.Config)
		// chunked hides the length, so the limit must hold while reading.
		chunked bool

		status  int
		calls   []string
		header  map[string]string // response headers that must be present
		diag    string            // substring of the first issue's diagnostics
		warning string            // substring of a warning issue
	}{
		// RFC 9110 §15.5.2: a 401 carries WWW-Authenticate; RFC 6750 §3 names the Bearer scheme.
		{name: "wrong secret", method: "POST", path: "/notify", headers: with(fhirJSON, "Authorization", "Bearer nope-nope-nope-nope"),
			body: obs, status: 401, header: map[string]string{"WWW-Authenticate": `Bearer realm="webhook"`}},
		{name: "no secret", method: "POST", path: "/notify", headers: with(fhirJSON, "Authorization", ""), body: obs, status: 401},
		{name: "secret without Bearer", method: "POST", path: "/notify", headers: with(fhirJSON, "Authorization", secret), body: obs, status: 401},
		{name: "Basic scheme", method: "POST", path: "/notify", headers: with(fhirJSON, "Authorization", "Basic "+secret), body: obs, status: 401},
		{name: "secret with a suffix", method: "POST", path: "/notify", headers: with(fhirJSON, "Authorization", "Bearer "+secret+"x"), body: obs, status: 401},
		// RFC 9110 §11.1: the auth scheme is case-insensitive.
		{name: "lower-case bearer", method: "POST", path: "/notify", headers: with(fhirJSON, "Authorization", "bearer "+secret),
			body: obs, status: 200, calls: []string{"Resources rest-hook Observation"}},
		{name: "unauthenticated before 404", method: "GET", path: "/elsewhere", status: 401},
		{name: "unauthenticated before 413", method: "POST", path: "/notify", headers: map[string]string{"Content-Type": "text/plain"},
			body: strings.Repeat("x", 2000), cfg: func(c *webhook.Config) { c.MaxBodyBytes = 1000 }, status: 401},
		{name: "custom header", method: "POST", path: "/notify", headers: map[string]string{"X-Hook-Token": secret},
			cfg: func(c *webhook.Config) { c.Header = "x-hook-token" }, status: 200, calls: []string{"Changed rest-hook"}},
		{name: "custom header with Bearer", method: "POST", path: "/notify", headers: map[string]string{"X-Hook-Token": "Bearer " + secret},
			cfg: func(c *webhook.Config) { c.Header = "X-Hook-Token" }, status: 401},
		{name: "Authorization ignored with a custom header", method: "POST", path: "/notify", headers: bearer,
			cfg: func(c *webhook.Config) { c.Header = "X-Hook-Token" }, status: 401},

		// RFC 9110 §15.5.14.
		{name: "oversized by Content-Length", method: "POST", path: "/notify", headers: fhirJSON, body: obs,
			cfg: func(c *webhook.Config) { c.MaxBodyBytes = 64 }, status: 413},
		{name: "oversized while reading", method: "POST", path: "/notify", headers: fhirJSON, body: obs, chunked: true,
			cfg: func(c *webhook.Config) { c.MaxBodyBytes = 64 }, status: 413},
		{name: "exactly at the limit", method: "POST", path: "/notify", headers: fhirJSON, body: obs,
			cfg: func(c *webhook.Config) { c.MaxBodyBytes = int64(len(obs)) }, status: 200, calls: []string{"Resources rest-hook Observation"}},
		{name: "exactly at the limit, chunked", method: "POST", path: "/notify", headers: fhirJSON, body: obs, chunked: true,
			cfg: func(c *webhook.Config) { c.MaxBodyBytes = int64(len(obs)) }, status: 200, calls: []string{"Resources rest-hook Observation"}},
		{name: "one byte over while reading", method: "POST", path: "/notify", headers: fhirJSON, body: obs, chunked: true,
			cfg: func(c *webhook.Config) { c.MaxBodyBytes = int64(len(obs)) - 1 }, status: 413},
		{name: "empty object", method: "POST", path: "/notify", headers: fhirJSON, body: " { \n } ", status: 200, calls: []string{"Changed rest-hook"}},
		{name: "truncated JSON", method: "POST", path: "/notify", headers: fhirJSON, body: obs[:len(obs)/2], status: 400, diag: "not valid JSON"},
		{name: "not FHIR", method: "POST", path: "/notify", headers: fhirJSON, body: `{"hello":"world"}`, status: 400, diag: "no resourceType"},
		{name: "JSON array", method: "POST", path: "/notify", headers: fhirJSON, body: `[` + obs + `]`, status: 400, diag: "not a JSON object"},
		{name: "malformed notification", method: "POST", path: "/notify", headers: fhirJSON, status: 400, diag: "no subscription",
			body: strings.Replace(r4Notification("heartbeat", "3", "", ""), `"name":"subscription"`, `"name":"subscriptionx"`, 1)},

		// RFC 9110 §15.5.6: a 405 carries Allow.
		{name: "GET on /notify", method: "GET", path: "/notify", headers: bearer, status: 405, header: map[string]string{"Allow": "POST, PUT"}},
		{name: "DELETE on typed path", method: "DELETE", path: "/notify/Observation/abg-1", headers: bearer, status: 405,
			header: map[string]string{"Allow": "PUT, POST"}},
		{name: "unknown path", method: "POST", path: "/notify/Observation/abg-1/_history/2", headers: bearer, status: 404},
		{name: "other prefix", method: "POST", path: "/hook", headers: bearer, status: 404},

		// RFC 9110 §15.5.16.
		{name: "text/plain body", method: "POST", path: "/notify", headers: with(bearer, "Content-Type", "text/plain"), body: obs, status: 415},
		{name: "Latin-1 charset", method: "POST", path: "/notify", headers: with(bearer, "Content-Type", "application/fhir+json; charset=iso-8859-1"), body: obs, status: 415},
		{name: "gzip encoding", method: "POST", path: "/notify", headers: with(fhirJSON, "Content-Encoding", "gzip"), body: obs, status: 415},
		{name: "fhir+json with charset", method: "POST", path: "/notify", headers: with(bearer, "Content-Type", "application/fhir+json; charset=UTF-8; fhirVersion=4.0"),
			body: obs, status: 200, calls: []string{"Resources rest-hook Observation"}},
		{name: "DSTU2 media type", method: "POST", path: "/notify", headers: with(bearer, "Content-Type", "application/json+fhir"),
			body: obs, status: 200, calls: []string{"Resources rest-hook Observation"}},
		{name: "no Content-Type", method: "POST", path: "/notify", headers: bearer, body: obs, status: 200, calls: []string{"Resources rest-hook Observation"}},

		// Classic R4 rest-hook without payload: an empty POST, the client searches.
		{name: "empty POST", method: "POST", path: "/notify", headers: bearer, status: 200, calls: []string{"Changed rest-hook"}, diag: "change recorded"},
		{name: "empty POST with text/plain", method: "POST", path: "/notify", headers: with(bearer, "Content-Type", "text/plain"), body: "\r\n",
			status: 200, calls: []string{"Changed rest-hook"}},
		{name: "empty object", method: "POST", path: "/notify", headers: fhirJSON, body: " {} ", status: 200, calls: []string{"Changed rest-hook"}},
		{name: "empty PUT to the endpoint", method: "PUT", path: "/notify/", headers: bearer, status: 200, calls: []string{"Changed rest-hook"}},
		{name: "single Observation POSTed", method: "POST", path: "/notify", headers: fhirJSON, body: obs, status: 200,
			calls: []string{"Resources rest-hook Observation"}, diag: "1 of 1 resources accepted, 0 rejected"},
		{name: "transaction Bundle", method: "POST", path: "/notify", headers: fhirJSON, status: 200,
			calls: []string{"Resources rest-hook Observation,Patient", "Deleted rest-hook Observation/old"},
			body: `{"resourceType":"Bundle","type":"transaction","entry":[{"resource":` + obs + `,"request":{"method":"PUT","url":"Observation/abg-1"}},
				{"request":{"method":"DELETE","url":"Observation/old"}},{"resource":` + patient + `}]}`},
		{name: "Bundle of deletes", method: "POST", path: "/notify", headers: fhirJSON, status: 200, calls: []string{"Deleted rest-hook Observation/old"},
			body: `{"resourceType":"Bundle","type":"batch","entry":[{"request":{"method":"DELETE","url":"Observation/old"}}]}`},
		{name: "history Bundle: a delete with its time, named by an absolute url", method: "POST", path: "/notify", headers: fhirJSON, status: 200,
			calls: []string{"Deleted rest-hook Observation/old@2026-03-01T01:00:00Z"},
			body: `{"resourceType":"Bundle","type":"history","entry":[{"fullUrl":"https://ehr.example/fhir/Observation/old",` +
				`"request":{"method":"DELETE","url":"https://ehr.example/fhir/Observation/old"},"response":{"status":"204","lastModified":"2026-03-01T01:00:00Z"}}]}`},
		{name: "conditional delete named by its fullUrl", method: "POST", path: "/notify", headers: fhirJSON, status: 200,
			calls: []string{"Deleted rest-hook Observation/old"},
			body:  `{"resourceType":"Bundle","type":"batch","entry":[{"fullUrl":"https://ehr.example/fhir/Observation/old","request":{"method":"DELETE","url":"Observation?identifier=x|1"}}]}`},
		{name: "conditional delete naming nothing: a change", method: "POST", path: "/notify", headers: fhirJSON, status: 200,
			calls: []string{"Deleted rest-hook Observation/gone", "Changed rest-hook"},
			body: `{"resourceType":"Bundle","type":"batch","entry":[{"request":{"method":"DELETE","url":"Observation?identifier=x|1"}},` +
				`{"request":{"method":"delete","url":"Observation/gone"}}]}`},
		{name: "Bundle entry not a resource", method: "POST", path: "/notify", headers: fhirJSON, status: 400,
			body: `{"resourceType":"Bundle","type":"collection","entry":[{"resource":{"id":"x"}}]}`},

		// Topic-based notifications (IG examples and IG-shaped bodies).
		{name: "heartbeat", method: "POST", path: "/notify", headers: fhirJSON, body: igFixture(t, "r4-heartbeat.json"), status: 200,
			calls: []string{"Status notification heartbeat 2"}},
		{name: "handshake", method: "POST", path: "/notify", headers: fhirJSON, body: igFixture(t, "r4-handshake.json"), status: 200,
			calls: []string{"Status notification handshake 0"}},
		{name: "R4B handshake", method: "POST", path: "/notify", headers: fhirJSON, body: igFixture(t, "r4b-handshake.json"), status: 200,
			calls: []string{"Status notification handshake 0"}},
		{name: "id-only", method: "POST", path: "/notify", headers: fhirJSON, body: igFixture(t, "r4-id-only.json"), status: 200,
			calls: []string{"Fetch notification https://example.org/fhir/Encounter/86009987-eabe-42bf-8c02-b112b18cb616",
				"Status notification event-notification 2"}},
		{name: "id-only Observation", method: "POST", path: "/notify", headers: fhirJSON, status: 200,
			body:  r4Notification("event-notification", "7", "https://ehr.example/fhir/Observation/abg-1/_history/3", ""),
			calls: []string{"Fetch notification https://ehr.example/fhir/Observation/abg-1/_history/3", "Status notification event-notification 7"}},
		{name: "full-resource", method: "POST", path: "/notify", headers: fhirJSON, status: 200,
			body:  r4Notification("event-notification", "8", "https://ehr.example/fhir/Observation/abg-1", obs),
			calls: []string{"Notification notification Observation event-notification 8"}},
		{name: "IG multi-resource", method: "POST", path: "/notify", headers: fhirJSON, body: igFixture(t, "r4-multi-resource.json"), status: 200,
			calls: []string{"Notification notification Encounter,Patient event-notification 2"}},
		{name: "empty content", method: "POST", path: "/notify", headers: fhirJSON, body: igFixture(t, "r4-empty.json"), status: 200,
			calls: []string{"Changed notification", "Status notification event-notification 2"}},
		{name: "focus on a non-FHIR object", method: "POST", path: "/notify", headers: fhirJSON, status: 200,
			body:  r4Notification("event-notification", "9", "urn:uuid:6f1e0c1e-0000-4000-8000-0000000000ff", ""),
			calls: []string{"Changed notification", "Status notification event-notification 9"}, diag: "name no readable resource"},
		{name: "query-status with error", method: "POST", path: "/notify", headers: fhirJSON, body: igFixture(t, "r4b-error.json"), status: 200,
			calls: []string{"Status notification query-status 3"}},

		// Classic R4 rest-hook with payload: PUT [endpoint]/[type]/[id].
		{name: "PUT Observation", method: "PUT", path: "/notify/Observation/abg-1", headers: fhirJSON, body: obs, status: 200,
			calls: []string{"Resources rest-hook-put Observation"}},
		{name: "POST Observation to typed path", method: "POST", path: "/notify/Observation/abg-1", headers: fhirJSON, body: obs, status: 200,
			calls: []string{"Resources rest-hook-put Observation"}},
		{name: "PUT Patient", method: "PUT", path: "/notify/Patient/p1", headers: fhirJSON, body: patient, status: 200,
			calls: []string{"Resources rest-hook-put Patient"}},
		{name: "empty PUT to typed path", method: "PUT", path: "/notify/Observation/abg-1", headers: bearer, status: 200,
			calls: []string{"Fetch rest-hook-put Observation/abg-1"}},
		{name: "Patient at the Observation path", method: "PUT", path: "/notify/Observation/p1", headers: fhirJSON, body: patient,
			status: 400, diag: "expected an Observation"},
		// FHIR R4 http.html#update: an id absent or different from the URL's is a 400 (from memory).
		{name: "id mismatch", method: "PUT", path: "/notify/Observation/abg-2", headers: fhirJSON, body: obs, status: 400, diag: "does not match"},
		{name: "no id", method: "PUT", path: "/notify/Observation/abg-1", headers: fhirJSON,
			body: strings.Replace(obs, `"id":"abg-1",`, "", 1), status: 400, diag: "no id"},
		{name: "other type path", method: "PUT", path: "/notify/Encounter/e1", headers: fhirJSON, body: `{"resourceType":"Encounter","id":"e1"}`,
			status: 400, diag: "only Observation and Patient"},
		{name: "bad id in path", method: "PUT", path: "/notify/Observation/a_b", headers: fhirJSON, body: obs, status: 400},

		// Sink answers.
		{name: "sink rejects one resource", method: "POST", path: "/notify", headers: fhirJSON, status: 200,
			body: `{"resourceType":"Bundle","type":"collection","entry":[{"resource":` + obs + `},{"resource":` + patient + `}]}`,
			sink: func(f *fakeSink) {
				f.ResourcesFn = func(_ context.Context, _ webhook.Source, rs []json.RawMessage) (webhook.Receipt, error) {
					return webhook.Receipt{Accepted: 1, Rejected: []webhook.Rejection{{Index: 1, Reason: "no-kind", Detail: "not an input"}}}, nil
				}
			},
			calls: []string{"Resources rest-hook Observation,Patient"}, diag: "1 of 2 resources accepted, 1 rejected",
			warning: "resource 1 rejected: no-kind: not an input"},
		{name: "sink says invalid", method: "PUT", path: "/notify/Observation/abg-1", headers: fhirJSON, body: obs, status: 400,
			sink: func(f *fakeSink) {
				f.ResourcesFn = func(context.Context, webhook.Source, []json.RawMessage) (webhook.Receipt, error) {
					return webhook.Receipt{}, fmt.Errorf("observation has no subject: %w", webhook.ErrInvalid)
				}
			},
			calls: []string{"Resources rest-hook-put Observation"}, diag: "observation has no subject"},
		{name: "sink fails on resources", method: "POST", path: "/notify", headers: fhirJSON, status: 503,
			body: r4Notification("event-notification", "8", "https://ehr.example/fhir/Observation/abg-1", obs),
			sink: func(f *fakeSink) {
				f.NotificationFn = func(context.Context, webhook.Source, []json.RawMessage, notify.Notification) (webhook.Receipt, error) {
					return webhook.Receipt{}, errDisk
				}
			},
			// Nothing of it is recorded, the status neither, so the counters
			// reveal the loss.
			calls: []string{"Notification notification Observation event-notification 8"}, diag: "send it again later"},
		{name: "sink fails on fetch", method: "POST", path: "/notify", headers: fhirJSON, body: igFixture(t, "r4-id-only.json"), status: 503,
			sink: func(f *fakeSink) {
				f.FetchFn = func(context.Context, webhook.Source, []string) error { return errDisk }
			},
			// No Retry-After: the sender's own schedule.
			calls: []string{"Fetch notification https://example.org/fhir/Encounter/86009987-eabe-42bf-8c02-b112b18cb616"}, header: map[string]string{"Retry-After": ""}},
		{name: "sink defers a fetch: the server's Retry-After", method: "POST", path: "/notify", headers: fhirJSON, body: igFixture(t, "r4-id-only.json"), status: 503,
			sink: func(f *fakeSink) {
				f.FetchFn = func(context.Context, webhook.Source, []string) error {
					return fmt.Errorf("fetch: %w", &webhook.RetryLater{After: time.Minute, Err: errDisk})
				}
			},
			// The status is not recorded either: the counters still reveal
			// the notification if the sender never delivers it again.
			calls:  []string{"Fetch notification https://example.org/fhir/Encounter/86009987-eabe-42bf-8c02-b112b18cb616"},
			header: map[string]string{"Retry-After": "60"}, diag: "send the notification again after Retry-After"},
		{name: "sink defers a fetch: whole seconds, rounded up", method: "PUT", path: "/notify/Observation/abg-1", headers: bearer, status: 503,
			sink: func(f *fakeSink) {
				f.FetchFn = func(context.Context, webhook.Source, []string) error {
					return &webhook.RetryLater{After: 9*time.Minute + 59500*time.Millisecond, Err: errDisk}
				}
			},
			calls: []string{"Fetch rest-hook-put Observation/abg-1"}, header: map[string]string{"Retry-After": "600"}},
		{name: "sink defers a fetch: at least a second", method: "PUT", path: "/notify/Observation/abg-1", headers: bearer, status: 503,
			sink: func(f *fakeSink) {
				f.FetchFn = func(context.Context, webhook.Source, []string) error { return &webhook.RetryLater{Err: errDisk} }
			},
			calls: []string{"Fetch rest-hook-put Observation/abg-1"}, header: map[string]string{"Retry-After": "1"}},
		{name: "sink fails on status", method: "POST", path: "/notify", headers: fhirJSON, body: igFixture(t, "r4-heartbeat.json"), status: 503,
			sink: func(f *fakeSink) {
				f.StatusFn = func(context.Context, webhook.Source, notify.Notification) error { return context.DeadlineExceeded }
			},
			calls: []string{"Status notification heartbeat 2"}},
		{name: "sink fails on changed", method: "POST", path: "/notify", headers: bearer, status: 503,
			sink:  func(f *fakeSink) { f.ChangedFn = func(context.Context, webhook.Source) error { return errDisk } },
			calls: []string{"Changed rest-hook"}},
		{name: "status says invalid", method: "POST", path: "/notify", headers: fhirJSON, body: igFixture(t, "r4-heartbeat.json"), status: 400,
			sink: func(f *fakeSink) {
				f.StatusFn = func(context.Context, webhook.Source, notify.Notification) error {
					return fmt.Errorf("unknown subscription: %w", webhook.ErrInvalid)
				}
			},
			calls: []string{"Status notification heartbeat 2"}, diag: "unknown subscription"},
	}
	for _, tc := range cases {
		t.Run(tc.name, func(t *testing.T) {
			t.Parallel()
			sink := &fakeSink{}
			if tc.sink != nil {
				tc.sink(sink)
			}
			h, _ := newHandler(t, sink, tc.cfg)
			var body io.Reader = strings.NewReader(tc.body)
			if tc.chunked {
				body = io.MultiReader(strings.NewReader(tc.body)) // hides the length from httptest
			}
			req := httptest.NewRequest(tc.method, "http://127.0.0.1"+tc.path, body)
			for k, v := range tc.headers {
				req.Header.Set(k, v)
			}
			rec := httptest.NewRecorder()
			h.ServeHTTP(rec, req)

			if rec.Code != tc.status {
				t.Errorf("status %d, want %d; body %s", rec.Code, tc.status, rec.Body)
			}
			if got := summary(sink.Calls()); !reflect.DeepEqual(got, tc.calls) {
				t.Errorf("sink calls\n got %q\nwant %q", got, tc.calls)
			}
			for k, v := range tc.header {
				if got := rec.Header().Get(k); got != v {
					t.Errorf("header %s = %q, want %q", k, got, v)
				}
			}
			if ct := rec.Header().Get("Content-Type"); !strings.HasPrefix(ct, "application/fhir+json") {
				t.Errorf("Content-Type %q", ct)
			}
			oo := decodeOutcome(t, rec.Body.Bytes())
			wantSeverity := "error"
			if tc.status == 200 {
				wantSeverity = "information"
			}
			if oo.Issue[0].Severity != wantSeverity {
				t.Errorf("first issue severity %q, want %q", oo.Issue[0].Severity, wantSeverity)
			}
			if tc.diag != "" && !strings.Contains(oo.Issue[0].Diagnostics, tc.diag) {
				t.Errorf("diagnostics %q, want it to contain %q", oo.Issue[0].Diagnostics, tc.diag)
			}
			if tc.warning != "" {
				found := false
				for _, is := range oo.Issue[1:] {
					found = found || is.Severity == "warning" && strings.Contains(is.Diagnostics, tc.warning)
				}
				if !found {
					t.Errorf("no warning containing %q in %+v", tc.warning, oo.Issue)
				}
			}
		})
	}
}

func TestRequestID(t *testing.T) {
	t.Parallel()
	hex32 := regexp.MustCompile(`^[0-9a-f]{32}$`)
	cases := []struct {
		name, in string
		keep     bool
	}{
		{"uuid kept", "0b6a3c1e-8f4d-4a51-9d3e-2c1f5e7a9b00", true},
		{"token kept", "req_42.a", true},
		{"absent", "", false},
		{"spaces", "a b", false},
		{"newline", "a\nb", false},
		{"too long", strings.Repeat("a", 129), false},
		{"quote", `a"b`, false},
	}
	for _, tc := range cases {
		t.Run(tc.name, func(t *testing.T) {
			t.Parallel()
			sink := &fakeSink{}
			h, logs := newHandler(t, sink, nil)
			req := httptest.NewRequest("POST", "http://127.0.0.1/notify", nil)
			req.Header.Set("Authorization", "Bearer "+secret)
			if tc.in != "" {
				req.Header["X-Request-Id"] = []string{tc.in}
			}
			rec := httptest.NewRecorder()
			h.ServeHTTP(rec, req)
			got := rec.Header().Get("X-Request-Id")
			if tc.keep && got != tc.in {
				t.Errorf("X-Request-Id %q, want %q", got, tc.in)
			}
			if !tc.keep && !hex32.MatchString(got) {
				t.Errorf("X-Request-Id %q, want 32 hex digits", got)
			}
			calls := sink.Calls()
			if len(calls) != 1 || calls[0].src.RequestID != got {
				t.Errorf("Source.RequestID %+v, want %q", calls, got)
			}
			if !strings.Contains(logs.String(), `"request_id":"`+got+`"`) {
				t.Errorf("log lacks the request id: %s", logs)
			}
		})
	}
}

// Logs must carry the request id on every line and never a body, a path
// with an id, or a reference.
func TestLogsHoldNoIdentifiers(t *testing.T) {
	t.Parallel()
	bodies := []struct{ method, path, body string }{
		{"PUT", "/notify/Observation/abg-1", obs},
		{"PUT", "/notify/Observation/abg-2", obs},
		{"POST", "/notify", r4Notification("event-notification", "8", "https://ehr.example/fhir/Observation/abg-1", obs)},
		{"POST", "/notify", r4Notification("event-notification", "9", "https://ehr.example/fhir/Observation/abg-1", "")},
		{"PUT", "/notify/Patient/p1", patient},
	}
	sink := &fakeSink{ResourcesFn: func(_ context.Context, _ webhook.Source, rs []json.RawMessage) (webhook.Receipt, error) {
		return webhook.Receipt{Rejected: []webhook.Rejection{{Index: 0, Reason: "late", Detail: "Patient/p1 abg-1"}}}, nil
	}}
	h, logs := newHandler(t, sink, nil)
	for _, b := range bodies {
		req := httptest.NewRequest(b.method, "http://127.0.0.1"+b.path, strings.NewReader(b.body))
		req.Header.Set("Authorization", "Bearer "+secret)
		h.ServeHTTP(httptest.NewRecorder(), req)
	}
	lines := strings.Split(strings.TrimSpace(logs.String()), "\n")
	if len(lines) != len(bodies) {
		t.Fatalf("%d log lines for %d requests:\n%s", len(lines), len(bodies), logs)
	}
	for _, l := range lines {
		for _, bad := range []string{"abg-1", "abg-2", "p1", "ehr.example", "2019-8", secret} {
			if strings.Contains(l, bad) {
				t.Errorf("log line holds %q: %s", bad, l)
			}
		}
		if !strings.Contains(l, `"request_id":"`) {
			t.Errorf("log line without request_id: %s", l)
		}
	}
}

func TestNewRejectsConfig(t *testing.T) {
	t.Parallel()
	cases := []struct {
		name string
		cfg  webhook.Config
		want string
	}{
		{"no secret", webhook.Config{Sink: &fakeSink{}}, "Secret is required"},
		{"short secret", webhook.Config{Sink: &fakeSink{}, Secret: "short"}, "at least 16 bytes"},
		{"padded secret", webhook.Config{Sink: &fakeSink{}, Secret: " " + secret}, "white space"},
		{"no sink", webhook.Config{Secret: secret}, "Sink is required"},
		{"bad header", webhook.Config{Sink: &fakeSink{}, Secret: secret, Header: "X Token"}, "valid header name"},
		{"negative limit", webhook.Config{Sink: &fakeSink{}, Secret: secret, MaxBodyBytes: -1}, "MaxBodyBytes"},
		{"relative prefix", webhook.Config{Sink: &fakeSink{}, Secret: secret, Prefix: "hook"}, "Prefix"},
	}
	for _, tc := range cases {
		t.Run(tc.name, func(t *testing.T) {
			t.Parallel()
			h, err := webhook.New(tc.cfg)
			if err == nil || !strings.Contains(err.Error(), tc.want) {
				t.Fatalf("New = %v, %v; want an error containing %q", h, err, tc.want)
			}
		})
	}
	t.Run("every problem reported", func(t *testing.T) {
		t.Parallel()
		_, err := webhook.New(webhook.Config{MaxBodyBytes: -1})
		for _, want := range []string{"Sink", "Secret", "MaxBodyBytes"} {
			if err == nil || !strings.Contains(err.Error(), want) {
				t.Errorf("error %v does not mention %s", err, want)
			}
		}
	})
}

// The handler mounted on a real server on 127.0.0.1, under another prefix,
// with a body larger than the limit sent chunked.
func TestServerMount(t *testing.T) {
	t.Parallel()
	sink := &fakeSink{}
	h, _ := newHandler(t, sink, func(c *webhook.Config) { c.Prefix = "/hooks/fhir/"; c.MaxBodyBytes = 1024 })
	mux := http.NewServeMux()
	mux.Handle("/hooks/fhir/", h)
	mux.Handle("/hooks/fhir", h)
	srv := httptest.NewServer(mux)
	t.Cleanup(srv.Close)

	post := func(path string, body io.Reader) *http.Response {
		t.Helper()
		req, err := http.NewRequestWithContext(context.Background(), "PUT", srv.URL+path, body)
		if err != nil {
			t.Fatal(err)
		}
		req.Header.Set("Authorization", "Bearer "+secret)
		req.Header.Set("Content-Type", "application/fhir+json")
		resp, err := srv.Client().Do(req)
		if err != nil {
			t.Fatal(err)
		}
		_, _ = io.Copy(io.Discard, resp.Body)
		resp.Body.Close()
		return resp
	}
	if resp := post("/hooks/fhir/Observation/abg-1", strings.NewReader(obs)); resp.StatusCode != 200 {
		t.Errorf("PUT under prefix: %d", resp.StatusCode)
	}
	big := io.MultiReader(strings.NewReader(`{"resourceType":"Observation","id":"abg-1","note":[{"text":"`),
		strings.NewReader(strings.Repeat("x", 4096)), strings.NewReader(`"}]}`))
	if resp := post("/hooks/fhir/Observation/abg-1", big); resp.StatusCode != 413 {
		t.Errorf("chunked oversized body: %d, want 413", resp.StatusCode)
	}
	if got := summary(sink.Calls()); !reflect.DeepEqual(got, []string{"Resources rest-hook-put Observation"}) {
		t.Errorf("sink calls %q", got)
	}
}
