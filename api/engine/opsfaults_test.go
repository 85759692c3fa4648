package engine_test

import (
	"context"
	"encoding/json"
	"fmt"
	"net/http"
	"net/http/httptest"
	"sync"
	"testing"
	"time"

	"github.com/deadspace-fhir/deadspace/api/engine"
	"github.com/deadspace-fhir/deadspace/api/engine/enginetest"
	"github.com/deadspace-fhir/deadspace/api/store/boltstore"
	"github.com/deadspace-fhir/deadspace/derive"
	"github.com/deadspace-fhir/deadspace/fhir/client"
	"github.com/deadspace-fhir/deadspace/fhir/decode"
)

// steppedClock runs with real time and can be stepped, as a host's wall
// clock is when NTP or a resumed virtual machine corrects it.
type steppedClock struct {
	mu     sync.Mutex
	offset time.Duration
}

func (c *steppedClock) now() time.Time {
	c.mu.Lock()
	defer c.mu.Unlock()
	return time.Now().Add(c.offset)
}

func (c *steppedClock) step(d time.Duration) {
	c.mu.Lock()
	c.offset += d
	c.mu.Unlock()
}

// A write that failed waits its back-off (a second or so for a first
// failure) before it is sent again. When the host's clock is stepped back
// an hour meanwhile (a wrong time corrected), the retry must still go after
// about its back-off, not an hour later: the outbox must not hold the
// derived values back by however far the clock moved.
func TestOutboxRetryIsNotHeldBackByAClockSteppedBack(t *testing.T) {
	fake := &fakeServer{failN: 1, failAs: http.StatusServiceUnavailable}
	srv := httptest.NewServer(fake)
	defer srv.Close()
	clock := &steppedClock{}
	st := enginetest.OpenStore(t, boltstore.Options{})
	cl, err := client.New(client.Config{BaseURL: srv.URL + "/fhir", MaxRetries: -1})
	if err != nil {
		t.Fatal(err)
	}
	eng, err := engine.New(engine.Config{
		Store: st, Decoder: decode.New(decode.Options{}), Encoder: enginetest.Encoder(t), Derive: derive.DefaultConfig(), Client: cl,
		Now: clock.now,
	})
	if err != nil {
		t.Fatal(err)
	}
	ctx := context.Background()
	at := time.Now().Add(-time.Hour).Truncate(time.Minute)
	inputs := []json.RawMessage{obs("gas", "1", "final", "2019-8", "mm[Hg]", 44, at, at.Add(10*time.Minute))}
	for m := -2; m <= 2; m++ {
		inputs = append(inputs, obs(fmt.Sprintf("et%d", m+2), "1", "final", "19891-1", "mm[Hg]", 36, at.Add(time.Duration(m)*time.Minute), at.Add(10*time.Minute)))
	}
	if _, err := eng.Ingest(ctx, "test", inputs); err != nil {
		t.Fatal(err)
	}
	if err := eng.EvaluateNow(ctx); err != nil {
		t.Fatal(err)
	}
	eng.FlushNow(ctx) // the transaction meets a 503 and is rescheduled
	if h, err := eng.Health(ctx); err != nil || h.Stats.OutboxDepth == 0 {
		t.Fatalf("after the refused transaction: outbox %+v, %v; want the write waiting for its retry", h.Stats, err)
	}
	clock.step(-time.Hour)

	deadline := time.Now().Add(15 * time.Second)
	for {
		eng.FlushNow(ctx)
		h, err := eng.Health(ctx)
		if err != nil {
			t.Fatal(err)
		}
		if h.Stats.OutboxDepth == 0 {
			break
		}
		if time.Now().After(deadline) {
			t.Fatalf("15 s after the clock was stepped back an hour, %d writes still wait for a retry due after a back-off of a second or so", h.Stats.OutboxDepth)
		}
		time.Sleep(100 * time.Millisecond)
	}
	if _, creates := fake.state(); creates == 0 {
		t.Fatal("the outbox emptied but nothing was created on the server")
	}
}
