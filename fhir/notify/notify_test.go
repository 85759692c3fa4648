package notify_test

import (
	"bytes"
	"encoding/json"
	"errors"
	"os"
	"path/filepath"
	"reflect"
	"testing"
	"time"

	"github.com/deadspace-fhir/deadspace/fhir/notify"
)

// The fixtures follow the example instances of HL7 FHIR Subscriptions R5
// Backport IG STU 1.1.0 (see testdata/README.md for which are ours).
const (
	igSub   = "https://example.org/fhir/Subscription/admission"
	igTopic = "http://hl7.org/SubscriptionTopic/admission"
	igEnc   = "https://example.org/fhir/Encounter/86009987-eabe-42bf-8c02-b112b18cb616"
	igPat   = "https://example.org/fhir/Patient/1599eb66-431a-447c-a3de-6897fe9ae9a1"
)

// igTime is the timestamp every IG example uses, with seven fractional digits.
var igTime = time.Date(2020, 5, 29, 11, 44, 13, 188243200, time.FixedZone("", -5*3600))

func load(t testing.TB, name string) []byte {
	t.Helper()
	b, err := os.ReadFile(filepath.Join("testdata", name))
	if err != nil {
		t.Fatal(err)
	}
	return b
}

// want is what a test checks; Resources are compared by resourceType and
// fullUrl, and Event.Resource by presence and resourceType.
type want struct {
	sub, topic, status string
	typ                notify.Type
	since              uint64
	hasSince           bool
	content            notify.Content
	shape              notify.Shape
	events             []wantEvent
	errors             []string
	resources          []string // "Type fullUrl"
}

type wantEvent struct {
	number   uint64
	ts       time.Time
	focus    string
	context  []string
	resource string // resourceType of the matched resource, "" for none
}

func TestParseFixtures(t *testing.T) {
	t.Parallel()
	cases := []struct {
		file string
		want want
	}{
		{"r4-handshake.json", want{sub: igSub, topic: igTopic, status: "requested", typ: notify.TypeHandshake,
			since: 0, hasSince: true, content: notify.ContentEmpty, shape: notify.ShapeParameters}},
		{"r4-heartbeat.json", want{sub: igSub, topic: igTopic, status: "active", typ: notify.TypeHeartbeat,
			since: 2, hasSince: true, content: notify.ContentEmpty, shape: notify.ShapeParameters}},
		// IG: empty content has events but "no focus".
		{"r4-empty.json", want{sub: igSub, topic: igTopic, status: "active", typ: notify.TypeEvent,
			since: 2, hasSince: true, content: notify.ContentEmpty, shape: notify.ShapeParameters,
			events: []wantEvent{{number: 2, ts: igTime}}}},
		{"r4-id-only.json", want{sub: igSub, topic: igTopic, status: "active", typ: notify.TypeEvent,
			since: 2, hasSince: true, content: notify.ContentIDOnly, shape: notify.ShapeParameters,
			events: []wantEvent{{number: 2, ts: igTime, focus: igEnc}}}},
		{"r4-full-resource.json", want{sub: igSub, topic: igTopic, status: "active", typ: notify.TypeEvent,
			since: 2, hasSince: true, content: notify.ContentFullResource, shape: notify.ShapeParameters,
			events:    []wantEvent{{number: 2, ts: igTime, focus: igEnc, resource: "Encounter"}},
			resources: []string{"Encounter " + igEnc}}},
		{"r4-multi-resource.json", want{sub: igSub, topic: igTopic, status: "active", typ: notify.TypeEvent,
			since: 2, hasSince: true, content: notify.ContentFullResource, shape: notify.ShapeParameters,
			events:    []wantEvent{{number: 2, ts: igTime, focus: igEnc, context: []string{igPat}, resource: "Encounter"}},
			resources: []string{"Encounter " + igEnc, "Patient " + igPat}}},
		{"r4-error.json", want{sub: igSub, topic: igTopic, status: "error", typ: notify.TypeQueryStatus,
			since: 3, hasSince: true, content: notify.ContentEmpty, shape: notify.ShapeParameters,
			errors: []string{"http://terminology.hl7.org/CodeSystem/subscription-error|no-response"}}},
		{"r4b-handshake.json", want{sub: igSub, topic: igTopic, status: "requested", typ: notify.TypeHandshake,
			since: 0, hasSince: true, content: notify.ContentEmpty, shape: notify.ShapeSubscriptionStatus}},
		{"r4b-full-resource.json", want{sub: igSub, topic: igTopic, status: "active", typ: notify.TypeEvent,
			since: 2, hasSince: true, content: notify.ContentFullResource, shape: notify.ShapeSubscriptionStatus,
			events:    []wantEvent{{number: 2, ts: igTime, focus: igEnc, resource: "Encounter"}},
			resources: []string{"Encounter " + igEnc}}},
		{"r4b-error.json", want{sub: igSub, topic: igTopic, status: "error", typ: notify.TypeQueryStatus,
			since: 3, hasSince: true, content: notify.ContentEmpty, shape: notify.ShapeSubscriptionStatus,
			errors: []string{"http://terminology.hl7.org/CodeSystem/subscription-error|no-response"}}},
		// Ours: counters as JSON numbers, an entry with fullUrl only, a
		// versioned relative focus.
		{"r5-id-only-numbers.json", want{sub: igSub, topic: igTopic, status: "active", typ: notify.TypeEvent,
			since: 7, hasSince: true, content: notify.ContentIDOnly, shape: notify.ShapeSubscriptionStatus,
			events: []wantEvent{{number: 6, ts: igTime, focus: igEnc}, {number: 7, ts: igTime, focus: "Encounter/e2/_history/3"}}}},
		// Ours: the unverified Basic mapping.
		{"r4-basic-id-only.json", want{sub: igSub, topic: igTopic, status: "active", typ: notify.TypeEvent,
			since: 2, hasSince: true, content: notify.ContentIDOnly, shape: notify.ShapeBasic,
			events: []wantEvent{{number: 2, ts: igTime, focus: igEnc}}}},
	}
	for _, tc := range cases {
		t.Run(tc.file, func(t *testing.T) {
			t.Parallel()
			n, err := notify.Parse(load(t, tc.file))
			if err != nil {
				t.Fatalf("Parse: %v", err)
			}
			check(t, n, tc.want)
		})
	}
}

func check(t *testing.T, n notify.Notification, w want) {
	t.Helper()
	got := want{sub: n.Subscription, topic: n.Topic, status: n.Status, typ: n.Type, since: n.EventsSinceStart,
		hasSince: n.HasEventsSinceStart, content: n.Content, shape: n.Shape, errors: n.Errors}
	for _, e := range n.Events {
		we := wantEvent{number: e.Number, ts: e.Timestamp, focus: e.Focus, context: e.AdditionalContext}
		if e.Resource != nil {
			var h struct{ ResourceType string }
			if err := json.Unmarshal(e.Resource, &h); err != nil {
				t.Fatalf("event resource: %v", err)
			}
			we.resource = h.ResourceType
		}
		got.events = append(got.events, we)
	}
	for _, r := range n.Resources {
		got.resources = append(got.resources, r.ResourceType+" "+r.FullURL)
	}
	// Times compare by instant: the zone is the sender's.
	for i := range got.events {
		if i < len(w.events) && got.events[i].ts.Equal(w.events[i].ts) {
			got.events[i].ts = w.events[i].ts
		}
	}
	if !reflect.DeepEqual(got, w) {
		t.Errorf("got  %+v\nwant %+v", got, w)
	}
}

// edit loads a fixture, lets f change it as generic JSON, and re-encodes it.
func edit(t *testing.T, file string, f func(b map[string]any)) []byte {
	t.Helper()
	var b map[string]any
	if err := json.Unmarshal(load(t, file), &b); err != nil {
		t.Fatal(err)
	}
	f(b)
	out, err := json.Marshal(b)
	if err != nil {
		t.Fatal(err)
	}
	return out
}

func entries(b map[string]any) []any { return b["entry"].([]any) }
func status(b map[string]any) map[string]any {
	return entries(b)[0].(map[string]any)["resource"].(map[string]any)
}
func params(b map[string]any) []any { return status(b)["parameter"].([]any) }
func param(b map[string]any, name string) map[string]any {
	for _, p := range params(b) {
		if p.(map[string]any)["name"] == name {
			return p.(map[string]any)
		}
	}
	panic("no parameter " + name)
}
func eventPart(b map[string]any, name string) map[string]any {
	for _, p := range param(b, "notification-event")["part"].([]any) {
		if p.(map[string]any)["name"] == name {
			return p.(map[string]any)
		}
	}
	panic("no part " + name)
}

func TestParseVariants(t *testing.T) {
	t.Parallel()
	cases := []struct {
		name  string
		body  func(t *testing.T) []byte
		check func(t *testing.T, n notify.Notification)
	}{
		{
			// integer64 is the R5 type of the counters (the FHIR R4B to R5
			// differences); unsignedInt is our guess at what a server
			// built on R4 datatypes would pick. Either must be read.
			name: "counters in other value types",
			body: func(t *testing.T) []byte {
				return edit(t, "r4-id-only.json", func(b map[string]any) {
					p := param(b, "events-since-subscription-start")
					delete(p, "valueString")
					p["valueUnsignedInt"] = 41
					e := eventPart(b, "event-number")
					delete(e, "valueString")
					e["valueInteger64"] = "41"
				})
			},
			check: func(t *testing.T, n notify.Notification) {
				if n.EventsSinceStart != 41 || n.Events[0].Number != 41 {
					t.Errorf("since %d, event %d, want 41, 41", n.EventsSinceStart, n.Events[0].Number)
				}
			},
		},
		{
			// eventsInNotification exists only in drafts (FHIR R4B to R5 differences §2).
			name: "draft eventsInNotification ignored",
			body: func(t *testing.T) []byte {
				return edit(t, "r4-id-only.json", func(b map[string]any) {
					s := status(b)
					s["parameter"] = append(params(b), map[string]any{"name": "events-in-notification", "valueInteger": 9})
				})
			},
			check: func(t *testing.T, n notify.Notification) {
				if len(n.Events) != 1 || n.EventsSinceStart != 2 {
					t.Errorf("events %d since %d", len(n.Events), n.EventsSinceStart)
				}
			},
		},
		{
			name: "no events-since-subscription-start",
			body: func(t *testing.T) []byte {
				return edit(t, "r4-heartbeat.json", func(b map[string]any) {
					var keep []any
					for _, p := range params(b) {
						if p.(map[string]any)["name"] != "events-since-subscription-start" {
							keep = append(keep, p)
						}
					}
					status(b)["parameter"] = keep
				})
			},
			check: func(t *testing.T, n notify.Notification) {
				if n.HasEventsSinceStart {
					t.Error("HasEventsSinceStart = true for a body without the counter")
				}
			},
		},
		{
			// A relative focus still finds its resource by type and id when
			// the entry's fullUrl is absolute.
			name: "focus matched by type and id",
			body: func(t *testing.T) []byte {
				return edit(t, "r4-full-resource.json", func(b map[string]any) {
					eventPart(b, "focus")["valueReference"] = map[string]any{
						"reference": "Encounter/86009987-eabe-42bf-8c02-b112b18cb616/_history/1"}
				})
			},
			check: func(t *testing.T, n notify.Notification) {
				if n.Events[0].Resource == nil || n.Content != notify.ContentFullResource {
					t.Errorf("resource matched %v, content %s", n.Events[0].Resource != nil, n.Content)
				}
			},
		},
		{
			// The IG allows leaving a resource out of full-resource content;
			// the Content stays full-resource when one focus is included.
			name: "full-resource with one resource missing",
			body: func(t *testing.T) []byte {
				return edit(t, "r4-full-resource.json", func(b map[string]any) {
					s := status(b)
					s["parameter"] = append(params(b), map[string]any{"name": "notification-event", "part": []any{
						map[string]any{"name": "event-number", "valueString": "3"},
						map[string]any{"name": "focus", "valueReference": map[string]any{"reference": "Encounter/other"}},
					}})
				})
			},
			check: func(t *testing.T, n notify.Notification) {
				if n.Content != notify.ContentFullResource || n.Events[0].Resource == nil || n.Events[1].Resource != nil {
					t.Errorf("content %s, resources %v %v", n.Content, n.Events[0].Resource != nil, n.Events[1].Resource != nil)
				}
			},
		},
		{
			name: "resource kept byte for byte",
			body: func(t *testing.T) []byte { return load(t, "r4-full-resource.json") },
			check: func(t *testing.T, n notify.Notification) {
				var got, want bytes.Buffer
				if err := json.Compact(&got, n.Events[0].Resource); err != nil {
					t.Fatal(err)
				}
				if err := json.Compact(&want, []byte(`{"resourceType":"Encounter","id":"86009987-eabe-42bf-8c02-b112b18cb616",
					"status":"in-progress","class":{"system":"http://terminology.hl7.org/CodeSystem/v3-ActCode","code":"VR"},
					"subject":{"reference":"`+igPat+`","display":"Example Patient"}}`)); err != nil {
					t.Fatal(err)
				}
				if got.String() != want.String() {
					t.Errorf("resource\n%s\nwant\n%s", got.String(), want.String())
				}
			},
		},
	}
	for _, tc := range cases {
		t.Run(tc.name, func(t *testing.T) {
			t.Parallel()
			n, err := notify.Parse(tc.body(t))
			if err != nil {
				t.Fatalf("Parse: %v", err)
			}
			tc.check(t, n)
		})
	}
}

func TestParseErrors(t *testing.T) {
	t.Parallel()
	raw := func(s string) func(*testing.T) []byte { return func(*testing.T) []byte { return []byte(s) } }
	fix := func(file string, f func(map[string]any)) func(*testing.T) []byte {
		return func(t *testing.T) []byte { return edit(t, file, f) }
	}
	cases := []struct {
		name   string
		body   func(*testing.T) []byte
		want   error
		rtype  string
		noEcho string // a value from the body that must not appear in the error text
	}{
		{name: "empty", body: raw(""), want: notify.ErrNotJSON},
		{name: "not JSON", body: raw("hello"), want: notify.ErrNotJSON},
		{name: "truncated", body: func(t *testing.T) []byte { b := load(t, "r4-id-only.json"); return b[:len(b)/2] }, want: notify.ErrNotJSON},
		{name: "array", body: raw(`[{"resourceType":"Bundle"}]`), want: notify.ErrNotJSON},
		{name: "null", body: raw(`null`), want: notify.ErrNotJSON},
		{name: "no resourceType", body: raw(`{"type":"history"}`), want: notify.ErrNotBundle},
		{name: "single Observation", body: raw(`{"resourceType":"Observation","id":"o1","status":"final"}`),
			want: notify.ErrNotBundle, rtype: "Observation"},
		{name: "transaction Bundle", body: raw(`{"resourceType":"Bundle","type":"transaction","entry":[]}`), want: notify.ErrNotNotification},
		{name: "searchset Bundle", body: raw(`{"resourceType":"Bundle","type":"searchset"}`), want: notify.ErrNotNotification},
		{name: "history of Observations",
			body: raw(`{"resourceType":"Bundle","type":"history","entry":[{"resource":{"resourceType":"Observation","id":"x"}}]}`),
			want: notify.ErrNotNotification},
		{name: "empty history", body: raw(`{"resourceType":"Bundle","type":"history"}`), want: notify.ErrNotNotification},
		{name: "history of plain Basic",
			body: raw(`{"resourceType":"Bundle","type":"history","entry":[{"resource":{"resourceType":"Basic","extension":[{"url":"http://x/type","valueCode":"a"}]}}]}`),
			want: notify.ErrNotNotification},
		{name: "subscription-notification without entries", body: raw(`{"resourceType":"Bundle","type":"subscription-notification"}`), want: notify.ErrMalformed},
		{name: "subscription-notification with an Observation first",
			body: raw(`{"resourceType":"Bundle","type":"subscription-notification","entry":[{"resource":{"resourceType":"Observation"}}]}`),
			want: notify.ErrMalformed},
		{name: "Bundle.entry not an array", body: raw(`{"resourceType":"Bundle","type":"history","entry":{}}`), want: notify.ErrMalformed},
		{name: "no subscription", want: notify.ErrMalformed, body: fix("r4-id-only.json", func(b map[string]any) {
			status(b)["parameter"] = params(b)[1:]
		})},
		{name: "no type", want: notify.ErrMalformed, body: fix("r4-id-only.json", func(b map[string]any) {
			delete(param(b, "type"), "valueCode")
		})},
		{name: "type twice", want: notify.ErrMalformed, body: fix("r4-id-only.json", func(b map[string]any) {
			status(b)["parameter"] = append(params(b), map[string]any{"name": "type", "valueCode": "heartbeat"})
		})},
		{name: "no event-number", want: notify.ErrMalformed, body: fix("r4-id-only.json", func(b map[string]any) {
			p := param(b, "notification-event")
			p["part"] = p["part"].([]any)[1:]
		})},
		{name: "negative event-number", want: notify.ErrMalformed, body: fix("r4-id-only.json", func(b map[string]any) {
			eventPart(b, "event-number")["valueString"] = "-1"
		})},
		{name: "fractional counter", want: notify.ErrMalformed, body: fix("r4-id-only.json", func(b map[string]any) {
			param(b, "events-since-subscription-start")["valueString"] = "2.5"
		})},
		{name: "counter beyond uint64", want: notify.ErrMalformed, body: fix("r4-id-only.json", func(b map[string]any) {
			param(b, "events-since-subscription-start")["valueString"] = "18446744073709551616"
		})},
		{name: "counter as a boolean", want: notify.ErrMalformed, body: fix("r4-id-only.json", func(b map[string]any) {
			p := param(b, "events-since-subscription-start")
			delete(p, "valueString")
			p["valueBoolean"] = true
		})},
		{name: "bad timestamp", want: notify.ErrMalformed, noEcho: "yesterday", body: fix("r4-id-only.json", func(b map[string]any) {
			eventPart(b, "timestamp")["valueInstant"] = "yesterday"
		})},
		{name: "two value[x]", want: notify.ErrMalformed, body: fix("r4-id-only.json", func(b map[string]any) {
			param(b, "status")["valueString"] = "active"
		})},
		{name: "focus not a Reference", want: notify.ErrMalformed, body: fix("r4-id-only.json", func(b map[string]any) {
			eventPart(b, "focus")["valueReference"] = "Encounter/1"
		})},
		{name: "entry resource without resourceType", want: notify.ErrMalformed, body: fix("r4-full-resource.json", func(b map[string]any) {
			delete(entries(b)[1].(map[string]any)["resource"].(map[string]any), "resourceType")
		})},
		{name: "entry resource a string", want: notify.ErrMalformed, body: fix("r4-full-resource.json", func(b map[string]any) {
			entries(b)[1].(map[string]any)["resource"] = "Encounter"
		})},
		{name: "SubscriptionStatus eventNumber missing", want: notify.ErrMalformed, body: fix("r4b-full-resource.json", func(b map[string]any) {
			delete(status(b)["notificationEvent"].([]any)[0].(map[string]any), "eventNumber")
		})},
		{name: "SubscriptionStatus type a number", want: notify.ErrMalformed, body: fix("r4b-full-resource.json", func(b map[string]any) {
			status(b)["type"] = 3
		})},
		{name: "nested too deeply", want: notify.ErrMalformed, body: fix("r4-id-only.json", func(b map[string]any) {
			var p any = map[string]any{"name": "x", "valueString": "y"}
			for range 20 {
				p = map[string]any{"name": "x", "part": []any{p}}
			}
			status(b)["parameter"] = append(params(b), p)
		})},
		{name: "unknown resourceType not echoed", body: raw(`{"resourceType":"Patient/secret-id"}`),
			want: notify.ErrNotBundle, rtype: "Patient/secret-id", noEcho: "secret-id"},
	}
	for _, tc := range cases {
		t.Run(tc.name, func(t *testing.T) {
			t.Parallel()
			_, err := notify.Parse(tc.body(t))
			if !errors.Is(err, tc.want) {
				t.Fatalf("err = %v, want %v", err, tc.want)
			}
			var e *notify.Error
			if !errors.As(err, &e) {
				t.Fatalf("err %T is not a *notify.Error", err)
			}
			if e.ResourceType != tc.rtype {
				t.Errorf("ResourceType = %q, want %q", e.ResourceType, tc.rtype)
			}
			if tc.noEcho != "" && bytes.Contains([]byte(err.Error()), []byte(tc.noEcho)) {
				t.Errorf("error %q repeats body text %q", err, tc.noEcho)
			}
		})
	}
}
