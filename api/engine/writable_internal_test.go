package engine

import (
	"context"
	"errors"
	"sync/atomic"
	"testing"
	"time"

	"github.com/deadspace-fhir/deadspace/api/engine/enginetest"
	"github.com/deadspace-fhir/deadspace/api/store"
	"github.com/deadspace-fhir/deadspace/api/store/boltstore"
	"github.com/deadspace-fhir/deadspace/derive"
	"github.com/deadspace-fhir/deadspace/fhir/decode"
)

// readOnlyStore answers reads and, while broken, refuses writes, as a
// store on a full disk does.
type readOnlyStore struct {
	store.Store
	broken atomic.Bool
	writes atomic.Int32
}

func (s *readOnlyStore) SetCursor(ctx context.Context, name, value string) error {
	s.writes.Add(1)
	if s.broken.Load() {
		return errors.New("no space left on device")
	}
	return s.Store.SetCursor(ctx, name, value)
}

// Readiness learns that the store takes writes by writing to it, at most
// every couple of seconds: a store that answers reads but refuses writes
// is not ready, and is ready again once it takes them.
func TestStoreWrites(t *testing.T) {
	t.Parallel()
	st := &readOnlyStore{Store: enginetest.OpenStore(t, boltstore.Options{NoSync: true})}
	e, err := New(Config{Store: st, Decoder: decode.New(decode.Options{}), Encoder: enginetest.Encoder(t), Derive: derive.DefaultConfig()})
	if err != nil {
		t.Fatal(err)
	}
	ctx := t.Context()
	if err := e.StoreWrites(ctx); err != nil {
		t.Fatalf("a working store: %v", err)
	}
	if err := e.StoreWrites(ctx); err != nil || st.writes.Load() != 1 {
		t.Fatalf("a second probe at once: %v, %d writes; want the last answer, one write", err, st.writes.Load())
	}
	st.broken.Store(true)
	e.probe.at = time.Now().Add(-writeProbeEvery)
	if err := e.StoreWrites(ctx); err == nil {
		t.Fatal("a store refusing writes passed for one that takes them")
	}
	if _, err := e.Health(ctx); err != nil {
		t.Fatalf("reads still work, and Health says so: %v", err)
	}
	st.broken.Store(false)
	e.probe.at = time.Now().Add(-writeProbeEvery)
	if err := e.StoreWrites(ctx); err != nil {
		t.Fatalf("the store takes writes again: %v", err)
	}
}
