package engine

import (
	"encoding/json"
	"sync"
	"testing"
	"time"

	"github.com/deadspace-fhir/deadspace/api/engine/enginetest"
	"github.com/deadspace-fhir/deadspace/api/store"
	"github.com/deadspace-fhir/deadspace/api/store/boltstore"
	"github.com/deadspace-fhir/deadspace/derive"
	"github.com/deadspace-fhir/deadspace/fhir/decode"
)

// offsetClock runs with real time and can be stepped, as a host's wall
// clock is.
type offsetClock struct {
	mu     sync.Mutex
	offset time.Duration
}

func (c *offsetClock) now() time.Time {
	c.mu.Lock()
	defer c.mu.Unlock()
	return time.Now().Add(c.offset)
}

func (c *offsetClock) step(d time.Duration) {
	c.mu.Lock()
	c.offset += d
	c.mu.Unlock()
}

// New data waits the settle before its patient is evaluated; a wall clock
// stepped back meanwhile must not hold the evaluation back by the step.
func TestSettleIsNotHeldBackByAClockSteppedBack(t *testing.T) {
	t.Parallel()
	for _, step := range []time.Duration{-time.Hour, -10 * time.Minute, -30 * time.Second} {
		t.Run(step.String(), func(t *testing.T) {
			t.Parallel()
			clock := &offsetClock{}
			eng, err := New(Config{Store: enginetest.OpenStore(t, boltstore.Options{NoSync: true}), Decoder: decode.New(decode.Options{}),
				Encoder: enginetest.Encoder(t), Derive: derive.DefaultConfig(), Now: clock.now, Settle: 300 * time.Millisecond})
			if err != nil {
				t.Fatal(err)
			}
			at := time.Now().UTC().Truncate(time.Minute).Add(-time.Hour)
			if _, err := eng.Ingest(t.Context(), "test", []json.RawMessage{readingOf("Patient/cs-1", "g1", "2019-8", "mm[Hg]", 42, at)}); err != nil {
				t.Fatal(err)
			}
			clock.step(step)
			run(t, eng)
			deadline := time.Now().Add(15 * time.Second)
			for {
				h, err := eng.Health(t.Context())
				if err != nil {
					t.Fatal(err)
				}
				if h.Stats.DirtyPatients == 0 {
					return
				}
				if time.Now().After(deadline) {
					t.Fatalf("15 s after the clock was stepped %v, the patient still waits for a settle of 300 ms", step)
				}
				time.Sleep(20 * time.Millisecond)
			}
		})
	}
}

// A write waits for its stored time or, when this process scheduled it,
// until its wait is over by the monotonic clock, whichever comes first; a
// stored time further ahead than any wait the writer sets is due at once.
func TestRetryDue(t *testing.T) {
	t.Parallel()
	now := time.Date(2026, 3, 1, 8, 0, 0, 0, time.UTC)
	cases := []struct {
		name      string
		notBefore time.Duration // stored, from now
		scheduled time.Duration // the monotonic wait left (0: not scheduled here)
		attempts  int           // the attempts noted when scheduled
		waits     bool
	}{
		{"due by the stored time", -time.Second, 0, 0, false},
		{"waiting by the stored time", time.Minute, 0, 0, true},
		{"a stored time beyond every wait", maxRetryWait + time.Minute, 0, 0, false},
		{"the longest wait", maxRetryWait, 0, 0, true},
		{"waiting by both clocks", time.Hour / 6, time.Minute, 1, true},
		{"over by the monotonic clock", 10 * time.Minute, -time.Millisecond, 1, false},
		{"over by the stored time", -time.Second, time.Minute, 1, false},
		{"scheduled for another attempt", 10 * time.Minute, -time.Millisecond, 2, true},
	}
	for _, c := range cases {
		t.Run(c.name, func(t *testing.T) {
			var r retryDue
			w := store.Write{ID: 7, Attempts: 1, NotBefore: now.Add(c.notBefore)}
			if c.attempts > 0 {
				r.scheduled(w.ID, c.attempts, c.scheduled)
			}
			if got := r.waits(w, now); got != c.waits {
				t.Errorf("waits = %v, want %v", got, c.waits)
			}
		})
	}
	var r retryDue
	r.scheduled(1, 1, time.Minute)
	r.scheduled(2, 1, time.Minute)
	r.keep([]store.Write{{ID: 2}})
	if _, ok := r.due[1]; ok || len(r.due) != 1 {
		t.Errorf("after keep: %v, want only write 2", r.due)
	}
}
