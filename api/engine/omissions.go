package engine

import (
	"context"
	"encoding/json"
	"errors"
	"fmt"
	"sync"
	"time"

	"github.com/deadspace-fhir/deadspace/api/pipeline"
	"github.com/deadspace-fhir/deadspace/api/store"
	"github.com/deadspace-fhir/deadspace/derive"
)

// When the left-out picture's refresher runs: once evaluations have been
// quiet for pictureQuiet, or, under sustained load, pictureMaxLag after a
// patient's picture went stale. A burst of data therefore costs each of
// its patients one complete re-derivation after the burst (or one per
// pictureMaxLag while it lasts), not one per second taken from the
// evaluations and the webhook; the gauges lag by at most that.
const (
	pictureQuiet  = time.Second
	pictureMaxLag = 15 * time.Second
)

// pictures keeps Hooks.Evaluated true to a complete evaluation of each
// patient's data.
//
// An incremental evaluation re-derives only the blood gases new data
// reaches, so it knows only part of what the patient's data leaves out;
// reporting that part would undercount, and reporting nothing would leave
// an earlier picture standing (data usually arrives patient first, then
// blood gases, then device readings, and only the first evaluation is
// complete). So an incremental evaluation marks the patient's picture
// stale, and a refresher re-derives stale patients whole, without
// committing anything, off the evaluation path: one patient at a time,
// each stale patient once per round however many evaluations marked it,
// a round when evaluations go quiet (or at the latest [pictureMaxLag]
// after the first stale mark), and after each round a rest three times as
// long as the round took.
type pictures struct {
	wake chan struct{}

	mu sync.Mutex // orders reports: a refresh never overwrites a newer evaluation
	// stale are the patients whose last report is older than their last
	// evaluation.
	stale map[string]struct{}
	// evaluations counts each patient's evaluations, so a refresh whose
	// reading an evaluation overtook is dropped.
	evaluations map[string]uint64
	// refreshing counts the patients of the round in progress not yet
	// reported.
	refreshing int
	// lastEvaluation is when an evaluation last reported.
	lastEvaluation time.Time

	round sync.Mutex // one refresh round at a time
}

func newPictures() *pictures {
	return &pictures{wake: make(chan struct{}, 1), stale: map[string]struct{}{}, evaluations: map[string]uint64{}}
}

// evaluated is called by every committed evaluation of a patient with what
// it left out; complete says it derived the patient whole.
func (e *Engine) evaluated(subject string, omitted []derive.Omission, complete bool) {
	p := e.pictures
	p.mu.Lock()
	defer p.mu.Unlock()
	p.evaluations[subject]++
	p.lastEvaluation = time.Now()
	if !complete {
		p.stale[subject] = struct{}{}
		signal(p.wake)
		return
	}
	delete(p.stale, subject)
	if e.cfg.Hooks.Evaluated != nil {
		e.cfg.Hooks.Evaluated(subject, omitted)
	}
}

// pictureLoop refreshes stale pictures until ctx is done.
func (e *Engine) pictureLoop(ctx context.Context) {
	for {
		select {
		case <-ctx.Done():
			return
		case <-e.pictures.wake:
		}
		if !e.awaitQuiet(ctx, time.Now()) {
			return
		}
		started := time.Now()
		if err := e.refreshPictures(ctx); err != nil && ctx.Err() == nil {
			e.log.ErrorContext(ctx, "refreshing what the derivations leave out failed; it is retried", "err", err)
			signal(e.pictures.wake)
		}
		// Rest three times as long as the round took, so under sustained
		// load the refresher takes at most a quarter of one core from
		// evaluations and the webhook.
		if !sleep(ctx, 3*time.Since(started)) {
			return
		}
	}
}

// awaitQuiet waits until evaluations have been quiet for pictureQuiet, or
// pictureMaxLag after staleSince, whichever comes first; false when ctx
// ended.
func (e *Engine) awaitQuiet(ctx context.Context, staleSince time.Time) bool {
	p := e.pictures
	deadline := staleSince.Add(pictureMaxLag)
	for {
		p.mu.Lock()
		quietAt := p.lastEvaluation.Add(pictureQuiet)
		p.mu.Unlock()
		now := time.Now()
		if !now.Before(quietAt) || !now.Before(deadline) {
			return true
		}
		if !sleep(ctx, min(quietAt.Sub(now), deadline.Sub(now))) {
			return false
		}
	}
}

// refreshPictures re-derives every stale patient whole and reports what
// each leaves out. A patient it could not read stays stale.
func (e *Engine) refreshPictures(ctx context.Context) error {
	p := e.pictures
	p.round.Lock()
	defer p.round.Unlock()
	p.mu.Lock()
	subjects := make([]string, 0, len(p.stale))
	for s := range p.stale {
		subjects = append(subjects, s)
	}
	clear(p.stale)
	p.refreshing = len(subjects)
	p.mu.Unlock()
	var errs []error
	for i, s := range subjects {
		if ctx.Err() != nil {
			e.refreshed(false, subjects[i:]...)
			return errors.Join(append(errs, ctx.Err())...)
		}
		err := e.refreshPicture(ctx, s)
		if err != nil {
			errs = append(errs, err)
		}
		e.refreshed(err == nil, s)
	}
	return errors.Join(errs...)
}

// refreshed ends the round's work on subjects; those not reported stay
// stale.
func (e *Engine) refreshed(reported bool, subjects ...string) {
	p := e.pictures
	p.mu.Lock()
	defer p.mu.Unlock()
	p.refreshing -= len(subjects)
	if reported {
		return
	}
	for _, s := range subjects {
		p.stale[s] = struct{}{}
	}
}

// stalePictures counts the patients whose left-out picture is not yet
// reported as their data stands.
func (e *Engine) stalePictures() int {
	p := e.pictures
	p.mu.Lock()
	defer p.mu.Unlock()
	return len(p.stale) + p.refreshing
}

// refreshPicture re-derives one patient whole, commits nothing, and
// reports what the patient's data leaves out, unless an evaluation
// reported since the inputs were read (its report, or the refresh it asks
// for, is newer).
func (e *Engine) refreshPicture(ctx context.Context, subject string) error {
	p := e.pictures
	p.mu.Lock()
	seen := p.evaluations[subject]
	p.mu.Unlock()
	omitted, err := e.omissions(ctx, subject)
	if err != nil {
		return err
	}
	p.mu.Lock()
	defer p.mu.Unlock()
	if p.evaluations[subject] == seen && e.cfg.Hooks.Evaluated != nil {
		e.cfg.Hooks.Evaluated(subject, omitted)
	}
	return nil
}

// omissions is what a complete evaluation of the patient's stored data
// leaves out. Patient facts come from the store only: an evaluation has
// already read the server for them, and a refresh must not add requests.
func (e *Engine) omissions(ctx context.Context, subject string) ([]derive.Omission, error) {
	inputs, err := e.loadInputs(ctx, subject)
	if err != nil {
		return nil, fmt.Errorf("engine: left-out picture: %w", err)
	}
	omitted, err := e.omissionsOf(ctx, subject, inputs)
	if err != nil {
		return nil, fmt.Errorf("engine: left-out picture: %w", err)
	}
	return omitted, nil
}

// omissionsOf is what a complete evaluation of inputs, the patient's
// usable stored readings, leaves out, with the patient's facts from the
// store.
func (e *Engine) omissionsOf(ctx context.Context, subject string, inputs []pipeline.Input) ([]derive.Omission, error) {
	var facts derive.Patient
	switch stored, err := e.cfg.Store.Patient(ctx, subject); {
	case errors.Is(err, store.ErrNotFound):
	case err != nil:
		return nil, err
	default:
		if err := json.Unmarshal(stored.Payload, &facts); err != nil {
			return nil, fmt.Errorf("stored patient: %w", err)
		}
	}
	_, omitted, err := pipeline.EvaluateFrom(e.cfg.Derive, e.cfg.Encoder, subject, facts, inputs, time.Time{})
	if err != nil {
		return nil, err
	}
	return omitted, nil
}
