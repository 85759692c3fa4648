package engine_test

import (
	"context"
	"encoding/json"
	"fmt"
	"log/slog"
	"math/rand/v2"
	"slices"
	"sync"
	"sync/atomic"
	"testing"
	"time"

	"github.com/deadspace-fhir/deadspace/api/engine"
	"github.com/deadspace-fhir/deadspace/api/engine/enginetest"
	"github.com/deadspace-fhir/deadspace/api/store"
	"github.com/deadspace-fhir/deadspace/api/store/pgstore"
	"github.com/deadspace-fhir/deadspace/api/store/pgstore/pgtest"
	"github.com/deadspace-fhir/deadspace/derive"
	"github.com/deadspace-fhir/deadspace/fhir/decode"
	"github.com/jackc/pgx/v5"
)

// sharedRangeCounting is rangeCounting over PostgreSQL, whose replica
// methods (store.Replicated) the engine sees through it; it also counts
// the reads of every input of a patient (whole). The replicas share the
// counts.
type sharedRangeCounting struct {
	*pgstore.Store
	whole, ranged, commits *atomic.Int64
}

func (r sharedRangeCounting) Inputs(ctx context.Context, subject string) ([]store.Input, error) {
	r.whole.Add(1)
	return r.Store.Inputs(ctx, subject)
}

func (r sharedRangeCounting) InputsFrom(ctx context.Context, subject string, from time.Time) ([]store.Input, error) {
	r.ranged.Add(1)
	return r.Store.InputsFrom(ctx, subject, from)
}

func (r sharedRangeCounting) Commit(ctx context.Context, c store.Change, now time.Time) error {
	r.commits.Add(1)
	return r.Store.Commit(ctx, c, now)
}

// TestReplicasAgreeWithReplay: two replicas share PostgreSQL; each batch
// of the streams of TestIncrementalAgreesWithReplay,
// TestIncrementalAgreesWithReplayForEveryKind and
// TestIncrementalAgreesWithReplayDuringOpenEpisodes reaches one of them, drawn at
// random, and one or both evaluate after it. A replica resumes its fall
// detector from the state it kept only while no other replica evaluated
// the patient since (store.Dirty.Cleared): whatever the interleaving, the
// values recorded must be replay's.
func TestReplicasAgreeWithReplay(t *testing.T) {
	t.Parallel()
	for _, c := range []struct {
		name     string
		items    func() ([]arrival, time.Time, []string)
		minFalls int
	}{
		{"falls and rises", fallsAndRises, 4},
		{"every kind", everyKind, 2},
		{"changes during open episodes", changesDuringOpenEpisodes, 4},
	} {
		for seed := range uint64(5) {
			t.Run(fmt.Sprintf("%s/order %d", c.name, seed), func(t *testing.T) {
				t.Parallel()
				items, base, subjects := c.items()
				stream := arrivalOrder(items, seed)
				url := pgtest.NewSchema(t)
				var whole, ranged, commits atomic.Int64
				replica := func(name string) *engine.Engine {
					ps, err := pgstore.Open(t.Context(), url, pgstore.Options{Holder: name})
					if err != nil {
						t.Fatal(err)
					}
					t.Cleanup(func() { _ = ps.Close() })
					eng, err := engine.New(engine.Config{
						Store: sharedRangeCounting{ps, &whole, &ranged, &commits}, Decoder: decode.New(decode.Options{}),
						Encoder: enginetest.Encoder(t), Derive: derive.DefaultConfig(),
						Now: func() time.Time { return base.Add(8 * time.Hour) },
					})
					if err != nil {
						t.Fatal(err)
					}
					return eng
				}
				replicas := []*engine.Engine{replica("replica-a"), replica("replica-b")}
				rng := rand.New(rand.NewPCG(seed, 11))
				ctx := context.Background()
				for from := 0; from < len(stream); from += 9 {
					if _, err := replicas[rng.IntN(2)].Ingest(ctx, "test", stream[from:min(from+9, len(stream))]); err != nil {
						t.Fatal(err)
					}
					// Mostly the same replica evaluates again, as a patient
					// tends to; now and then the other, or both.
					first := 0
					if rng.IntN(4) == 0 {
						first = 1
					}
					if err := replicas[first].EvaluateNow(ctx); err != nil {
						t.Fatal(err)
					}
					if rng.IntN(6) == 0 {
						if err := replicas[1-first].EvaluateNow(ctx); err != nil {
							t.Fatal(err)
						}
					}
				}
				n := sameAsReplay(t, replicas[0], stream, base, subjects, c.minFalls)
				// Both kinds of evaluation must have happened: resumed
				// (a range read) and whole (after the other replica's).
				if whole.Load() < 3 || ranged.Load() < 3 {
					t.Errorf("%d whole reads and %d range reads: the test did not exercise both kinds of evaluation", whole.Load(), ranged.Load())
				}
				t.Logf("%d values agree; %d evaluations, %d whole reads, %d range reads", n, commits.Load(), whole.Load(), ranged.Load())
			})
		}
	}
}

// committedBy records which replica committed each patient's evaluations.
type committedBy struct {
	*pgstore.Store
	name string
	mu   *sync.Mutex
	by   map[string]map[string]int // subject → replica → commits
}

func (c committedBy) Commit(ctx context.Context, ch store.Change, now time.Time) error {
	err := c.Store.Commit(ctx, ch, now)
	if err == nil {
		c.mu.Lock()
		if c.by[ch.Subject] == nil {
			c.by[ch.Subject] = map[string]int{}
		}
		c.by[ch.Subject][c.name]++
		c.mu.Unlock()
	}
	return err
}

// TestPatientsStayWithTheReplicaThatEvaluatedThem: three replicas run
// their evaluation loops over one PostgreSQL database and notifications
// reach them at random, as behind a load balancer. The replica that
// evaluates a patient first evaluates it from then on, so it goes on from
// the fall detector state and the falls it holds instead of starting over
// (store.Dirty.EvaluatedElsewhere; Config.OwnerGrace). When that replica
// stalls (it says it runs but evaluates nothing), another takes the
// patient once the grace has passed; when a replica stops, another takes
// its patients at once; and the values are still replay's.
func TestPatientsStayWithTheReplicaThatEvaluatedThem(t *testing.T) {
	t.Parallel()
	items, base, subjects := fallsAndRises()
	stream := arrivalOrder(items, 3)
	url := pgtest.NewSchema(t)
	// The clock runs from eight hours after the readings (they are all
	// within the retention) and the test moves it on past the grace.
	var skew atomic.Int64
	start := time.Now()
	clock := func() time.Time {
		return base.Add(8 * time.Hour).Add(time.Since(start)).Add(time.Duration(skew.Load()))
	}
	const grace = time.Minute
	var mu sync.Mutex
	by := map[string]map[string]int{}
	type replica struct {
		name string
		eng  *engine.Engine
		stop context.CancelFunc
		done chan struct{}
	}
	var replicas []*replica
	for _, name := range []string{"replica-a", "replica-b", "replica-c"} {
		ps, err := pgstore.Open(t.Context(), url, pgstore.Options{Holder: name})
		if err != nil {
			t.Fatal(err)
		}
		t.Cleanup(func() { _ = ps.Close() })
		eng, err := engine.New(engine.Config{
			Store: committedBy{ps, name, &mu, by}, Decoder: decode.New(decode.Options{}),
			Encoder: enginetest.Encoder(t), Derive: derive.DefaultConfig(), Now: clock, OwnerGrace: grace,
			Logger: slog.New(slog.NewTextHandler(tWriter{t, name}, nil)),
		})
		if err != nil {
			t.Fatal(err)
		}
		ctx, stop := context.WithCancel(context.Background())
		r := &replica{name: name, eng: eng, stop: stop, done: make(chan struct{})}
		go func() {
			defer close(r.done)
			_ = eng.Run(ctx)
		}()
		t.Cleanup(func() { stop(); <-r.done })
		replicas = append(replicas, r)
	}
	probe, err := pgstore.Open(t.Context(), url, pgstore.Options{Holder: "probe"})
	if err != nil {
		t.Fatal(err)
	}
	t.Cleanup(func() { _ = probe.Close() })
	quiet := func(step string) {
		t.Helper()
		deadline := time.Now().Add(30 * time.Second)
		for {
			dirty, err := probe.DirtyPatients(context.Background())
			if err != nil {
				t.Fatal(err)
			}
			if len(dirty) == 0 {
				return
			}
			if time.Now().After(deadline) {
				t.Fatalf("%s: still dirty after 30 s: %+v (now %v)", step, dirty, clock())
			}
			time.Sleep(10 * time.Millisecond)
		}
	}
	rng := rand.New(rand.NewPCG(3, 17))
	ctx := context.Background()
	half := len(stream) / 2
	for from := 0; from < half; from += 9 {
		if _, err := replicas[rng.IntN(3)].eng.Ingest(ctx, "test", stream[from:min(from+9, half)]); err != nil {
			t.Fatal(err)
		}
		quiet("first half")
	}
	owners := map[string]string{}
	mu.Lock()
	for _, subject := range subjects {
		if len(by[subject]) != 1 {
			t.Errorf("%s was evaluated by %v; want one replica throughout", subject, by[subject])
		}
		for name, n := range by[subject] {
			owners[subject] = name
			if n < 5 {
				t.Errorf("%s: %d evaluations; the test should evaluate each patient many times", subject, n)
			}
		}
	}
	mu.Unlock()

	// The first patient's replica stalls: it still says it runs (its row is
	// put back after it stopped) but evaluates nothing. The rest of the
	// stream reaches the others, and the patient waits for it until the
	// grace has passed.
	gone := owners[subjects[0]]
	var alive []*replica
	for _, r := range replicas {
		if r.name == gone {
			r.stop()
			<-r.done
			continue
		}
		alive = append(alive, r)
	}
	conn, err := pgx.Connect(ctx, url)
	if err != nil {
		t.Fatal(err)
	}
	defer conn.Close(ctx)
	if _, err := conn.Exec(ctx, `INSERT INTO replicas_alive (holder, alive_until) VALUES ($1, clock_timestamp() + interval '1 hour')
		ON CONFLICT (holder) DO UPDATE SET alive_until = EXCLUDED.alive_until`, gone); err != nil {
		t.Fatal(err)
	}
	for from := half; from < len(stream); from += 9 {
		if _, err := alive[rng.IntN(len(alive))].eng.Ingest(ctx, "test", stream[from:min(from+9, len(stream))]); err != nil {
			t.Fatal(err)
		}
	}
	time.Sleep(200 * time.Millisecond)
	if d, err := probe.DirtyPatients(ctx); err != nil || !slices.ContainsFunc(d, func(d store.Dirty) bool { return d.Subject == subjects[0] }) {
		t.Errorf("the stalled replica's patient was taken before the grace passed: dirty %+v, %v", d, err)
	}
	skew.Store(int64(2 * grace))
	// A listing after the clock moved on (a notification wakes the loop).
	if _, err := alive[0].eng.Ingest(ctx, "test", stream[len(stream)-1:]); err != nil {
		t.Fatal(err)
	}
	quiet("after the grace")
	taker := waitForEvaluation(t, &mu, by, subjects[0], gone)

	// The replica that took the patient over stops: it says so, and the
	// last one takes the patient's next data at once, without waiting for
	// the grace (quiet would give up long before it passes).
	var last *replica
	for _, r := range alive {
		if r.name == taker {
			r.stop()
			<-r.done
		} else {
			last = r
		}
	}
	at := base.Add(6*time.Hour + 30*time.Second)
	more := obsOf(subjects[0], "inc1-after", "1", "final", "19891-1", "mm[Hg]", 37, at, at.Add(time.Minute))
	stream = append(stream, more)
	if _, err := last.eng.Ingest(ctx, "test", []json.RawMessage{more}); err != nil {
		t.Fatal(err)
	}
	quiet("after its new replica stopped")
	waitForEvaluation(t, &mu, by, subjects[0], gone, taker)
	sameAsReplay(t, alive[0].eng, stream, base, subjects, 4)
}

// waitForEvaluation waits until a replica other than those named has
// committed an evaluation of subject, and returns its name: the count
// follows the commit's return, a moment after the mark is gone.
func waitForEvaluation(t *testing.T, mu *sync.Mutex, by map[string]map[string]int, subject string, not ...string) string {
	t.Helper()
	for deadline := time.Now().Add(5 * time.Second); ; time.Sleep(10 * time.Millisecond) {
		mu.Lock()
		seen := fmt.Sprint(by[subject])
		for name, n := range by[subject] {
			if n > 0 && !slices.Contains(not, name) {
				mu.Unlock()
				return name
			}
		}
		mu.Unlock()
		if time.Now().After(deadline) {
			t.Fatalf("no replica but %v evaluated %s: evaluations %s", not, subject, seen)
		}
	}
}
