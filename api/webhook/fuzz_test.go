package webhook_test

import (
	"bytes"
	"encoding/json"
	"net/http/httptest"

	"github.com/deadspace-fhir/deadspace/api/webhook"
	"testing"
)

// FuzzHandler drives the handler with arbitrary methods, paths, headers and
// bodies against a sink that never fails. It must never panic, never answer
// 5xx, always answer with an OperationOutcome, never touch the sink without
// the right credential, and never answer 200 without having stored
// something.
func FuzzHandler(f *testing.F) {
	for _, s := range []struct {
		method uint8
		path   string
		ctype  string
		auth   uint8
		body   string
	}{
		{1, "/notify", "application/fhir+json", 0, ""},
		{1, "/notify", "application/fhir+json", 0, obs},
		{2, "/notify/Observation/abg-1", "application/fhir+json", 0, obs},
		{2, "/notify/Patient/p1", "application/json", 0, patient},
		{1, "/notify", "application/fhir+json", 0, igFixture(f, "r4-id-only.json")},
		{1, "/notify", "application/fhir+json", 0, igFixture(f, "r4-multi-resource.json")},
		{1, "/notify", "application/fhir+json", 0, igFixture(f, "r4b-full-resource.json")},
		{1, "/notify", "application/fhir+json", 0, igFixture(f, "r5-id-only-numbers.json")},
		{1, "/notify", "", 0, r4Notification("event-notification", "3", "Observation/abg-1", obs)},
		{1, "/notify", "", 0, `{"resourceType":"Bundle","type":"batch","entry":[{"resource":` + obs + `}]}`},
		{1, "/notify", "text/plain", 1, obs},
		{0, "/notify/Observation/abg-1", "", 2, ""},
		{2, "/notify/../Observation/x", "application/fhir+json", 0, `{"resourceType":"Observation","id":"x"}`},
	} {
		f.Add(s.method, s.path, s.ctype, s.auth, []byte(s.body))
	}
	methods := []string{"GET", "POST", "PUT", "DELETE", "PATCH", "HEAD", "OPTIONS", "post", ""}
	f.Fuzz(func(t *testing.T, m uint8, path, ctype string, auth uint8, body []byte) {
		sink := &fakeSink{}
		h, _ := newHandler(t, sink, func(c *webhook.Config) { c.MaxBodyBytes = 1 << 16 })
		req := httptest.NewRequest("POST", "http://127.0.0.1/", bytes.NewReader(body))
		req.Method = methods[int(m)%len(methods)]
		req.URL.Path = path
		if ctype != "" {
			req.Header["Content-Type"] = []string{ctype}
		}
		authed := false
		switch auth % 4 {
		case 0:
			req.Header.Set("Authorization", "Bearer "+secret)
			authed = true
		case 1:
			req.Header.Set("Authorization", "Bearer "+ctype)
			authed = ctype == secret
		case 2:
			// no credential
		case 3:
			req.Header["Authorization"] = []string{"Bearer " + secret, "Bearer " + secret}
		}
		rec := httptest.NewRecorder()
		h.ServeHTTP(rec, req)

		calls := sink.Calls()
		if rec.Code >= 500 {
			t.Fatalf("status %d with a sink that never fails: %s", rec.Code, rec.Body)
		}
		if !authed && (rec.Code != 401 || len(calls) != 0) {
			t.Fatalf("unauthenticated request: status %d, %d sink calls", rec.Code, len(calls))
		}
		if rec.Code == 200 && len(calls) == 0 {
			t.Fatal("200 without a sink call")
		}
		if rec.Code != 200 && len(calls) != 0 {
			t.Fatalf("status %d after %d sink calls with a sink that accepts everything", rec.Code, len(calls))
		}
		var oo struct {
			ResourceType string            `json:"resourceType"`
			Issue        []json.RawMessage `json:"issue"`
		}
		if err := json.Unmarshal(rec.Body.Bytes(), &oo); err != nil || oo.ResourceType != "OperationOutcome" || len(oo.Issue) == 0 {
			t.Fatalf("response is not an OperationOutcome: %v %s", err, rec.Body)
		}
		for _, c := range calls {
			for _, r := range c.resources {
				var hd struct{ ResourceType string }
				if json.Unmarshal(r, &hd) != nil || hd.ResourceType == "" {
					t.Fatalf("sink given a resource without resourceType: %s", r)
				}
			}
		}
	})
}
