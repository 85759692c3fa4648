package engine

import (
	"encoding/json"
	"fmt"
	"testing"
	"time"

	"github.com/deadspace-fhir/deadspace/api/engine/enginetest"
	"github.com/deadspace-fhir/deadspace/api/store/boltstore"
	"github.com/deadspace-fhir/deadspace/derive"
	"github.com/deadspace-fhir/deadspace/fhir/decode"
)

// pacedEngine is a standalone engine over a store that records every
// commit, with the given device pace.
func pacedEngine(t *testing.T, pace time.Duration) (*Engine, *gatedStore) {
	t.Helper()
	st := enginetest.OpenStore(t, boltstore.Options{NoSync: true})
	g := &gatedStore{Store: st, held: make(chan struct{}), release: make(chan struct{})}
	eng, err := New(Config{Store: g, Decoder: decode.New(decode.Options{}), Encoder: enginetest.Encoder(t), Derive: derive.DefaultConfig(), DevicePace: pace})
	if err != nil {
		t.Fatal(err)
	}
	return eng, g
}

func commitsOf(g *gatedStore, subject string) int {
	n := 0
	for _, s := range g.committed() {
		if s == subject {
			n++
		}
	}
	return n
}

// A patient sending a reading every few milliseconds is evaluated about
// once a device pace, not once a reading: however slow the machine, the
// evaluations while the readings arrive are at most one at the first
// reading and one per pace elapsed, and one more after the last.
func TestDevicePaceBoundsEvaluationsOfAFlood(t *testing.T) {
	t.Parallel()
	const pace = 200 * time.Millisecond
	eng, g := pacedEngine(t, pace)
	run(t, eng)
	now := time.Now().UTC().Truncate(time.Minute)
	const readings = 60
	start := time.Now()
	for k := range readings {
		r := readingOf("Patient/flood", fmt.Sprintf("e%d", k), "19891-1", "mm[Hg]", 36, now.Add(-time.Hour+time.Duration(k)*time.Second))
		if _, err := eng.Ingest(t.Context(), "test", []json.RawMessage{r}); err != nil {
			t.Fatal(err)
		}
		time.Sleep(5 * time.Millisecond)
	}
	span := time.Since(start)
	settled(t, eng)
	bound := 2 + int(span/pace) + 1
	got := commitsOf(g, "Patient/flood")
	if got == 0 || got > bound {
		t.Errorf("%d evaluations of %d readings over %v with a pace of %v: want between 1 and %d", got, readings, span.Round(time.Millisecond), pace, bound)
	}
}

// A blood gas is evaluated at once, whatever the pace: the pace holds
// back evaluations for device readings alone. And a device reading alone,
// right after an evaluation, waits for the pace.
func TestDevicePaceHoldsBackDeviceReadingsNotBloodGases(t *testing.T) {
	t.Parallel()
	eng, g := pacedEngine(t, MaxDevicePace)
	run(t, eng)
	now := time.Now().UTC().Truncate(time.Minute)
	ingest := func(r json.RawMessage) {
		t.Helper()
		if _, err := eng.Ingest(t.Context(), "test", []json.RawMessage{r}); err != nil {
			t.Fatal(err)
		}
	}
	// The first reading of a patient not evaluated within the pace is
	// evaluated at once.
	ingest(readingOf("Patient/p", "e1", "19891-1", "mm[Hg]", 36, now.Add(-10*time.Minute)))
	settled(t, eng)
	if n := commitsOf(g, "Patient/p"); n != 1 {
		t.Fatalf("%d evaluations after the first reading, want 1", n)
	}
	// A second reading alone waits for the pace (a minute).
	ingest(readingOf("Patient/p", "e2", "19891-1", "mm[Hg]", 35, now.Add(-9*time.Minute)))
	time.Sleep(300 * time.Millisecond)
	if n := commitsOf(g, "Patient/p"); n != 1 {
		t.Fatalf("%d evaluations 300 ms after a second device reading with a pace of a minute, want it held back (1)", n)
	}
	// A blood gas is evaluated at once, with the held-back reading.
	ingest(readingOf("Patient/p", "g1", "2019-8", "mm[Hg]", 42, now.Add(-9*time.Minute)))
	deadline := time.Now().Add(MaxDevicePace / 2)
	for commitsOf(g, "Patient/p") < 2 {
		if time.Now().After(deadline) {
			t.Fatalf("the blood gas was not evaluated within half the pace")
		}
		time.Sleep(5 * time.Millisecond)
	}
	settled(t, eng)
	ledger, err := eng.cfg.Store.Ledger(t.Context(), "Patient/p")
	if err != nil {
		t.Fatal(err)
	}
	if len(ledger) == 0 {
		t.Fatalf("no value derived from the blood gas")
	}
}
