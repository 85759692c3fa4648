package engine

import (
	"testing"
	"time"

	"github.com/deadspace-fhir/deadspace/api/engine/enginetest"
	"github.com/deadspace-fhir/deadspace/api/store/boltstore"
	"github.com/deadspace-fhir/deadspace/derive"
	"github.com/deadspace-fhir/deadspace/fhir/client"
	"github.com/deadspace-fhir/deadspace/fhir/decode"
	"github.com/deadspace-fhir/deadspace/fhir/notify"
)

// A subscription the server restarts numbers its events from 1 again. A
// handshake says so, and a number far below the highest seen shows it
// (store.EventsRestarted); either way the restart is caught up at once and
// the new numbering's gaps are noticed, while a late delivery within what
// reordering explains is neither a restart nor a gap.
func TestSubscriptionRestart(t *testing.T) {
	t.Parallel()
	const sub = "Subscription/restart"
	events := func(lowest, highest uint64) notify.Notification {
		n := notify.Notification{Subscription: sub, Type: notify.TypeEvent, EventsSinceStart: highest, HasEventsSinceStart: true}
		for i := lowest; i <= highest; i++ {
			n.Events = append(n.Events, notify.Event{Number: i})
		}
		return n
	}
	handshake := func(count uint64, has bool) notify.Notification {
		return notify.Notification{Subscription: sub, Type: notify.TypeHandshake, EventsSinceStart: count, HasEventsSinceStart: has}
	}
	heartbeat := func(count uint64) notify.Notification {
		return notify.Notification{Subscription: sub, Type: notify.TypeHeartbeat, EventsSinceStart: count, HasEventsSinceStart: true}
	}
	cases := []struct {
		name  string
		notes []notify.Notification
		// restart says whether the last notification asked for a restart's
		// catch-up; gap whether events are then held as missing.
		restart, gap bool
	}{
		{"a handshake, then a gap in the new numbering", []notify.Notification{events(470, 473), handshake(0, true), events(1, 1), events(3, 3)}, false, true},
		{"the handshake's catch-up", []notify.Notification{events(470, 473), handshake(0, true)}, true, false},
		{"a handshake without a count", []notify.Notification{events(470, 473), handshake(0, false)}, true, false},
		{"a numbering from 1 again without a handshake", []notify.Notification{events(470, 473), events(1, 1)}, true, false},
		{"and its gaps", []notify.Notification{events(470, 473), events(1, 1), events(3, 3)}, false, true},
		{"a heartbeat counting from 1 again", []notify.Notification{events(470, 473), heartbeat(2)}, true, false},
		{"the first handshake restarts nothing", []notify.Notification{handshake(0, true), events(1, 1)}, false, false},
		{"a handshake that repeats the count", []notify.Notification{events(1, 7), handshake(7, true)}, false, false},
		{"a late delivery is no restart", []notify.Notification{events(1, 150), events(90, 90)}, false, false},
		{"nor a gap", []notify.Notification{events(1, 150), events(90, 90), events(151, 151)}, false, false},
		{"a small numbering that drops", []notify.Notification{events(1, 40), events(1, 1)}, false, false},
	}
	for _, c := range cases {
		t.Run(c.name, func(t *testing.T) {
			t.Parallel()
			cl, err := client.New(client.Config{BaseURL: "http://fhir.invalid/fhir"})
			if err != nil {
				t.Fatal(err)
			}
			e, err := New(Config{Store: enginetest.OpenStore(t, boltstore.Options{NoSync: true}), Decoder: decode.New(decode.Options{}),
				Encoder: enginetest.Encoder(t), Derive: derive.DefaultConfig(), Client: cl})
			if err != nil {
				t.Fatal(err)
			}
			trigger := ""
			for _, n := range c.notes {
				select {
				case <-e.catch:
				default:
				}
				if err := e.Notified(t.Context(), n); err != nil {
					t.Fatal(err)
				}
				select {
				case trigger = <-e.catch:
				default:
					trigger = ""
				}
			}
			if got := trigger == "subscription-restart"; got != c.restart {
				t.Errorf("catch-up asked for %q, want a restart's: %v", trigger, c.restart)
			}
			if got := e.missing.expire(time.Now().Add(time.Hour), time.Second) > 0; got != c.gap {
				t.Errorf("events held as missing: %v, want %v", got, c.gap)
			}
		})
	}
}
