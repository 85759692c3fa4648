package engine

import (
	"context"
	"encoding/json"
	"errors"
	"fmt"
	"runtime"
	"sync"
	"time"

	"github.com/samply/golang-fhir-models/fhir-models/fhir"

	"github.com/deadspace-fhir/deadspace/api/pipeline"
	"github.com/deadspace-fhir/deadspace/api/store"
	"github.com/deadspace-fhir/deadspace/derive"
	"github.com/deadspace-fhir/deadspace/fhir/decode"
	"github.com/deadspace-fhir/deadspace/fhir/encode"
)

// Ledger entry statuses, as FHIR Observation status codes.
const (
	statusFinal     = "final"
	statusAmended   = "amended"
	statusWithdrawn = "entered-in-error"
)

// evaluators is how many patients are evaluated at once.
var evaluators = max(2, runtime.NumCPU())

// Write kinds.
const (
	writeCreate   = "create"
	writeRevise   = "revise"
	writeWithdraw = "withdraw"
)

// EntryPayload is the engine's encoding of one ledger entry: the derived
// Observation as last decided, and what it was computed from, for
// explanations.
type EntryPayload struct {
	Observation json.RawMessage    `json:"observation"`
	Derivation  *derive.Derivation `json:"derivation,omitempty"`
	Fall        *derive.Fall       `json:"fall,omitempty"`
	// Why is set for a withdrawal.
	Why string `json:"why,omitempty"`
}

// writeBody is the engine's encoding of one outbox write.
type writeBody struct {
	Kind   string   `json:"kind"`
	Series []string `json:"series"`
	// Observations are the resources as encoded, parallel to Series.
	Observations []json.RawMessage `json:"observations"`
	// Provenance is the CREATE Provenance of the Observations; a revision
	// turns it into an UPDATE at send time, when the server's versions of
	// the previous Observations are known.
	Provenance json.RawMessage `json:"provenance,omitempty"`
	Why        string          `json:"why,omitempty"`
}

func (e *Engine) evaluateLoop(ctx context.Context) {
	for {
		wait := e.evaluateDue(ctx, false)
		t := time.NewTimer(wait)
		select {
		case <-ctx.Done():
			t.Stop()
			return
		case <-e.wake:
		case <-t.C:
		}
		t.Stop()
	}
}

// EvaluateNow evaluates every dirty patient at once, ignoring the settle
// delay. Tests and the submit API use it to get a result without waiting.
func (e *Engine) EvaluateNow(ctx context.Context) error {
	dirty, err := e.cfg.Store.DirtyPatients(ctx)
	if err != nil {
		return fmt.Errorf("engine: %w", err)
	}
	var errs []error
	for _, d := range dirty {
		if err := e.evaluatePatient(ctx, d); err != nil {
			errs = append(errs, err)
		}
	}
	return errors.Join(errs...)
}

// evaluateDue evaluates the dirty patients whose data has settled and
// returns how long to wait before the next one is due.
func (e *Engine) evaluateDue(ctx context.Context, all bool) time.Duration {
	const idle = time.Minute
	dirty, err := e.cfg.Store.DirtyPatients(ctx)
	if err != nil {
		if ctx.Err() == nil {
			e.log.ErrorContext(ctx, "listing dirty patients failed", "err", err)
		}
		return time.Second
	}
	wait := idle
	now := e.now()
	var due []store.Dirty
	for _, d := range dirty {
		if at := d.Since.Add(e.cfg.Settle); !all && at.After(now) {
			wait = min(wait, at.Sub(now))
			continue
		}
		due = append(due, d)
	}
	// Patients are independent, so several are evaluated at once; their
	// commits share fsyncs through the store's batching.
	var mu sync.Mutex
	var wg sync.WaitGroup
	work := make(chan store.Dirty)
	for range min(len(due), evaluators) {
		wg.Add(1)
		go func() {
			defer wg.Done()
			for d := range work {
				if err := e.evaluatePatient(ctx, d); err != nil {
					if ctx.Err() == nil {
						e.log.ErrorContext(ctx, "evaluation failed; it stays pending", "err", err)
					}
					mu.Lock()
					wait = min(wait, 5*time.Second)
					mu.Unlock()
				}
			}
		}()
	}
	for _, d := range due {
		if ctx.Err() != nil {
			break
		}
		work <- d
	}
	close(work)
	wg.Wait()
	return max(wait, 10*time.Millisecond)
}

// evaluatePatient re-derives one patient and commits what changed. It
// holds the patient's lock, so evaluations of one patient never overlap in
// this process; the commit states what it read of every series it writes,
// so an evaluation by another process that committed first makes this one
// fail with a conflict, and the patient is evaluated again from what is
// stored now.
func (e *Engine) evaluatePatient(ctx context.Context, d store.Dirty) error {
	lock, _ := e.evaluating.LoadOrStore(d.Subject, new(sync.Mutex))
	lock.(*sync.Mutex).Lock()
	defer lock.(*sync.Mutex).Unlock()
	err := e.evaluateLocked(ctx, d)
	if errors.Is(err, store.ErrConflict) {
		e.log.InfoContext(ctx, "another evaluation of the patient committed first; evaluating again")
		if merr := e.cfg.Store.MarkDirty(ctx, d.Subject, e.now()); merr != nil {
			return fmt.Errorf("engine: evaluate: %w", merr)
		}
		signal(e.wake)
		return nil
	}
	return err
}

func (e *Engine) evaluateLocked(ctx context.Context, d store.Dirty) error {
	inputs, err := e.loadInputs(ctx, d.Subject)
	if err != nil {
		return fmt.Errorf("engine: evaluate: %w", err)
	}
	facts, err := e.patientFacts(ctx, d.Subject)
	if err != nil {
		return err
	}
	results, _, err := pipeline.Evaluate(e.cfg.Derive, e.cfg.Encoder, d.Subject, facts, inputs)
	if err != nil {
		return fmt.Errorf("engine: evaluate: %w", err)
	}
	ledger, err := e.cfg.Store.Ledger(ctx, d.Subject)
	if err != nil {
		return fmt.Errorf("engine: evaluate: %w", err)
	}
	change, err := e.diff(ctx, d, results, ledger)
	if err != nil {
		return err
	}
	if err := e.cfg.Store.Commit(ctx, change, e.now()); err != nil {
		return fmt.Errorf("engine: evaluate: %w", err)
	}
	for _, en := range change.Entries {
		if e.cfg.Hooks.Emitted != nil {
			e.cfg.Hooks.Emitted(codeOf(en), en.Status)
		}
	}
	if len(change.Writes) > 0 {
		signal(e.flush)
	}
	return nil
}

func codeOf(en store.Entry) string {
	var p EntryPayload
	if json.Unmarshal(en.Payload, &p) != nil {
		return ""
	}
	obs, err := fhir.UnmarshalObservation(p.Observation)
	if err != nil || len(obs.Code.Coding) == 0 || obs.Code.Coding[0].Code == nil {
		return ""
	}
	return *obs.Code.Coding[0].Code
}

// loadInputs returns a patient's stored readings as pairing takes them.
// Only the binary head of each is decoded; the rest of the stored item
// (original value, conversion) is for explanations.
func (e *Engine) loadInputs(ctx context.Context, subject string) ([]pipeline.Input, error) {
	stored, err := e.cfg.Store.Inputs(ctx, subject)
	if err != nil {
		return nil, err
	}
	inputs := make([]pipeline.Input, 0, len(stored))
	for _, in := range stored {
		h, _, err := decodeHead(in.Payload)
		if err != nil {
			return nil, fmt.Errorf("stored input %s: %w", in.Logical, err)
		}
		if h.Type != decode.ItemReading {
			continue // a version that withdraws or invalidates an earlier one
		}
		inputs = append(inputs, pipeline.Input{Reading: h.Reading, Priority: h.Priority})
	}
	return inputs, nil
}

// diff compares fresh results with the ledger and decides the entries to
// record and the writes to queue.
func (e *Engine) diff(ctx context.Context, d store.Dirty, results []pipeline.Result, ledger []store.Entry) (store.Change, error) {
	now := e.now()
	frozen := now.Add(-(e.cfg.Retention - e.cfg.Freeze))
	bySeries := make(map[string]store.Entry, len(ledger))
	for _, en := range ledger {
		bySeries[en.Series] = en
	}
	change := store.Change{Subject: d.Subject, Generation: d.Generation, Expect: make(map[string]store.Expect)}
	produced := make(map[string]bool)
	for _, r := range results {
		var fresh, changed []fhir.Observation
		for _, o := range r.Bundle.Observations {
			key, series := identifiers(o)
			produced[series] = true
			prev, ok := bySeries[series]
			switch {
			case r.Time().Before(frozen):
				// Too old to touch: its inputs may already be pruned.
			case !ok:
				// The series may be filed under another patient: its blood
				// gas was corrected to name this one. Then the Observation
				// on the server is updated, not created again, so the
				// wrong patient keeps nothing.
				other, err := e.cfg.Store.Entry(ctx, series)
				switch {
				case errors.Is(err, store.ErrNotFound):
					fresh = append(fresh, o)
				case err != nil:
					return store.Change{}, fmt.Errorf("engine: %w", err)
				default:
					bySeries[series] = other
					changed = append(changed, o)
				}
			case prev.Key == key && prev.Status != statusWithdrawn:
				// Already recorded as it is.
			default:
				changed = append(changed, o)
			}
		}
		for _, set := range []struct {
			obs    []fhir.Observation
			kind   string
			status string
		}{{fresh, writeCreate, statusFinal}, {changed, writeRevise, statusAmended}} {
			if len(set.obs) == 0 {
				continue
			}
			keep := make(map[string]bool, len(set.obs))
			for _, o := range set.obs {
				keep[*o.Id] = true
			}
			sub, err := e.cfg.Encoder.Subset(r.Bundle, func(o fhir.Observation) bool { return keep[*o.Id] })
			if err != nil {
				return store.Change{}, fmt.Errorf("engine: %w", err)
			}
			if err := e.record(&change, r, sub, set.kind, set.status, bySeries, now); err != nil {
				return store.Change{}, err
			}
		}
	}
	for _, en := range ledger {
		if produced[en.Series] || en.Status == statusWithdrawn || en.EffectiveAt.Before(frozen) {
			continue
		}
		if err := e.withdraw(&change, en, now); err != nil {
			return store.Change{}, err
		}
	}
	return change, nil
}

func identifiers(o fhir.Observation) (key, series string) {
	for i, id := range o.Identifier {
		if id.Value == nil {
			continue
		}
		switch i {
		case 0:
			key = *id.Value
		case 1:
			series = *id.Value
		}
	}
	return key, series
}

// record adds ledger entries for the Observations of sub and, when a server
// is configured, the write that carries them.
func (e *Engine) record(change *store.Change, r pipeline.Result, sub encode.Bundle, kind, status string, bySeries map[string]store.Entry, now time.Time) error {
	body := writeBody{Kind: kind}
	prov, err := json.Marshal(sub.Provenance)
	if err != nil {
		return fmt.Errorf("engine: encode provenance: %w", err)
	}
	body.Provenance = prov
	for _, o := range sub.Observations {
		if status == statusAmended {
			o.Status = fhir.ObservationStatusAmended
		}
		raw, err := json.Marshal(o)
		if err != nil {
			return fmt.Errorf("engine: encode observation: %w", err)
		}
		key, series := identifiers(o)
		payload, err := json.Marshal(EntryPayload{Observation: raw, Derivation: r.Derivation, Fall: r.Fall})
		if err != nil {
			return fmt.Errorf("engine: encode entry: %w", err)
		}
		en := store.Entry{
			Series: series, Subject: r.Subject, Key: key, Status: status,
			EffectiveAt: r.Time(), UpdatedAt: now, Payload: payload,
		}
		change.Expect[series] = store.Expect{}
		if prev, ok := bySeries[series]; ok {
			change.Expect[series] = store.Expect{Key: prev.Key, Status: prev.Status}
			// The server ids are left empty: the store keeps its own, which
			// the writer may have updated since this evaluation read them.
			en.Revisions = append(append([]string(nil), prev.Revisions...), prev.Key)
		}
		change.Entries = append(change.Entries, en)
		body.Series = append(body.Series, series)
		body.Observations = append(body.Observations, raw)
	}
	return e.queue(change, r.Subject, body)
}

// withdraw marks a ledger entry entered-in-error: the inputs that supported
// it were withdrawn or no longer support it.
func (e *Engine) withdraw(change *store.Change, en store.Entry, now time.Time) error {
	var p EntryPayload
	if err := json.Unmarshal(en.Payload, &p); err != nil {
		return fmt.Errorf("engine: ledger entry %s: %w", en.Series, err)
	}
	p.Why = "an input it was derived from was withdrawn or no longer supports it"
	payload, err := json.Marshal(p)
	if err != nil {
		return fmt.Errorf("engine: encode entry: %w", err)
	}
	change.Expect[en.Series] = store.Expect{Key: en.Key, Status: en.Status}
	out := en
	out.ServerID, out.ServerVersion = "", "" // the store keeps the current ones
	out.Status = statusWithdrawn
	out.UpdatedAt = now
	out.Payload = payload
	change.Entries = append(change.Entries, out)
	return e.queue(change, en.Subject, writeBody{
		Kind: writeWithdraw, Series: []string{en.Series}, Observations: []json.RawMessage{p.Observation}, Why: p.Why,
	})
}

func (e *Engine) queue(change *store.Change, subject string, body writeBody) error {
	if e.cfg.Client == nil {
		return nil
	}
	raw, err := json.Marshal(body)
	if err != nil {
		return fmt.Errorf("engine: encode write: %w", err)
	}
	change.Writes = append(change.Writes, store.Write{Series: body.Series, Subject: subject, Body: raw})
	return nil
}

// patientFacts returns what the store knows about a patient, reading it
// from the server once when the stream never carried it.
func (e *Engine) patientFacts(ctx context.Context, subject string) (derive.Patient, error) {
	p, err := e.cfg.Store.Patient(ctx, subject)
	switch {
	case err == nil:
		var facts derive.Patient
		if err := json.Unmarshal(p.Payload, &facts); err != nil {
			return derive.Patient{}, fmt.Errorf("engine: stored patient: %w", err)
		}
		return facts, nil
	case !errors.Is(err, store.ErrNotFound):
		return derive.Patient{}, fmt.Errorf("engine: %w", err)
	case e.cfg.Client == nil:
		return derive.Patient{}, nil
	}
	return e.fetchPatient(ctx, subject)
}
