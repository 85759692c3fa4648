package serve_test

import (
	"encoding/json"
	"net/http"
	"strings"
	"testing"
	"time"

	"github.com/deadspace-fhir/deadspace/api/store/pgstore/pgtest"
	"github.com/deadspace-fhir/deadspace/fhir/fhirtest/fakefhir"
)

// Three replicas started together on one PostgreSQL database with
// --register-subscription create the Subscription once: only the replica
// holding the catch-up lease registers. When the server has turned it off
// and that replica stops, the replica that takes polling over re-activates
// it, still without creating another.
func TestReplicasRegisterTheSubscriptionOnce(t *testing.T) {
	f := fakefhir.Start(t)
	dbURL := pgtest.NewSchema(t)
	cfg := testConfig(f.BaseURL, "")
	cfg.Store = dbURL
	cfg.JobLease = time.Second
	cfg.Register = true
	cfg.PublicURL = "https://deadspace.invalid/"
	var replicas []*service
	started := make(chan *service, 3)
	for range 3 {
		go func() { started <- start(t, cfg) }()
	}
	for range 3 {
		replicas = append(replicas, <-started)
	}
	subscriptions := func() []map[string]any {
		var out []map[string]any
		for _, raw := range f.Current("Subscription") {
			var m map[string]any
			_ = json.Unmarshal(raw, &m)
			out = append(out, m)
		}
		return out
	}
	waitFor(t, "the subscription", func() bool { return len(subscriptions()) == 1 })
	// Every replica has had the chance to register: each has tried the
	// lease (a replica's first try is at start).
	waitFor(t, "a start-up search", func() bool { return f.Count(http.MethodGet, "Observation") > 0 })
	for _, s := range replicas {
		waitIdle(t, s)
	}
	// One replica looked for an earlier Subscription and created it; the
	// others did neither.
	if n := f.Count(http.MethodGet, "Subscription"); n != 1 {
		t.Errorf("%d Subscription searches from three replicas, want 1", n)
	}
	if n := f.Count(http.MethodPost, "Subscription"); n != 1 {
		t.Fatalf("%d Subscription creates from three replicas, want 1", n)
	}
	// The holder is the replica whose logs say it took the lease.
	holder := -1
	for i, s := range replicas {
		if strings.Contains(s.logs.String(), "this replica now polls") {
			holder = i
		}
	}
	if holder < 0 {
		t.Fatal("no replica logged taking the catch-up lease")
	}
	sub := subscriptions()[0]
	sub["status"] = "off"
	body, _ := json.Marshal(sub)
	if _, err := f.Put(body); err != nil {
		t.Fatal(err)
	}
	replicas[holder].stop()
	waitFor(t, "another replica to re-activate the subscription", func() bool {
		all := subscriptions()
		return len(all) == 1 && all[0]["status"] == "requested"
	})
	if n := f.Count(http.MethodPost, "Subscription"); n != 1 {
		t.Errorf("%d Subscription creates after the take-over, want 1", n)
	}
}
