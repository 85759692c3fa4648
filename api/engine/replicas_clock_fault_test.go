package engine_test

import (
	"context"
	"encoding/json"
	"fmt"
	"log/slog"
	"sync/atomic"
	"testing"
	"time"

	"github.com/deadspace-fhir/deadspace/api/engine"
	"github.com/deadspace-fhir/deadspace/api/engine/enginetest"
	"github.com/deadspace-fhir/deadspace/api/store/pgstore"
	"github.com/deadspace-fhir/deadspace/api/store/pgstore/pgtest"
	"github.com/deadspace-fhir/deadspace/derive"
	"github.com/deadspace-fhir/deadspace/fhir/decode"
)

// TestSettleHoldsOnAReplicaWhoseClockIsAhead: two replicas on one
// PostgreSQL database, the second on a host whose clock runs five minutes
// ahead of the first's (NTP broken on one node, a virtual machine resumed
// from a snapshot). A blood gas and its end-tidal readings reach the first
// replica by the load balancer. With --settle at one minute, an operator
// expects no replica to derive the patient before the minute is over: the
// README promises that new data waits the settle delay, so that readings
// arriving just after a blood gas are included, and the replicas share
// leases by the database's clock precisely so that their own clocks do
// not matter.
//
// Today the mark's Since is written by the ingesting replica's clock
// (Engine.Ingest's now) and every other replica measures the settle delay
// (marksSeen.age: the longer of now − Since and the time since it first
// listed the mark) against its own clock: the replica five minutes ahead
// finds the mark five minutes old at its first listing (50 ms later) and
// evaluates at once. Its values are written before the late readings come
// in, and each late reading then costs an amended Observation and another
// Provenance on the server. The same happens when the ingesting replica's
// clock is the one behind.
func TestSettleHoldsOnAReplicaWhoseClockIsAhead(t *testing.T) {
	url := pgtest.NewDatabase(t)
	const settle = time.Minute
	var evaluations [2]atomic.Int64
	clocks := [2]func() time.Time{
		time.Now,
		func() time.Time { return time.Now().Add(5 * time.Minute) },
	}
	var engines [2]*engine.Engine
	for i, name := range []string{"replica-a", "replica-ahead"} {
		ps, err := pgstore.Open(t.Context(), url, pgstore.Options{Holder: name})
		if err != nil {
			t.Fatal(err)
		}
		eng, err := engine.New(engine.Config{
			Store: ps, Decoder: decode.New(decode.Options{}), Encoder: enginetest.Encoder(t), Derive: derive.DefaultConfig(),
			Settle: settle, Now: clocks[i], Logger: slog.New(slog.NewTextHandler(tWriter{t, name}, nil)),
			Hooks: engine.Hooks{Evaluation: func(bool) { evaluations[i].Add(1) }},
		})
		if err != nil {
			t.Fatal(err)
		}
		engines[i] = eng
		ctx, cancel := context.WithCancel(context.Background())
		done := make(chan struct{})
		go func() {
			defer close(done)
			_ = eng.Run(ctx)
		}()
		t.Cleanup(func() { cancel(); <-done; _ = ps.Close() })
	}

	// One invented bed: a blood gas sampled ten minutes ago and end-tidal
	// readings around it, all just received by replica A.
	at := time.Now().Add(-10 * time.Minute).Truncate(time.Minute)
	updated := at.Add(2 * time.Minute)
	const bed = "Patient/skew-bed"
	raws := []json.RawMessage{obsOf(bed, "skew-gas", "1", "final", "2019-8", "mm[Hg]", 46, at, updated)}
	for m := -2; m <= 2; m++ {
		raws = append(raws, obsOf(bed, fmt.Sprintf("skew-et%d", m+2), "1", "final", "19891-1", "mm[Hg]", 35, at.Add(time.Duration(m)*time.Minute), updated))
	}
	if _, err := engines[0].Ingest(context.Background(), "test", raws); err != nil {
		t.Fatal(err)
	}

	// Well inside the settle delay by every clock's own measure of the
	// time that passed: neither replica may evaluate the patient yet.
	deadline := time.Now().Add(2 * time.Second)
	for time.Now().Before(deadline) && evaluations[1].Load() == 0 {
		time.Sleep(20 * time.Millisecond)
	}
	if a, b := evaluations[0].Load(), evaluations[1].Load(); a+b != 0 {
		t.Errorf("the patient was evaluated %d time(s) by replica A and %d by the replica whose clock is 5 min ahead within 2 s of its data arriving; want none before the %v settle delay", a, b, settle)
	}
}
