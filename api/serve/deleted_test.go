package serve_test

import (
	"encoding/json"
	"fmt"
	"net/http"
	"testing"
	"time"

	"github.com/deadspace-fhir/deadspace/fhir/fhirtest/fakefhir"
)

// TestFakeDeletedBloodGasIsWithdrawn: a blood gas values were derived
// from is deleted on the server. The service learns it either from an
// id-only notification naming it (the read answers 410 Gone) or from a
// Bundle whose entry DELETEs it; either way the request is answered 200
// (not retried for ever) and every value derived from the gas is
// withdrawn on the server. Written again later, with a newer
// lastUpdated, the gas is derived from again.
func TestFakeDeletedBloodGasIsWithdrawn(t *testing.T) {
	for _, tc := range []struct {
		name string
		body func(f *fakefhir.Server, gasID string) []byte
	}{
		{"id-only notification", func(_ *fakefhir.Server, gasID string) []byte {
			return idOnlyNotification("Subscription/deleted", 2, []string{"Observation/" + gasID})
		}},
		{"Bundle DELETE entry", func(f *fakefhir.Server, gasID string) []byte {
			return []byte(fmt.Sprintf(`{"resourceType":"Bundle","type":"transaction","entry":[{"fullUrl":"%s/Observation/%s",`+
				`"request":{"method":"DELETE","url":"Observation/%s"}}]}`, f.BaseURL, gasID, gasID))
		}},
	} {
		t.Run(tc.name, func(t *testing.T) {
			f := fakefhir.Start(t)
			s := startOnFake(t, f, nil)
			b := fakeBed(t, f, time.Now().Add(-30*time.Minute), true)
			if code, body := post(t, s.url, http.MethodPost, "/notify", notification("Subscription/deleted", 1, b.resources), secret); code != http.StatusOK {
				t.Fatalf("HTTP %d: %s", code, body)
			}
			waitDerived(t, f, b.subject, wantValues)
			if !f.Delete("Observation", b.gasID) {
				t.Fatal("nothing deleted")
			}
			if code, body := post(t, s.url, http.MethodPost, "/notify", tc.body(f, b.gasID), secret); code != http.StatusOK {
				t.Fatalf("the deletion answered HTTP %d: %s", code, body)
			}
			waitFor(t, "every derived value withdrawn", func() bool { return statuses(f, b.subject)["entered-in-error"] == wantValues })

			// The gas written again, as a new version.
			var gas map[string]any
			_ = json.Unmarshal(b.gas, &gas)
			delete(gas, "meta")
			raw, _ := json.Marshal(gas)
			again, err := f.Put(raw)
			if err != nil {
				t.Fatal(err)
			}
			if code, body := post(t, s.url, http.MethodPost, "/notify", notification("Subscription/deleted", 3, []json.RawMessage{again}), secret); code != http.StatusOK {
				t.Fatalf("HTTP %d: %s", code, body)
			}
			waitFor(t, "the values derived again", func() bool { return statuses(f, b.subject)["entered-in-error"] == 0 })
		})
	}
}

// statuses counts the derived Observations on the fake for subject by
// status.
func statuses(f *fakefhir.Server, subject string) map[string]int {
	out := map[string]int{}
	for _, m := range derivedOn(f, subject) {
		s, _ := m["status"].(string)
		out[s]++
	}
	return out
}
