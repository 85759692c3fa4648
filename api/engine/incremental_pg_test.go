package engine_test

import (
	"context"
	"fmt"
	"math/rand/v2"
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
// of the streams of TestIncrementalAgreesWithReplay and
// TestIncrementalAgreesWithReplayForEveryKind reaches one of them, drawn at
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
