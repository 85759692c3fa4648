package serve_test

import (
	"encoding/json"
	"fmt"
	"net/http"
	"testing"
	"time"

	"github.com/deadspace-fhir/deadspace/api/serve"
	"github.com/deadspace-fhir/deadspace/fhir/fhirtest/fakefhir"
)

// handshake is the handshake notification a server sends when it starts
// (or starts again) delivering a subscription: it counts no events.
func handshake(sub string) []byte {
	return []byte(fmt.Sprintf(`{"resourceType":"Bundle","type":"history","entry":[{"fullUrl":"urn:uuid:5e1f7c1a-0000-4000-8000-0000000000cc",`+
		`"resource":{"resourceType":"Parameters","parameter":[{"name":"subscription","valueReference":{"reference":"%s"}},`+
		`{"name":"status","valueCode":"requested"},{"name":"type","valueCode":"handshake"},`+
		`{"name":"events-since-subscription-start","valueString":"0"}]},"request":{"method":"GET","url":"%s/$status"},"response":{"status":"200"}}]}`,
		sub, sub))
}

// waitUpTo is waitFor with a bound of its own, so a test of a fault fails
// in seconds rather than minutes.
func waitUpTo(t *testing.T, d time.Duration, what string, cond func() bool) {
	t.Helper()
	deadline := time.Now().Add(d)
	for !cond() {
		if time.Now().After(deadline) {
			t.Fatalf("after %v, still waiting for %s", d, what)
		}
		time.Sleep(100 * time.Millisecond)
	}
}

// A server that restarts a subscription (its in-memory counters lost, or the
// subscription re-created under the same id) sends a handshake and numbers
// its events from 1 again. A gap in the new numbering must be caught up as
// any other gap is: the highest number seen before the restart must not
// hide every gap until the new numbers pass it.
func TestFakeRestartedSubscriptionGapCatchesUp(t *testing.T) {
	f := fakefhir.Start(t)
	const grace = 300 * time.Millisecond
	s := startOnFake(t, f, func(c *serve.Config) { c.GapGrace = grace })
	const sub = "Subscription/restarted"

	// Before the restart: the subscription had run a while; its last
	// events are delivered.
	old := fakeBed(t, f, time.Now().Add(-90*time.Minute), true)
	before := f.Count(http.MethodGet, "Observation")
	post(t, s.url, http.MethodPost, "/notify", heartbeat(sub, 472), secret)
	waitUpTo(t, 20*time.Second, "the catch-up of the events before this test", func() bool { return f.Count(http.MethodGet, "Observation") > before })
	time.Sleep(2 * grace)
	post(t, s.url, http.MethodPost, "/notify", notification(sub, 473, old.resources), secret)
	waitDerived(t, f, old.subject, wantValues)
	waitIdle(t, s)

	// The server restarts the subscription: a handshake, then events from 1.
	if code, body := post(t, s.url, http.MethodPost, "/notify", handshake(sub), secret); code != http.StatusOK {
		t.Fatalf("handshake: HTTP %d: %s", code, body)
	}
	b := fakeBed(t, f, time.Now().Add(-30*time.Minute), false)
	post(t, s.url, http.MethodPost, "/notify", notification(sub, 1, b.resources), secret)
	waitIdle(t, s)
	searches := f.Count(http.MethodGet, "Observation")

	// The blood gas is event len+1; its notification is lost. The next
	// notification (event len+2) skips it.
	if _, err := f.Put([]byte(observation(b.subject, "http://loinc.org", "2019-8", "mm[Hg]", 44, time.Now().Add(-30*time.Minute), "final"))); err != nil {
		t.Fatal(err)
	}
	later, err := f.Put([]byte(observation(b.subject, "http://loinc.org", "8867-4", "/min", 88, time.Now(), "final")))
	if err != nil {
		t.Fatal(err)
	}
	post(t, s.url, http.MethodPost, "/notify", notification(sub, len(b.resources)+2, []json.RawMessage{later}), secret)
	waitUpTo(t, 20*grace+10*time.Second, "a catch-up search for the event the restarted subscription skipped", func() bool {
		return f.Count(http.MethodGet, "Observation") > searches
	})
	waitUpTo(t, 20*time.Second, "the skipped blood gas's values", func() bool { return len(derivedOn(f, b.subject)) == wantValues })
}
