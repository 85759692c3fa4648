package serve_test

import (
	"context"
	"encoding/json"
	"net/http"
	"sort"
	"strings"
	"testing"
	"time"

	"github.com/deadspace-fhir/deadspace/fhir/fhirtest/fakefhir"
)

// derivedValueList lists the derived values on the server for subject, as
// "code=value status", sorted.
func derivedValueList(f *fakefhir.Server, subject string) []string {
	var out []string
	for _, m := range derivedOn(f, subject) {
		code := m["code"].(map[string]any)["coding"].([]any)[0].(map[string]any)["code"]
		var v any
		if q, ok := m["valueQuantity"].(map[string]any); ok {
			v = q["value"]
		}
		out = append(out, strings.TrimSpace(strings.Join([]string{code.(string), "=", jsonText(v), " ", m["status"].(string)}, "")))
	}
	sort.Strings(out)
	return out
}

func jsonText(v any) string {
	b, _ := json.Marshal(v)
	return string(b)
}

// A revision refused for good, then a later correction that reaches the
// server; an operator retries the old dead letter through the running
// service's gRPC API. The server keeps the later values, and the retried
// letter leaves the outbox without sending anything.
func TestRetryOfASupersededDeadLetterKeepsTheLaterValue(t *testing.T) {
	f := fakefhir.Start(t)
	s := startOnFake(t, f, nil)
	b := fakeBed(t, f, time.Now().Add(-30*time.Minute), true)
	post(t, s.url, http.MethodPost, "/notify", notification("Subscription/dl", 1, b.resources), secret)
	waitDerived(t, f, b.subject, wantValues)
	waitIdle(t, s)
	amend := func(v float64, event int) {
		t.Helper()
		var m map[string]any
		cur := f.Current("Observation")
		for _, raw := range cur {
			var x map[string]any
			_ = json.Unmarshal(raw, &x)
			if x["id"] == b.gasID {
				m = x
			}
		}
		m["status"] = "amended"
		m["valueQuantity"].(map[string]any)["value"] = v
		delete(m, "meta")
		body, _ := json.Marshal(m)
		r, err := f.Put(body)
		if err != nil {
			t.Fatal(err)
		}
		post(t, s.url, http.MethodPost, "/notify", notification("Subscription/dl", event, []json.RawMessage{r}), secret)
	}
	// First correction: its revision is refused for good.
	f.Inject(fakefhir.Fault{Method: http.MethodPost, Path: "", Status: http.StatusUnprocessableEntity, Times: 1, Text: "refused"})
	amend(50, 2)
	waitFor(t, "a dead letter", func() bool {
		h, err := s.svc.Engine().Health(context.Background())
		return err == nil && h.Stats.DeadLetters == 1 && h.Stats.OutboxDepth == 0
	})
	waitIdle(t, s)
	// Second correction reaches the server.
	refused := derivedValueList(f, b.subject)
	amend(56, 3)
	var latest []string
	waitFor(t, "the second correction's values on the server", func() bool {
		latest = derivedValueList(f, b.subject)
		return strings.Join(latest, ",") != strings.Join(refused, ",")
	})
	waitIdle(t, s)
	latest = derivedValueList(f, b.subject)

	cmd := deadLettersCommand(t, s)
	list := cmd("list")
	id := strings.Fields(strings.Split(list, "\n")[2])[0]
	if show := cmd("show", id); !strings.Contains(show, "superseded: yes") {
		t.Errorf("show of the refused revision's letter does not say it is superseded:\n%s", show)
	}
	cmd("retry", id)
	waitFor(t, "the retried letter to leave the outbox", func() bool {
		h, err := s.svc.Engine().Health(context.Background())
		return err == nil && h.Stats.DeadLetters == 0 && h.Stats.OutboxDepth == 0
	})
	waitIdle(t, s)
	if after := derivedValueList(f, b.subject); strings.Join(after, ",") != strings.Join(latest, ",") {
		t.Errorf("retrying a superseded dead letter changed the server's values:\n before %v\n after  %v", latest, after)
	}
}
