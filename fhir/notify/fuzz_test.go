package notify_test

import (
	"bytes"
	"errors"
	"os"
	"path/filepath"
	"reflect"
	"testing"

	"github.com/deadspace-fhir/deadspace/fhir/notify"
)

// addFixtures seeds a fuzz test with every notification in testdata.
func addFixtures(f *testing.F) {
	files, err := filepath.Glob(filepath.Join("testdata", "*.json"))
	if err != nil || len(files) == 0 {
		f.Fatalf("no seeds: %v", err)
	}
	for _, name := range files {
		b, err := os.ReadFile(name)
		if err != nil {
			f.Fatal(err)
		}
		f.Add(b)
	}
}

func FuzzParse(f *testing.F) {
	addFixtures(f)
	f.Add([]byte(`{"resourceType":"Observation"}`))
	f.Add([]byte(`{"resourceType":"Bundle","type":"transaction"}`))
	f.Add([]byte(`{"resourceType":"Bundle","type":"subscription-notification","entry":[{"resource":{"resourceType":"SubscriptionStatus","subscription":{"reference":"Subscription/1"},"type":"event-notification","notificationEvent":[{"eventNumber":1,"focus":{"reference":"Observation/1"}}]}},{"fullUrl":"Observation/1","resource":{"resourceType":"Observation","id":"1"}}]}`))
	f.Fuzz(func(t *testing.T, body []byte) {
		n, err := notify.Parse(body)
		if err != nil {
			var e *notify.Error
			if !errors.As(err, &e) {
				t.Fatalf("error %T is not a *notify.Error: %v", err, err)
			}
			kinds := 0
			for _, k := range []error{notify.ErrNotJSON, notify.ErrNotBundle, notify.ErrNotNotification, notify.ErrMalformed} {
				if errors.Is(err, k) {
					kinds++
				}
			}
			if kinds != 1 {
				t.Fatalf("error %v matches %d sentinels", err, kinds)
			}
			return
		}
		if n.Subscription == "" || n.Type == "" {
			t.Fatalf("accepted without subscription or type: %+v", n)
		}
		focused, included := 0, 0
		for _, ev := range n.Events {
			if ev.Focus != "" {
				focused++
			}
			if ev.Resource == nil {
				continue
			}
			included++
			if ev.Focus == "" {
				t.Fatal("a resource attached to an event without a focus")
			}
			found := false
			for _, r := range n.Resources {
				if bytes.Equal(r.Resource, ev.Resource) {
					found = true
				}
			}
			if !found {
				t.Fatal("event resource is not among Resources")
			}
		}
		var want notify.Content
		switch {
		case focused == 0:
			want = notify.ContentEmpty
		case included == 0:
			want = notify.ContentIDOnly
		default:
			want = notify.ContentFullResource
		}
		if n.Content != want {
			t.Fatalf("Content %s, want %s", n.Content, want)
		}
		for _, r := range n.Resources {
			if r.ResourceType == "" || len(r.Resource) == 0 {
				t.Fatalf("resource entry without type or body: %+v", r)
			}
		}
		again, err := notify.Parse(body)
		if err != nil || !reflect.DeepEqual(n, again) {
			t.Fatalf("second parse differs: %v", err)
		}
	})
}
