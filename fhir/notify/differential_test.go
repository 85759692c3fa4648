package notify_test

import (
	"bytes"
	"encoding/json"
	"errors"
	"io"
	"reflect"
	"strings"
	"testing"

	"github.com/deadspace-fhir/deadspace/fhir/notify"
)

// FuzzParseAgainstOld compares Parse with the parser it replaced, which
// decoded the same members with encoding/json (notify.OldParse, kept in
// legacy_test.go). On every body without a repeated member name they must
// agree: the same Notification, or errors of the same kind and path, with
// the same detail except where the old one was encoding/json's text for a
// value of the wrong type. Repeated names are left out because
// encoding/json merged a repeated object member into the first, which the
// new reader does not copy (the last one counts).
func FuzzParseAgainstOld(f *testing.F) {
	addFixtures(f)
	for _, s := range differentialSeeds {
		f.Add([]byte(s))
	}
	f.Fuzz(func(t *testing.T, body []byte) {
		compareWithOld(t, body)
	})
}

// differentialSeeds reach each error the parsers report.
var differentialSeeds = []string{
	``, `null`, `[]`, `"x"`, `{`, `{"resourceType":"Bundle"} x`,
	`{}`, `{"resourceType":5}`, `{"resourceType":null}`, `{"resourceType":""}`, `{"resourceType":"Observation","id":"1"}`,
	`{"resourceType":"Bundle","type":5}`, `{"resourceType":"Bundle","type":"transaction"}`, `{"resourceType":"Bundle"}`,
	`{"resourceType":"Bundle","type":"history","entry":{}}`,
	`{"resourceType":"Bundle","type":"history","entry":[5]}`,
	`{"resourceType":"Bundle","type":"history","entry":[{"fullUrl":5}]}`,
	`{"resourceType":"Bundle","type":"history","entry":[null]}`,
	`{"resourceType":"Bundle","type":"subscription-notification","entry":[{"resource":null}]}`,
	`{"resourceType":"Bundle","type":"history","entry":[{"resource":"x"}]}`,
	`{"resourceType":"Bundle","type":"history","entry":[{"resource":{"id":5}}]}`,
	`{"resourceType":"Bundle","type":"history","entry":[{"resource":{"resourceType":null}}]}`,
	`{"resourceType":"Bundle","type":"history","entry":[{"resource":{"resourceType":"Observation"}}]}`,
	`{"resourceType":"Bundle","type":"subscription-notification","entry":[{"resource":{"resourceType":"Basic"}}]}`,
	`{"resourceType":"Bundle","type":"history","entry":[{"resource":{"resourceType":"Parameters","parameter":{}}}]}`,
	`{"resourceType":"Bundle","type":"history","entry":[{"resource":{"resourceType":"Parameters","parameter":[5]}}]}`,
	`{"resourceType":"Bundle","type":"history","entry":[{"resource":{"resourceType":"Parameters","parameter":[{"name":5}]}}]}`,
	`{"resourceType":"Bundle","type":"history","entry":[{"resource":{"resourceType":"Parameters","parameter":[{"name":"type","valueCode":"x","valueString":"y"}]}}]}`,
	`{"resourceType":"Bundle","type":"history","entry":[{"resource":{"resourceType":"Parameters","parameter":[{"name":"x","part":5}]}}]}`,
	`{"resourceType":"Bundle","type":"history","entry":[{"resource":{"resourceType":"Parameters","parameter":[{"part":[{"name":"x","part":null}],"name":"notification-event"}]}}]}`,
	`{"resourceType":"Bundle","type":"history","entry":[{"resource":{"resourceType":"Parameters","parameter":[{"name":"subscription","valueReference":{"reference":"Subscription/1"}},{"name":"type","valueCode":"event-notification"},{"name":"notification-event","part":[{"name":"focus","valueReference":{"reference":"Observation/1"}}]}]}}]}`,
	`{"resourceType":"Bundle","type":"history","entry":[{"resource":{"resourceType":"Parameters","parameter":[{"name":"subscription","valueReference":5},{"name":"type","valueCode":"event-notification"}]}}]}`,
	`{"resourceType":"Bundle","type":"history","entry":[{"resource":{"resourceType":"Parameters","parameter":[{"name":"subscription","valueUri":"Subscription/1"},{"name":"Type","valueCode":"heartbeat"},{"name":"events_since_subscription_start","valueInteger":-1}]}}]}`,
	`{"resourceType":"Bundle","type":"history","entry":[{"resource":{"resourceType":"Parameters","parameter":[{"name":"subscription","valueUri":"Subscription/1"},{"name":"type","valueCode":"heartbeat"},{"name":"error","valueCodeableConcept":{"coding":[{"system":"s","code":"c"}]}},{"name":"error","valueCodeableConcept":{"text":5}}]}}]}`,
	`{"resourceType":"Bundle","type":"history","entry":[{"resource":{"resourceType":"Parameters","parameter":[{"name":"subscription","valueUri":"Subscription/1"},{"name":"subscription","valueUri":"Subscription/2"}]}}]}`,
	`{"resourceType":"Bundle","type":"history","entry":[{"resource":{"resourceType":"Parameters","parameter":[{"name":"subscription","valueUri":"Subscription/1"},{"name":"type","valueCode":"event-notification"},{"name":"notification-event","part":[{"name":"event-number","valueString":"1"},{"name":"timestamp","valueInstant":"yesterday"}]}]}}]}`,
	`{"resourceType":"Bundle","type":"history","entry":[{"resource":{"resourceType":"Basic","extension":[{"url":"http://x/SubscriptionStatus","extension":[{"url":"subscription","valueReference":{"reference":"Subscription/1"}},{"url":"type","valueCode":"heartbeat"}]}]}}]}`,
	`{"resourceType":"Bundle","type":"history","entry":[{"resource":{"resourceType":"Basic","extension":[{"url":"a.subscription","valueString":"Subscription/1"},{"url":"b#type","valueCode":"heartbeat"},{"url":"x","extension":7}]}}]}`,
	`{"resourceType":"Bundle","type":"history","entry":[{"resource":{"resourceType":"Basic","extension":[{"url":""}]}}]}`,
	`{"resourceType":"Bundle","type":"subscription-notification","entry":[{"resource":{"resourceType":"SubscriptionStatus","subscription":{"reference":"Subscription/1"},"type":"event-notification","eventsSinceSubscriptionStart":"x"}}]}`,
	`{"resourceType":"Bundle","type":"subscription-notification","entry":[{"resource":{"resourceType":"SubscriptionStatus","subscription":"Subscription/1","type":"event-notification"}}]}`,
	`{"resourceType":"Bundle","type":"subscription-notification","entry":[{"resource":{"resourceType":"SubscriptionStatus","subscription":{"reference":"Subscription/1"},"type":"event-notification","notificationEvent":[null]}}]}`,
	`{"resourceType":"Bundle","type":"subscription-notification","entry":[{"resource":{"resourceType":"SubscriptionStatus","subscription":{"reference":"Subscription/1"},"type":"event-notification","notificationEvent":[{"eventNumber":"3","timestamp":"2025-01-01T00:00:00Z","focus":{"reference":"Observation/1/_history/2"},"additionalContext":[null,{"reference":"Patient/1"}]}],"error":[{"coding":[{"code":"x"}]},{"text":"t"},null]}},{"fullUrl":"urn:uuid:1","resource":{"resourceType":"Observation","id":"1"}},{"fullUrl":"x"},{"resource":null}]}`,
	`{"resourceType":"Bundle","type":"subscription-notification","entry":[{"resource":{"resourceType":"SubscriptionStatus","subscription":{"reference":"Subscription/1"},"type":"event-notification"}},{"resource":[]}]}`,
	`{"resourceType":"Bundle","type":"subscription-notification","entry":[{"resource":{"resourceType":"SubscriptionStatus","subscription":{"reference":"Subscription/1"},"type":"event-notification"}},{"resource":{"id":"1"}}]}`,
	`{"resource\u0054ype":"Bundle","TYPE":"history","Entry":[{"Resource":{"RESOURCETYPE":"SubscriptionStatus","Subscription":{"Reference":"S/1"},"type":"handshake","status":"\u0061ctive"}}]}`,
}

func compareWithOld(t *testing.T, body []byte) {
	t.Helper()
	if repeatsAName(body) {
		return
	}
	want, wantErr := notify.OldParse(body)
	got, gotErr := notify.Parse(body)
	switch {
	case wantErr == nil && gotErr == nil:
		if !reflect.DeepEqual(got, want) {
			t.Fatalf("Parse differs from the old parser:\n got  %+v\n want %+v", got, want)
		}
	case wantErr == nil || gotErr == nil:
		t.Fatalf("Parse error %v, old parser error %v", gotErr, wantErr)
	default:
		var we, ge *notify.Error
		if !errors.As(wantErr, &we) || !errors.As(gotErr, &ge) {
			t.Fatalf("errors are not *notify.Error: %v / %v", gotErr, wantErr)
		}
		if ge.Kind != we.Kind || ge.Path != we.Path || ge.ResourceType != we.ResourceType {
			t.Fatalf("Parse error %q, old parser error %q", gotErr, wantErr)
		}
		if typeDetail(we.Detail) {
			if !strings.Contains(ge.Detail, "JSON") {
				t.Fatalf("Parse error %q does not say which JSON type, old parser error %q", gotErr, wantErr)
			}
		} else if ge.Detail != we.Detail {
			t.Fatalf("Parse error %q, old parser error %q", gotErr, wantErr)
		}
	}
}

// typeDetail says whether an old error detail was encoding/json's text for
// a value of the wrong type (jsonDetail of an UnmarshalTypeError).
func typeDetail(d string) bool {
	return strings.Contains(d, " is a JSON ") || strings.HasPrefix(d, "a JSON ")
}

// repeatsAName says whether some object of a valid JSON body has two member
// names that encoding/json would take for the same field (equal under
// bytes.EqualFold).
func repeatsAName(body []byte) bool {
	dec := json.NewDecoder(bytes.NewReader(body))
	type frame struct {
		object bool
		names  []string
		key    bool // the next token in an object is a name
	}
	var stack []frame
	for {
		tok, err := dec.Token()
		if err == io.EOF {
			return false
		}
		if err != nil {
			return false // invalid JSON: both must say ErrNotJSON
		}
		var top *frame
		if len(stack) > 0 {
			top = &stack[len(stack)-1]
		}
		if top != nil && top.object && top.key {
			if name, ok := tok.(string); ok {
				for _, n := range top.names {
					if strings.EqualFold(n, name) || bytes.EqualFold([]byte(n), []byte(name)) {
						return true
					}
				}
				top.names = append(top.names, name)
				top.key = false
				continue
			}
		}
		if top != nil && top.object {
			top.key = true // after this value, a name comes next
		}
		switch tok {
		case json.Delim('{'):
			stack = append(stack, frame{object: true, key: true})
		case json.Delim('['):
			stack = append(stack, frame{})
		case json.Delim('}'), json.Delim(']'):
			stack = stack[:len(stack)-1]
			if len(stack) > 0 && stack[len(stack)-1].object {
				stack[len(stack)-1].key = true
			}
		}
	}
}
