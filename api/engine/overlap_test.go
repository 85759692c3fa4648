package engine_test

import (
	"context"
	"encoding/json"
	"fmt"
	"net/http/httptest"
	"sync"
	"testing"
	"time"

	"github.com/deadspace-fhir/deadspace/api/engine"
	"github.com/deadspace-fhir/deadspace/api/engine/enginetest"
	"github.com/deadspace-fhir/deadspace/api/store"
	"github.com/deadspace-fhir/deadspace/api/store/boltstore"
	"github.com/deadspace-fhir/deadspace/derive"
	"github.com/deadspace-fhir/deadspace/fhir/client"
	"github.com/deadspace-fhir/deadspace/fhir/decode"
)

// newEngine returns an engine on st writing to baseURL.
func newEngine(t *testing.T, st store.Store, baseURL string) *engine.Engine {
	t.Helper()
	enc := enginetest.Encoder(t)
	cl, err := client.New(client.Config{BaseURL: baseURL, MaxRetries: -1})
	if err != nil {
		t.Fatal(err)
	}
	eng, err := engine.New(engine.Config{
		Store: st, Decoder: decode.New(decode.Options{}), Encoder: enc, Derive: derive.DefaultConfig(), Client: cl,
	})
	if err != nil {
		t.Fatal(err)
	}
	return eng
}

// TestOverlappingEvaluationsWriteOnce: evaluations of one patient that
// overlap, in one engine (its per-patient lock) and in two engines on one
// store (another replica, or a process restarted while the first still
// runs: the store's compare-and-swap commit), while ingests keep arriving,
// queue exactly one write and one feed event per change of each value.
// Issue 9 measured two writes and four events in 20 of 20 trials before.
func TestOverlappingEvaluationsWriteOnce(t *testing.T) {
	srv := httptest.NewServer(&fakeServer{})
	defer srv.Close()
	st := enginetest.OpenStore(t, boltstore.Options{})
	// Commits are slowed so that evaluations read the ledger before the
	// others commit: without the lock and the compare-and-swap they all
	// queue the same change.
	slow := slowCommits{Store: st, delay: 20 * time.Millisecond}
	engines := []*engine.Engine{newEngine(t, slow, srv.URL+"/fhir"), newEngine(t, slow, srv.URL+"/fhir")}
	ctx := context.Background()
	at := time.Now().Add(-time.Hour).Truncate(time.Minute)
	updated := at.Add(10 * time.Minute)
	var inputs []json.RawMessage
	for m := -2; m <= 2; m++ {
		inputs = append(inputs, obs(fmt.Sprintf("et%d", m+2), "1", "final", "19891-1", "mm[Hg]", 36, at.Add(time.Duration(m)*time.Minute), updated))
	}
	versions := []json.RawMessage{
		obs("gas", "1", "final", "2019-8", "mm[Hg]", 44, at, updated),
		obs("gas", "2", "amended", "2019-8", "mm[Hg]", 47, at, updated.Add(time.Minute)),
		obs("gas", "3", "amended", "2019-8", "mm[Hg]", 49, at, updated.Add(2*time.Minute)),
	}
	if _, err := engines[0].Ingest(ctx, "test", inputs); err != nil {
		t.Fatal(err)
	}
	for round, v := range versions {
		before, err := st.LastEvent(ctx)
		if err != nil {
			t.Fatal(err)
		}
		depth := outboxDepth(t, st)
		if _, err := engines[1].Ingest(ctx, "test", []json.RawMessage{v}); err != nil {
			t.Fatal(err)
		}
		start := make(chan struct{})
		var wg sync.WaitGroup
		for i := range 8 {
			eng := engines[i%2]
			wg.Go(func() {
				<-start
				if i == 3 {
					// The same version again in the middle of the
					// evaluations: idempotent, it changes nothing.
					if _, err := eng.Ingest(ctx, "test", []json.RawMessage{v}); err != nil {
						t.Error(err)
					}
				}
				if err := eng.EvaluateNow(ctx); err != nil {
					t.Error(err)
				}
			})
		}
		close(start)
		wg.Wait()
		for _, eng := range engines {
			if err := eng.EvaluateNow(ctx); err != nil {
				t.Fatal(err)
			}
		}
		after, err := st.LastEvent(ctx)
		if err != nil {
			t.Fatal(err)
		}
		// Two values (gradient and alveolar fraction), one write for both.
		if got := after - before; got != 2 {
			t.Errorf("version %d: %d feed events, want 2", round+1, got)
		}
		if got := outboxDepth(t, st) - depth; got != 1 {
			t.Errorf("version %d: %d writes queued, want 1", round+1, got)
		}
	}
}

func outboxDepth(t *testing.T, st store.Store) int {
	t.Helper()
	s, err := st.Stats(context.Background())
	if err != nil {
		t.Fatal(err)
	}
	return s.OutboxDepth
}

// slowCommits delays every commit, widening the window in which another
// evaluation can read what the commit is about to change.
type slowCommits struct {
	store.Store
	delay time.Duration
}

func (s slowCommits) Commit(ctx context.Context, c store.Change, now time.Time) error {
	time.Sleep(s.delay)
	return s.Store.Commit(ctx, c, now)
}
