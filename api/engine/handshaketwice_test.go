package engine_test

import (
	"context"
	"sync/atomic"
	"testing"
	"time"

	"github.com/deadspace-fhir/deadspace/api/engine"
	"github.com/deadspace-fhir/deadspace/fhir/notify"
)

// A handshake delivered twice (the server retried it: the first answer
// was slow or lost) after the new numbering's first events arrived is no
// restart: it counts 0 events as the first did, and the events 1 to 3
// seen since are not lost. Today the second handshake sets the highest
// event seen back to 0, so event 4 looks as if it skipped events 1 to 3:
// a gap is counted (deadspace_subscription_gaps_total, whose alert fires)
// and caught up although nothing was missed.
func TestHandshakeDeliveredTwiceIsNoGap(t *testing.T) {
	r := newWriteRig(t, 0)
	var gaps atomic.Int32
	r.hooks.Gap = func() { gaps.Add(1) }
	r.open()
	ctx, cancel := context.WithCancel(context.Background())
	done := make(chan struct{})
	go func() {
		defer close(done)
		_ = r.eng.Run(ctx)
	}()
	t.Cleanup(func() {
		cancel()
		<-done
	})
	const sub = "Subscription/hs1"
	handshake := notify.Notification{Subscription: sub, Type: notify.TypeHandshake, HasEventsSinceStart: true, EventsSinceStart: 0}
	event := func(n uint64) notify.Notification {
		return notify.Notification{Subscription: sub, Type: notify.TypeEvent, Events: []notify.Event{{Number: n}}}
	}
	for _, n := range []notify.Notification{handshake, event(1), event(2), event(3), handshake, event(4), event(5)} {
		if err := r.eng.Notified(context.Background(), n); err != nil {
			t.Fatal(err)
		}
	}
	time.Sleep(engine.DefaultGapGrace + 2*time.Second)
	if n := gaps.Load(); n != 0 {
		t.Errorf("%d gaps counted for events 1 to 5 all received, with the handshake delivered twice; want none", n)
	}
}
