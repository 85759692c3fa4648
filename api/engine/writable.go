package engine

import (
	"context"
	"fmt"
	"sync"
	"time"
)

// cursorWriteProbe names the value readiness writes to learn that the
// store takes writes: a store that answers reads while its writes fail (a
// full disk, a database gone read-only) must not pass for ready, since
// every input would then be refused.
const cursorWriteProbe = "ready.write-probe"

// writeProbeEvery bounds how often the probe writes; in between, the last
// answer stands.
const writeProbeEvery = 2 * time.Second

// writeProbe is the last probe: when it ran (monotonic) and its answer.
type writeProbe struct {
	mu  sync.Mutex
	at  time.Time
	err error
}

// StoreWrites reports whether the store takes writes: a small write, at
// most once per writeProbeEvery (the answer in between is the last one).
// Readiness calls it.
func (e *Engine) StoreWrites(ctx context.Context) error {
	p := &e.probe
	p.mu.Lock()
	defer p.mu.Unlock()
	if !p.at.IsZero() && time.Since(p.at) < writeProbeEvery {
		return p.err
	}
	err := e.cfg.Store.SetCursor(ctx, cursorWriteProbe, time.Now().UTC().Format(time.RFC3339Nano))
	if ctx.Err() != nil {
		// The caller gave up: no answer about the store.
		return err
	}
	p.at, p.err = time.Now(), nil
	if err != nil {
		p.err = fmt.Errorf("engine: the store does not take writes: %w", err)
	}
	return p.err
}
