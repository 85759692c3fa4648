package serve_test

import (
	"context"
	"net/http"
	"testing"
	"time"

	"github.com/deadspace-fhir/deadspace/api/serve"
	"github.com/deadspace-fhir/deadspace/fhir/fhirtest/fakefhir"
)

// TestFakeDeletionIsNotHeldBackBySettle: the service runs with the default
// --settle of 30 s, which exists so that "readings that arrive just after
// a blood gas are included" (README, late data). The laboratory then
// deletes a blood gas whose values the service wrote (a sample filed
// under the wrong patient), and an id-only notification says so.
//
// An early-warning system reading the derived Observations acts on them
// while they are final; the operator expects a deletion to withdraw them
// (entered-in-error) within seconds: the device pace (known, 1 s) and a
// write. Nothing can arrive late that would change a withdrawal, so there
// is nothing to settle. Today the deletion's dirty mark waits the whole
// settle delay like new data (engine.due), so with the defaults a deleted
// gas's values stay final on the server for more than 30 s, and for as
// long as the operator raised --settle to gather slow ventilator feeds.
// A mark that only withdraws (store.Input.OnlyReplaces: deletions,
// re-coded versions) should not wait for the settle delay.
func TestFakeDeletionIsNotHeldBackBySettle(t *testing.T) {
	f := fakefhir.Start(t)
	s := startOnFake(t, f, func(c *serve.Config) { c.Settle = 30 * time.Second })
	b := fakeBed(t, f, time.Now().Add(-30*time.Minute), true)
	if code, body := post(t, s.url, http.MethodPost, "/notify", notification("Subscription/settle", 1, b.resources), secret); code != http.StatusOK {
		t.Fatalf("HTTP %d: %s", code, body)
	}
	// The first derivation is not what this test is about: have it now
	// rather than after the settle delay.
	if err := s.svc.Engine().EvaluateNow(context.Background()); err != nil {
		t.Fatal(err)
	}
	waitUpTo(t, 20*time.Second, "the values derived from the blood gas", func() bool { return statuses(f, b.subject)["final"] == wantValues })

	if !f.Delete("Observation", b.gasID) {
		t.Fatal("nothing deleted")
	}
	deleted := time.Now()
	if code, body := post(t, s.url, http.MethodPost, "/notify", idOnlyNotification("Subscription/settle", 2, []string{"Observation/" + b.gasID}), secret); code != http.StatusOK {
		t.Fatalf("the deletion answered HTTP %d: %s", code, body)
	}
	waitUpTo(t, 10*time.Second, "the deleted blood gas's values withdrawn (entered-in-error) without waiting for --settle", func() bool {
		return statuses(f, b.subject)["entered-in-error"] == wantValues
	})
	t.Logf("withdrawn %v after the deletion was notified", time.Since(deleted).Round(100*time.Millisecond))
}
