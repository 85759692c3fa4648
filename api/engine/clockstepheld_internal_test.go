package engine

import (
	"context"
	"encoding/json"
	"errors"
	"sync"
	"testing"
	"time"

	"github.com/deadspace-fhir/deadspace/api/engine/enginetest"
	"github.com/deadspace-fhir/deadspace/api/store"
	"github.com/deadspace-fhir/deadspace/api/store/boltstore"
	"github.com/deadspace-fhir/deadspace/derive"
	"github.com/deadspace-fhir/deadspace/fhir/decode"
)

// failOnceStore refuses the first commit (a store briefly unable to
// write), and steps the clock by step at the first listing after it, so
// the step falls between the failure and the retry it schedules.
type failOnceStore struct {
	store.Store
	clock *offsetClock
	step  time.Duration

	mu      sync.Mutex
	failed  bool
	stepped bool
}

func (f *failOnceStore) Commit(ctx context.Context, c store.Change, now time.Time) error {
	f.mu.Lock()
	first := !f.failed
	f.failed = true
	f.mu.Unlock()
	if first {
		return errors.New("store briefly refuses writes")
	}
	return f.Store.Commit(ctx, c, now)
}

func (f *failOnceStore) DirtyPatients(ctx context.Context) ([]store.Dirty, error) {
	f.mu.Lock()
	if f.failed && !f.stepped {
		f.stepped = true
		f.clock.step(f.step)
	}
	f.mu.Unlock()
	return f.Store.DirtyPatients(ctx)
}

// A patient whose evaluation failed is held back for a few seconds before
// it is tried again. That hold is a wait like the settle and the outbox's
// retries: a wall clock stepped back after the failure must not hold the
// patient back by the step (it is held by the engine's clock today, so a
// step back of an hour leaves the patient pending for an hour).
func TestFailedEvaluationRetryIsNotHeldBackByAClockSteppedBack(t *testing.T) {
	t.Parallel()
	clock := &offsetClock{}
	st := &failOnceStore{Store: enginetest.OpenStore(t, boltstore.Options{NoSync: true}), clock: clock, step: -time.Hour}
	eng, err := New(Config{Store: st, Decoder: decode.New(decode.Options{}), Encoder: enginetest.Encoder(t),
		Derive: derive.DefaultConfig(), Now: clock.now})
	if err != nil {
		t.Fatal(err)
	}
	at := time.Now().UTC().Truncate(time.Minute).Add(-time.Hour)
	if _, err := eng.Ingest(t.Context(), "test", []json.RawMessage{readingOf("Patient/held-1", "h1", "2019-8", "mm[Hg]", 42, at)}); err != nil {
		t.Fatal(err)
	}
	run(t, eng)
	deadline := time.Now().Add(30 * time.Second)
	for {
		h, err := eng.Health(t.Context())
		if err != nil {
			t.Fatal(err)
		}
		if h.Stats.DirtyPatients == 0 {
			return
		}
		if time.Now().After(deadline) {
			t.Fatal("30 s after a failed evaluation and a clock stepped back an hour, the patient is still pending; want it evaluated again after its hold of about 5 s")
		}
		time.Sleep(50 * time.Millisecond)
	}
}
