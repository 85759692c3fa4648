package engine

import (
	"context"
	"encoding/json"
	"fmt"
	"slices"
	"sync"
	"testing"
	"time"

	"github.com/deadspace-fhir/deadspace/api/engine/enginetest"
	"github.com/deadspace-fhir/deadspace/api/store"
	"github.com/deadspace-fhir/deadspace/api/store/boltstore"
	"github.com/deadspace-fhir/deadspace/derive"
	"github.com/deadspace-fhir/deadspace/fhir/decode"
)

// gatedStore records the subject of every commit and holds the commit of
// one patient until released, so a test can act while that evaluation is
// in progress.
type gatedStore struct {
	store.Store
	hold    string        // the subject whose first commit is held
	held    chan struct{} // closed when that commit arrives
	release chan struct{} // closed to let it go on

	mu      sync.Mutex
	commits []string
	once    sync.Once
}

func (g *gatedStore) Commit(ctx context.Context, c store.Change, now time.Time) error {
	if c.Subject == g.hold {
		first := false
		g.once.Do(func() { first = true })
		if first {
			close(g.held)
			<-g.release
		}
	}
	g.mu.Lock()
	g.commits = append(g.commits, c.Subject)
	g.mu.Unlock()
	return g.Store.Commit(ctx, c, now)
}

func (g *gatedStore) committed() []string {
	g.mu.Lock()
	defer g.mu.Unlock()
	return append([]string(nil), g.commits...)
}

func readingOf(subject, id, code, unit string, v float64, at time.Time) json.RawMessage {
	return json.RawMessage(fmt.Sprintf(`{"resourceType":"Observation","id":"%s","meta":{"versionId":"1","lastUpdated":"%s"},"status":"final",`+
		`"code":{"coding":[{"system":"http://loinc.org","code":"%s"}]},"subject":{"reference":"%s"},"effectiveDateTime":"%s",`+
		`"valueQuantity":{"value":%g,"unit":"%s","system":"http://unitsofmeasure.org","code":"%s"}}`,
		id, at.UTC().Format(time.RFC3339), code, subject, at.UTC().Format(time.RFC3339), v, unit, unit))
}

// scheduleEngine is a standalone engine over a gated store, evaluating one
// patient at a time so the order of evaluations is the order of hand-outs.
func scheduleEngine(t *testing.T, hold string) (*Engine, *gatedStore) {
	t.Helper()
	st := enginetest.OpenStore(t, boltstore.Options{})
	g := &gatedStore{Store: st, hold: hold, held: make(chan struct{}), release: make(chan struct{})}
	enc := enginetest.Encoder(t)
	eng, err := New(Config{Store: g, Decoder: decode.New(decode.Options{}), Encoder: enc, Derive: derive.DefaultConfig()})
	if err != nil {
		t.Fatal(err)
	}
	eng.evaluators = 1
	return eng, g
}

// run runs the engine until the test ends.
func run(t *testing.T, eng *Engine) {
	ctx, cancel := context.WithCancel(context.Background())
	done := make(chan struct{})
	go func() {
		defer close(done)
		_ = eng.Run(ctx)
	}()
	t.Cleanup(func() {
		cancel()
		<-done
	})
}

// settled waits until no patient is dirty (the wait is a bound on a hang,
// not a timing under test).
func settled(t *testing.T, eng *Engine) {
	t.Helper()
	deadline := time.Now().Add(time.Minute)
	for time.Now().Before(deadline) {
		h, err := eng.Health(t.Context())
		if err == nil && h.Stats.DirtyPatients == 0 {
			return
		}
		time.Sleep(5 * time.Millisecond)
	}
	t.Fatal("patients still dirty after a minute")
}

// gasDuringHeldEvaluation gives patients Patient/d0 to d<devices-1> a new
// end-tidal reading each (d0's mark is the oldest, so it is evaluated
// first and, with g holding d0, its commit is held), runs the engine, and
// once d0's commit is held ingests a blood gas for Patient/gas.
func gasDuringHeldEvaluation(t *testing.T, eng *Engine, g *gatedStore, devices int) {
	t.Helper()
	now := time.Now().UTC().Truncate(time.Minute)
	for p := range devices {
		subject := fmt.Sprintf("Patient/d%d", p)
		if _, err := eng.Ingest(t.Context(), "test", []json.RawMessage{readingOf(subject, fmt.Sprintf("e%d", p), "19891-1", "mm[Hg]", 36, now.Add(-time.Minute))}); err != nil {
			t.Fatal(err)
		}
	}
	run(t, eng)
	<-g.held
	if _, err := eng.Ingest(t.Context(), "test", []json.RawMessage{readingOf("Patient/gas", "g1", "2019-8", "mm[Hg]", 42, now.Add(-2*time.Minute))}); err != nil {
		t.Fatal(err)
	}
}

// A blood gas that arrives while a queue of patients with device readings
// only is being evaluated is evaluated next, before the rest of the queue
// (issue 9, item 1).
func TestBloodGasJumpsTheQueue(t *testing.T) {
	t.Parallel()
	eng, g := scheduleEngine(t, "Patient/d0")
	gasDuringHeldEvaluation(t, eng, g, 10)
	close(g.release)
	settled(t, eng)
	got := g.committed()
	if len(got) != 11 {
		t.Fatalf("commits %v, want one per patient (11)", got)
	}
	if got[0] != "Patient/d0" || got[1] != "Patient/gas" {
		t.Errorf("evaluation order %v: want the blood gas's patient right after the evaluation in progress", got)
	}
}

// Notifications for a patient that arrive while its evaluation runs lead
// to one more evaluation, not one each.
func TestChangesDuringAnEvaluationCoalesce(t *testing.T) {
	t.Parallel()
	now := time.Now().UTC().Truncate(time.Minute)
	eng, g := scheduleEngine(t, "Patient/a")
	ctx := t.Context()
	if _, err := eng.Ingest(ctx, "test", []json.RawMessage{readingOf("Patient/a", "a0", "19891-1", "mm[Hg]", 36, now.Add(-10*time.Minute))}); err != nil {
		t.Fatal(err)
	}
	run(t, eng)
	<-g.held
	for i := range 5 {
		if _, err := eng.Ingest(ctx, "test", []json.RawMessage{readingOf("Patient/a", fmt.Sprintf("a%d", i+1), "19891-1", "mm[Hg]", 36, now.Add(time.Duration(i-9)*time.Minute))}); err != nil {
			t.Fatal(err)
		}
	}
	close(g.release)
	settled(t, eng)
	if got := g.committed(); len(got) != 2 {
		t.Errorf("commits %v: want the evaluation in progress and one more for the five changes during it", got)
	}
	n, err := eng.InputCount(ctx, "Patient/a")
	if err != nil || n != 6 {
		t.Errorf("inputs stored: %d, %v; want 6", n, err)
	}
}

// Patients with device readings only take at most half of the evaluators
// (one of two), so a blood gas that arrives while such an evaluation runs
// is evaluated beside it at once, and the rest of the device readings'
// queue waits for the one in progress.
func TestDeviceReadingsLeaveAnEvaluatorForBloodGases(t *testing.T) {
	t.Parallel()
	eng, g := scheduleEngine(t, "Patient/d0")
	eng.evaluators = 2
	gasDuringHeldEvaluation(t, eng, g, 5)
	// The blood gas is committed while d0's commit is still held (the
	// wait is a bound on a hang, not a timing under test).
	deadline := time.Now().Add(time.Minute)
	for !slices.Contains(g.committed(), "Patient/gas") {
		if time.Now().After(deadline) {
			t.Fatalf("commits %v: the blood gas was not evaluated beside the held device evaluation", g.committed())
		}
		time.Sleep(time.Millisecond)
	}
	if got := g.committed(); len(got) != 1 {
		t.Errorf("commits %v while one device evaluation was in progress: want the blood gas's alone", got)
	}
	close(g.release)
	settled(t, eng)
	if got := g.committed(); len(got) != 6 {
		t.Errorf("commits %v, want one per patient (6)", got)
	}
}
