package engine_test

import (
	"context"
	"sync"
	"testing"
	"time"

	"github.com/deadspace-fhir/deadspace/api/engine"
	"github.com/deadspace-fhir/deadspace/api/store/pgstore/pgtest"
	"github.com/deadspace-fhir/deadspace/fhir/fhirtest/fakefhir"
	"github.com/deadspace-fhir/deadspace/fhir/notify"
)

// Two replicas on one PostgreSQL database behind one webhook address: the
// subscription's notifications (a heartbeat every 100 ms, counting no new
// events) all reach replica A, as a sticky load balancer sends them. The
// subscription is not silent, so no catch-up is triggered by a missed
// heartbeat. Replica B received nothing since it started, and today counts
// that as a silence of its own: it asks for a heartbeat-missed catch-up
// every half timeout for as long as it runs, and the lease holder searches
// the server each time, although the subscription speaks all along.
func TestHeartbeatsToOneReplicaAreNoSilenceOfTheOther(t *testing.T) {
	f := fakefhir.Start(t)
	dbURL := pgtest.NewDatabase(t)
	var mu sync.Mutex
	triggers := map[string]int{}
	tweak := func(c *engine.Config) {
		c.PollInterval = 0
		c.HeartbeatTimeout = 400 * time.Millisecond
		c.Hooks.CatchUp = func(trigger string) {
			mu.Lock()
			triggers[trigger]++
			mu.Unlock()
		}
	}
	a := startPGReplica(t, dbURL, f.BaseURL, "replica-a", tweak)
	startPGReplica(t, dbURL, f.BaseURL, "replica-b", tweak)
	hb := notify.Notification{Subscription: "Subscription/s1", Type: notify.TypeHeartbeat, HasEventsSinceStart: true, EventsSinceStart: 0}
	end := time.Now().Add(3 * time.Second)
	for time.Now().Before(end) {
		if err := a.eng.Notified(context.Background(), hb); err != nil {
			t.Fatal(err)
		}
		time.Sleep(100 * time.Millisecond)
	}
	mu.Lock()
	defer mu.Unlock()
	if n := triggers["heartbeat-missed"]; n != 0 {
		t.Errorf("%d heartbeat-missed catch-ups (all triggers: %v) while the subscription sent a heartbeat every 100 ms with a timeout of 400 ms; want none", n, triggers)
	}
}
