package engine

import (
	"bytes"
	"cmp"
	"context"
	"crypto/sha256"
	"encoding/hex"
	"encoding/json"
	"errors"
	"fmt"
	"math"
	"runtime"
	"slices"
	"strings"
	"sync"
	"time"

	"github.com/deadspace-fhir/deadspace/api/pipeline"
	"github.com/deadspace-fhir/deadspace/api/store"
	"github.com/deadspace-fhir/deadspace/derive"
	"github.com/deadspace-fhir/deadspace/fhir/decode"
	"github.com/deadspace-fhir/deadspace/fhir/encode"
	fhirref "github.com/deadspace-fhir/deadspace/fhir/ref"
)

// Ledger entry statuses, as FHIR Observation status codes.
const (
	statusFinal     = "final"
	statusAmended   = "amended"
	statusWithdrawn = "entered-in-error"
)

// defaultEvaluators is how many patients are evaluated at once.
var defaultEvaluators = max(2, runtime.NumCPU())

// routineEvaluators is how many of evaluators may evaluate patients whose
// changes hold no blood gas (device readings only) at once: half, at
// least one. A flood of device readings then leaves the other half of the
// cores to the blood gases, which the store lists first, and to ingest,
// whose commits every webhook answer waits for; on two cores, one
// evaluator keeps up with the device readings of the live benchmark.
func routineEvaluators(evaluators int) int { return max(1, evaluators/2) }

// EntryPayload is the engine's encoding of one ledger entry: the value's
// code and the version of the result (derivation or fall) it belongs to,
// which the store keeps once for all the result's values. It holds no FHIR
// resource: Observation is encoded when the entry is read.
type EntryPayload struct {
	Code derive.Code `json:"code"`
	// Result and Version name the stored result.
	Result  string `json:"result,omitempty"`
	Version string `json:"version,omitempty"`
	// Derivation and Fall are the result, read from the store (or held
	// inline by entries written before results were stored apart).
	Derivation *derive.Derivation `json:"derivation,omitempty"`
	Fall       *derive.Fall       `json:"fall,omitempty"`
	// Why is set for a withdrawal.
	Why string `json:"why,omitempty"`
	// Observation is the derived Observation as written, encoded when the
	// entry is read; it is not stored.
	Observation json.RawMessage `json:"-"`
}

// resultPayload is the engine's encoding of a stored result.
type resultPayload struct {
	Derivation *derive.Derivation `json:"derivation,omitempty"`
	Fall       *derive.Fall       `json:"fall,omitempty"`
}

// storedResult encodes a result for the store: its id names the blood gas
// (or the fall's series), its version is a digest of the content, so an
// unchanged result is stored once however often it is re-derived.
func storedResult(r pipeline.Result, id string) (store.Result, error) {
	payload, err := json.Marshal(resultPayload{Derivation: r.Derivation, Fall: r.Fall})
	if err != nil {
		return store.Result{}, fmt.Errorf("engine: encode result: %w", err)
	}
	sum := sha256.Sum256(payload)
	return store.Result{ID: id, Version: hex.EncodeToString(sum[:12]), Subject: r.Subject, EffectiveAt: r.Time(), Payload: payload}, nil
}

// resultID names a result: its blood gas, unversioned, or its fall series.
func resultID(r pipeline.Result, vals []value) string {
	if r.Derivation != nil {
		logical, _ := fhirref.Split(r.Derivation.Gas.Ref)
		return "gas " + logical
	}
	return "fall " + vals[0].id.Series
}

// loadResult fills p's derivation or fall from the stored result.
func (e *Engine) loadResult(ctx context.Context, p *EntryPayload) error {
	if p.Derivation != nil || p.Fall != nil {
		return nil // an entry that holds its result inline
	}
	r, err := e.cfg.Store.Result(ctx, p.Result, p.Version)
	if err != nil {
		return fmt.Errorf("engine: ledger entry's result: %w", err)
	}
	var rp resultPayload
	if err := json.Unmarshal(r.Payload, &rp); err != nil {
		return fmt.Errorf("engine: stored result: %w", err)
	}
	p.Derivation, p.Fall = rp.Derivation, rp.Fall
	return nil
}

// failedHold is how long a patient whose evaluation failed waits before
// it is tried again.
const failedHold = 5 * time.Second

// maxRelistDelay is the longest a device reading of a patient not held
// back by the device pace waits for the evaluation loop's next listing.
const maxRelistDelay = 100 * time.Millisecond

// evaluateLoop hands dirty patients to up to evaluators concurrent
// evaluations. It lists the dirty patients again before each hand-out
// when anything changed since the last listing (an ingest woke it, an
// evaluation ended), so a patient whose new data includes a blood gas,
// which the store lists first, is the next one evaluated even while a long
// queue of patients with device readings only is being worked through.
// A patient already being evaluated is not handed out again: the changes
// that arrive meanwhile leave it dirty with a newer generation, and it is
// evaluated once more after, however many arrived.
func (e *Engine) evaluateLoop(ctx context.Context) {
	type outcome struct {
		subject string
		failed  bool
	}
	evaluators := e.evaluators
	routineLimit := routineEvaluators(evaluators)
	done := make(chan outcome, evaluators)
	// The evaluators are long-lived goroutines: one started per
	// evaluation would grow its stack from the smallest again each time
	// (an evaluation runs deep), a cost measured at a few per cent of the
	// live benchmark's CPU.
	work := make(chan store.Dirty, evaluators)
	defer close(work)
	for range evaluators {
		go func() {
			for d := range work {
				err := e.evaluatePatient(ctx, d)
				if err != nil && ctx.Err() == nil {
					e.log.ErrorContext(ctx, "evaluation failed; it stays pending", "err", err)
				}
				done <- outcome{d.Subject, err != nil}
			}
		}()
	}
	running := make(map[string]bool)
	// routine holds the patients being evaluated whose mark held no blood
	// gas (not Urgent).
	routine := make(map[string]bool)
	// held are patients whose evaluation failed, not retried before then.
	held := make(map[string]inMemoryWait)
	// paced holds when each patient's last evaluation began, for the
	// device pace.
	paced := make(map[string]time.Time)
	var queue []store.Dirty
	// listNow asks for a listing before the next hand-out; listSoon for
	// one at most relistEvery after the last. A device reading, or an
	// evaluation ending, asks for a listing soon: listing every dirty
	// patient once per reading would cost more than the evaluations it
	// paces (with the pace, nearly every patient is dirty at any time).
	// The queue of the last listing keeps being handed out meanwhile; it
	// leaves out the patients that were being evaluated, so an entry is
	// at most as old as the listing.
	listNow, listSoon := true, false
	relistEvery := min(e.cfg.DevicePace/10, maxRelistDelay)
	var listed time.Time
	timer := time.NewTimer(0)
	defer timer.Stop()
	soon := time.NewTimer(time.Hour)
	soon.Stop()
	defer soon.Stop()
	soonArmed := false
	for {
		if listSoon && !listNow {
			if since := time.Since(listed); since >= relistEvery {
				listNow = true
			} else if !soonArmed {
				soon.Reset(relistEvery - since)
				soonArmed = true
			}
		}
		if len(running) < evaluators && listNow {
			var wait time.Duration
			queue, wait = e.due(ctx, running, held, paced)
			listed = time.Now()
			listNow, listSoon = false, false
			timer.Reset(wait)
		}
		// The queue lists blood gases first, so a routine mark at its head
		// means none is waiting: it waits for a routine evaluation to end.
		if len(running) < evaluators && len(queue) > 0 && ctx.Err() == nil && (queue[0].Urgent || len(routine) < routineLimit) {
			d := queue[0]
			queue = queue[1:]
			running[d.Subject] = true
			e.withdrawn.taken(d.Subject)
			if !d.Urgent {
				routine[d.Subject] = true
			}
			if e.cfg.DevicePace > 0 {
				paced[d.Subject] = time.Now()
			}
			work <- d // never blocks: fewer than evaluators are running
			continue
		}
		select {
		case <-ctx.Done():
			// Every evaluation in progress ends (committed, or abandoned
			// before its commit) before the loop returns.
			for range len(running) {
				<-done
			}
			return
		case o := <-done:
			delete(running, o.subject)
			delete(routine, o.subject)
			if o.failed {
				held[o.subject] = waitFrom(e.now(), failedHold)
				listNow = true
			}
			// The patient may be dirty again (changes that arrived during
			// its evaluation): list again. A blood gas that arrived since
			// the listing has asked for a listing now.
			listSoon = true
		case <-e.wake:
			listNow = true
		case <-e.wakeDevice:
			listSoon = true
		case <-soon.C:
			soonArmed = false
		case <-timer.C:
			listNow = true
		}
	}
}

// due lists the dirty patients that can be evaluated now, in the store's
// order (blood gases first), leaving out those being evaluated and those
// left to the replica that evaluated them last (leftToOwner), and returns
// how long to wait before the next listing is worth making.
func (e *Engine) due(ctx context.Context, running map[string]bool, held map[string]inMemoryWait, paced map[string]time.Time) ([]store.Dirty, time.Duration) {
	const idle = time.Minute
	dirty, err := e.cfg.Store.DirtyPatients(ctx)
	if err != nil {
		if ctx.Err() == nil {
			e.log.ErrorContext(ctx, "listing dirty patients failed", "err", err)
		}
		return nil, time.Second
	}
	e.marks.keep(dirty)
	wait := idle
	shared := e.sharedStore()
	if shared {
		// Marks written by other replicas wake no loop here: a listing
		// this often finds them, among them those of the patients this
		// replica evaluated last, which the others leave to it.
		wait = sharedListing
	}
	now := e.now()
	for subject, until := range held {
		if until.over(now) {
			delete(held, subject)
		}
	}
	// The pace is kept by the monotonic clock: it spreads work over real
	// time, whatever clock the engine was given.
	paceNow := time.Now()
	for subject, at := range paced {
		if paceNow.Sub(at) >= e.cfg.DevicePace {
			delete(paced, subject)
		}
	}
	var due []store.Dirty
	for _, d := range dirty {
		if at, ok := paced[d.Subject]; ok && !d.Urgent {
			wait = min(wait, e.cfg.DevicePace-paceNow.Sub(at))
			continue
		}
		if until, ok := held[d.Subject]; ok {
			wait = min(wait, until.left(now))
			continue
		}
		if running[d.Subject] {
			continue
		}
		if left := e.cfg.Settle - e.marks.settled(d, now, shared); left > 0 && !e.withdrawn.pending(d.Subject) {
			wait = min(wait, left)
			continue
		}
		if left, after := e.leftToOwner(d, now); left {
			wait = min(wait, after)
			continue
		}
		due = append(due, d)
	}
	return due, max(wait, time.Millisecond)
}

// evaluateDue evaluates, one after another, the dirty patients whose data
// has settled (every dirty patient when all is set), as one round of the
// evaluation loop would, without its concurrency.
func (e *Engine) evaluateDue(ctx context.Context, all bool) {
	settle := e.cfg.Settle
	if all {
		settle = 0
	}
	dirty, err := e.cfg.Store.DirtyPatients(ctx)
	if err != nil {
		e.log.ErrorContext(ctx, "listing dirty patients failed", "err", err)
		return
	}
	for _, d := range dirty {
		if e.marks.settled(d, e.now(), e.sharedStore()) < settle {
			continue
		}
		if err := e.evaluatePatient(ctx, d); err != nil {
			e.log.ErrorContext(ctx, "evaluation failed; it stays pending", "err", err)
		}
	}
}

// EvaluateNow evaluates every dirty patient at once, ignoring the settle
// delay, and leaves what the derivations leave out reported (Hooks.Evaluated)
// for every patient. Tests and the submit API use it to get a result
// without waiting.
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
	if err := e.refreshPictures(ctx); err != nil {
		errs = append(errs, err)
	}
	return errors.Join(errs...)
}

// evaluatePatient re-derives one patient and commits what changed. It
// holds the patient's lock, so evaluations of one patient never overlap in
// this process, and on a store shared by replicas its claim on the patient
// (claimPatient), renewed while the evaluation runs (holdClaim), so they
// do not overlap across replicas either; the commit states what it read of every series it writes,
// so an evaluation by another process that committed first makes this one
// fail with a conflict, and the patient is evaluated again from what is
// stored now.
func (e *Engine) evaluatePatient(ctx context.Context, d store.Dirty) error {
	lock, _ := e.evaluating.LoadOrStore(d.Subject, new(sync.Mutex))
	lock.(*sync.Mutex).Lock()
	defer lock.(*sync.Mutex).Unlock()
	d, claimed, err := e.claimPatient(ctx, d)
	if err != nil || !claimed {
		return err
	}
	if e.cfg.Hooks.Evaluation != nil {
		e.cfg.Hooks.Evaluation(d.Urgent)
	}
	evalCtx, stopHolding := e.holdClaim(ctx, d.Subject)
	err = e.evaluateLocked(evalCtx, d)
	if lost := stopHolding(); lost && err != nil && ctx.Err() == nil {
		// Another replica took the patient while this evaluation ran:
		// it was abandoned before its commit, and the patient is that
		// replica's now.
		e.log.InfoContext(ctx, "the claim on the patient was lost during its evaluation; another replica evaluates it", "err", err)
		return nil
	}
	if err != nil {
		e.unclaimPatient(ctx, d.Subject)
	}
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

// gasRange is the blood gases an evaluation of mark d derives again
// (incremental evaluation). The mark says from which blood gas sample time
// results can change (each input's time less how far its kind reaches,
// derive.Config.Reach) and until which (its time plus how far its kind
// reaches the other way, derive.Config.ReachLater): only the blood gases
// sampled in between are derived again, so a late reading does not
// re-derive every blood gas since, and the others keep their ledger
// entries untouched. Heights and patient facts, which reach further,
// leave From zero, and a mark of a store that keeps no end leaves Until
// zero. A patient's first evaluation in this process derives every blood
// gas: a mark written by an earlier build (before a restart, or by a
// replica not yet upgraded) gave the time of the input itself, not of the
// earliest blood gas it reaches.
func (e *Engine) gasRange(d store.Dirty) pipeline.Incremental {
	from, until := d.From, d.Until
	if _, ok := e.evaluatedHere.Load(d.Subject); !ok || from.IsZero() {
		return pipeline.Incremental{}
	}
	return pipeline.Incremental{GasesFrom: from, GasesUntil: until}
}

func (e *Engine) evaluateLocked(ctx context.Context, d store.Dirty) error {
	gases := e.gasRange(d)
	gasesFrom := gases.GasesFrom
	// The fall detector resumes from a state saved by an earlier
	// evaluation when the change comes after it (a change can alter which
	// source is preferred from one pairing window before); then only the
	// inputs those gases and the detector need are read.
	resume := e.fallState(d, gasesFrom)
	inputs, derivesGas, readFrom, err := e.loadEvaluationInputs(ctx, d.Subject, gases, resume, e.keptDetectorInputs(d))
	if err != nil {
		return fmt.Errorf("engine: evaluate: %w", err)
	}
	// The patient's facts are read only for a derivation: the detector
	// does not use them.
	var facts derive.Patient
	if derivesGas {
		if facts, err = e.patientFacts(ctx, d.Subject); err != nil {
			return err
		}
	}
	knownFalls, _ := e.fallSeries.LoadAndDelete(d.Subject)
	ledger, partial, err := e.ledgerFor(ctx, d, gases, knownFalls)
	if err != nil {
		return fmt.Errorf("engine: evaluate: %w", err)
	}
	ids := identities{}
	// What the data leaves out is reported after a complete evaluation
	// only (evaluated), so an incremental one does not work it out.
	inc := gases
	inc.Falls, inc.Recorded, inc.NoOmissions = resume, ids.recorded(ledger), !gasesFrom.IsZero()
	latest, haveLatest := latestEtCO2(inputs)
	if e.keepsFallState() {
		inc.SaveAt = e.fallSaveAt(latest, haveLatest, resume)
	}
	// The saved states are kept only once the evaluation committed; any
	// failure drops them, and the next evaluation runs the detector whole.
	previous, _ := e.fallStates.LoadAndDelete(d.Subject)
	results, omitted, saved, err := pipeline.EvaluateIncremental(e.cfg.Derive, e.cfg.Encoder, d.Subject, facts, inputs, inc)
	if err != nil {
		return fmt.Errorf("engine: evaluate: %w", err)
	}
	change, err := e.diff(ctx, d, results, ledger, gases, partial, ids)
	if err != nil {
		return err
	}
	if err := e.cfg.Store.Commit(ctx, change, e.now()); err != nil {
		return fmt.Errorf("engine: evaluate: %w", err)
	}
	e.evaluatedHere.Store(d.Subject, e.now())
	if e.keepsFallState() {
		e.fallSeries.Store(d.Subject, keptSeries{
			series:  fallsAfter(ledger, change.Entries),
			cleared: [2]uint64{d.Cleared, d.Generation},
		})
	}
	if len(saved) > 0 || resume != nil {
		// On a shared store the commit cleared the mark (the store's
		// Cleared is then its generation) or left it, overtaken by a newer
		// change (then Cleared stays as it was): either way no other
		// evaluation came in between.
		states := e.keptFallStates(previous, resume, saved, latest, haveLatest)
		e.fallStates.Store(d.Subject, keptFall{
			states:   states,
			cleared:  [2]uint64{d.Cleared, d.Generation},
			detector: e.detectorInputsToKeep(inputs, readFrom, states),
		})
	}
	// Only a complete evaluation knows everything the patient's data
	// leaves out; after an incremental one the picture is refreshed apart
	// (omissions.go).
	e.evaluated(d.Subject, omitted, gasesFrom.IsZero())
	for _, en := range change.Entries {
		if e.cfg.Hooks.Emitted != nil {
			e.cfg.Hooks.Emitted(string(codeOf(en)), en.Status)
		}
	}
	if len(change.Writes) > 0 {
		signal(e.flush)
	}
	return nil
}

// identities holds the values of the derivations of one evaluation with
// their identities, by the blood gas's reference: computed once, for the
// pipeline's question (recorded) and for diff.
type identities map[string][]value

// of returns r's values with their identities.
func (ids identities) of(r pipeline.Result) ([]value, error) {
	if r.Derivation != nil {
		if vals, ok := ids[r.Derivation.Gas.Ref]; ok {
			return vals, nil
		}
	}
	vals, err := valuesOf(r)
	if err == nil && r.Derivation != nil {
		ids[r.Derivation.Gas.Ref] = vals
	}
	return vals, err
}

// recorded reports whether every value of a derivation is in the ledger
// as it is (diff leaves such values alone).
func (ids identities) recorded(ledger []store.Entry) func(derive.Derivation) bool {
	bySeries := make(map[string]*store.Entry, len(ledger))
	for i := range ledger {
		bySeries[ledger[i].Series] = &ledger[i]
	}
	return func(d derive.Derivation) bool {
		vals, err := ids.of(pipeline.Result{Derivation: &d})
		if err != nil {
			return false
		}
		for _, v := range vals {
			en, ok := bySeries[v.id.Series]
			if !ok || en.Key != v.id.Key || en.Status == statusWithdrawn {
				return false
			}
		}
		return true
	}
}

// fallCode is how a fall's entry payload names its code.
var fallCode = []byte(`"code":"` + string(derive.CodeEtCO2Drop) + `"`)

// isFall tells a fall's entry from a blood gas's without decoding it.
func isFall(en store.Entry) bool { return bytes.Contains(en.Payload, fallCode) }

func codeOf(en store.Entry) derive.Code {
	var p EntryPayload
	if json.Unmarshal(en.Payload, &p) != nil {
		return ""
	}
	return p.Code
}

// fallSaveLag is at least how far before a patient's latest end-tidal
// reading the fall detector's longer-lived state is saved for later
// evaluations (fallSaveLags adds the widest reach of any kind): a
// change dated later than that (less a pairing window) resumes from it. An
// hour covers readings that arrive late and blood gases that come back
// from the laboratory within the hour; an earlier change runs the detector
// whole. A second state, saved three pairing windows before the latest
// reading, serves the usual case, a new reading at the end of the series,
// so that it reads minutes of data instead of an hour.
const fallSaveLag = time.Hour

// fallSaveLags are the lags the detector's states are saved at, longest
// first (so the times are ascending). The longer one is at least an hour
// and covers the widest reach of any kind beyond that: a dirty mark gives
// the earliest blood gas a change reaches (a correction, or a temperature,
// an hour back), and the detector may resume only from a window before
// it, so a correction at the end of the series still resumes.
func (e *Engine) fallSaveLags() []time.Duration {
	long := max(fallSaveLag, e.cfg.Derive.MaxReach()) + 3*e.cfg.Derive.Window
	return []time.Duration{long, 3 * e.cfg.Derive.Window}
}

// keptFall is what the engine keeps of a patient's fall detector after
// a committed evaluation: its states, ascending, and the store's
// Dirty.Cleared values under which they still hold.
type keptFall struct {
	states []*pipeline.FallState
	// cleared are the mark the evaluation cleared before it (as its own
	// mark said) and its own mark's generation.
	cleared [2]uint64
	// detector is the detector's readings that evaluation read, kept for
	// the next one (nil: none kept).
	detector *detectorInputs
}

// detectorInputs are a patient's stored readings of the detector's kind
// (pipeline.DetectorKind) effective from from on, as an evaluation read
// them, in the order a read of the store gives them. Every change stored
// since then lies at or after the From of the patient's next mark: a
// changed input's mark starts at its effective time less its kind's
// reach (or earlier, or at zero), and a mark left uncleared by a change
// that came during the evaluation keeps the earliest From of the two. So
// the next evaluation that resumes the detector reads from the store only
// from its mark's From on, and takes the readings before it from here:
// a new reading at the end of the series reads minutes of rows, not the
// span back to the state the detector resumes from.
type detectorInputs struct {
	from   time.Time
	inputs []pipeline.Input
}

// before returns a new slice of the kept readings effective in [from,
// until), with room for more after them.
func (k *detectorInputs) before(from, until time.Time, more int) []pipeline.Input {
	lo, _ := slices.BinarySearchFunc(k.inputs, from.UnixMilli(), byMillis)
	hi, _ := slices.BinarySearchFunc(k.inputs, until.UnixMilli(), byMillis)
	out := make([]pipeline.Input, hi-lo, hi-lo+more)
	copy(out, k.inputs[lo:hi])
	return out
}

func wholeMillisecond(t time.Time) bool { return t.Equal(t.Truncate(time.Millisecond)) }

// keptDetectorInputs returns the detector's readings the patient's last
// evaluation kept, while they still hold (as its states do, fallState).
func (e *Engine) keptDetectorInputs(d store.Dirty) *detectorInputs {
	kept, ok := e.keptFallFor(d)
	if !ok {
		return nil
	}
	return kept.detector
}

// keptFallFor returns what the patient's last evaluation kept of the
// detector, while it still holds for mark d (stillHolds).
func (e *Engine) keptFallFor(d store.Dirty) (keptFall, bool) {
	v, ok := e.fallStates.Load(d.Subject)
	if !ok {
		return keptFall{}, false
	}
	kept := v.(keptFall)
	return kept, e.stillHolds(d, kept.cleared)
}

// detectorInputsToKeep keeps, of the inputs an evaluation read from
// readFrom on (every one when it is zero), the detector's readings the
// next evaluation can use: from a pairing window before the latest state
// kept on, where the usual next evaluation, a new reading at the end,
// resumes. A later change that resumes from an earlier state reads the
// store as before.
func (e *Engine) detectorInputsToKeep(inputs []pipeline.Input, readFrom time.Time, states []*pipeline.FallState) *detectorInputs {
	if len(states) == 0 {
		return nil
	}
	from := store.Latest(readFrom, states[len(states)-1].At.Add(-e.cfg.Derive.Window))
	if !wholeMillisecond(from) {
		return nil
	}
	k := &detectorInputs{from: from}
	if !slices.ContainsFunc(inputs, func(in pipeline.Input) bool { return in.Reading.Kind != pipeline.DetectorKind }) {
		// The detector's readings alone, in time order: kept as read
		// (nothing writes to them after the evaluation).
		lo, _ := slices.BinarySearchFunc(inputs, from.UnixMilli(), byMillis)
		k.inputs = inputs[lo:len(inputs):len(inputs)]
		return k
	}
	for _, in := range inputs {
		if in.Reading.Kind == pipeline.DetectorKind && in.Reading.AtMillis >= from.UnixMilli() {
			k.inputs = append(k.inputs, in)
		}
	}
	return k
}

// byMillis compares an input's time with a time in milliseconds.
func byMillis(in pipeline.Input, t int64) int { return cmp.Compare(in.Reading.AtMillis, t) }

// keepsFallState reports whether the engine may keep the fall detector's
// state between evaluations: over a store no other process writes, or
// over a shared one that says, with each mark, whether another replica's
// evaluation came in between (store.Dirty.Cleared; see fallState).
func (e *Engine) keepsFallState() bool {
	if x, ok := e.cfg.Store.(store.Exclusive); ok && x.Exclusive() {
		return true
	}
	return e.sharedStore()
}

// sharedStore reports whether other replicas may evaluate this engine's
// patients.
func (e *Engine) sharedStore() bool {
	_, shared := e.cfg.Store.(store.Replicated)
	return shared
}

// fallState returns the saved detector state an evaluation of d can
// resume from, or nil: none saved, a whole evaluation, or a change before
// them. Of the states saved early enough it takes the latest, unless the
// longer-lived one has fallen more than two lags behind the other: then
// it resumes from that one, once, so it is saved again nearer the end of
// the series and late blood gases keep a state to resume from.
func (e *Engine) fallState(d store.Dirty, gasesFrom time.Time) *pipeline.FallState {
	if gasesFrom.IsZero() || !e.keepsFallState() {
		return nil
	}
	kept, ok := e.keptFallFor(d)
	if !ok {
		return nil
	}
	states := kept.states
	limit := d.From.Add(-e.cfg.Derive.Window)
	var pick *pipeline.FallState
	for _, st := range states { // ascending
		if !st.At.After(limit) {
			pick = st
		}
	}
	if pick != nil && len(states) > 1 && pick != states[0] && pick.At.Sub(states[0].At) > 2*e.fallSaveLags()[0] {
		pick = states[0]
	}
	return pick
}

// keptSeries is what the engine keeps of a patient's ledger after a
// committed evaluation: the series of every fall in it, and the store's
// Dirty.Cleared values under which that still holds (as for keptFall).
type keptSeries struct {
	series  []string
	cleared [2]uint64
}

// ledgerFor reads the ledger entries an evaluation compares its results
// with, and says whether they are only part of the patient's ledger.
//
// A complete evaluation (GasesFrom zero) reads the whole ledger. An
// incremental one derives only the blood gases sampled in its range
// and returns every fall (the detector's findings before its resumed
// state come from the state), so it reads the entries of that range
// and every fall's entry, each by its series, as known kept from the
// patient's earlier evaluations here: the entries of earlier blood gases,
// which diff leaves alone, are not read, and the work stays the same
// however many blood gases the patient's retained history holds. Without
// that knowledge (the patient's first evaluation here, an evaluation that
// failed, or on a shared store another replica's evaluation since) it
// reads the whole ledger.
func (e *Engine) ledgerFor(ctx context.Context, d store.Dirty, gases pipeline.Incremental, known any) ([]store.Entry, bool, error) {
	kept, ok := known.(keptSeries)
	if gases.GasesFrom.IsZero() || !ok || !e.stillHolds(d, kept.cleared) {
		ledger, err := e.cfg.Store.Ledger(ctx, d.Subject)
		return ledger, false, err
	}
	const page = 500
	var ledger []store.Entry
	after := ""
	to := farFuture
	if !gases.GasesUntil.IsZero() {
		to = gases.GasesUntil.Add(time.Nanosecond) // EntriesBetween's end is exclusive
	}
	for {
		got, err := e.cfg.Store.EntriesBetween(ctx, d.Subject, gases.GasesFrom, to, after, page)
		if err != nil {
			return nil, false, err
		}
		ledger = append(ledger, got...)
		if len(got) < page {
			break
		}
		after = got[len(got)-1].Series
	}
	read := make(map[string]bool, len(ledger))
	for _, en := range ledger {
		read[en.Series] = true
	}
	for _, series := range kept.series {
		if read[series] {
			continue
		}
		en, err := e.cfg.Store.Entry(ctx, series)
		switch {
		case errors.Is(err, store.ErrNotFound):
			continue // pruned
		case err != nil:
			return nil, false, err
		case en.Subject != d.Subject:
			continue // not this patient's fall (a fall is never re-filed)
		}
		ledger = append(ledger, en)
	}
	return ledger, true, nil
}

// fallsAfter lists the series of every fall in a patient's ledger after a
// committed change: those in the ledger the evaluation read (ledgerFor
// reads every fall still stored) and the change's own. A fall pruned since
// is no longer listed.
func fallsAfter(ledger, written []store.Entry) []string {
	var series []string
	seen := map[string]bool{}
	add := func(s string) {
		if !seen[s] {
			seen[s] = true
			series = append(series, s)
		}
	}
	for _, en := range ledger {
		if isFall(en) {
			add(en.Series)
		}
	}
	for _, en := range written {
		if isFall(en) {
			add(en.Series)
		}
	}
	return series
}

// stillHolds reports whether what the engine kept after a patient's
// evaluation, under the store clears cleared (keptFall, keptSeries), holds
// for the evaluation of mark d: always over a store no other process
// writes; on a shared one only while d names one of them. Otherwise
// another replica evaluated the patient since: the changes it cleared are
// in no mark this replica will see, and may come before what was kept.
func (e *Engine) stillHolds(d store.Dirty, cleared [2]uint64) bool {
	return !e.sharedStore() || d.Cleared == cleared[0] || d.Cleared == cleared[1]
}

// latestEtCO2 returns the time of the latest end-tidal reading in inputs.
func latestEtCO2(inputs []pipeline.Input) (time.Time, bool) {
	latest := int64(math.MinInt64)
	for _, in := range inputs {
		if in.Reading.Kind == derive.KindEtCO2 {
			latest = max(latest, in.Reading.AtMillis)
		}
	}
	if latest == math.MinInt64 {
		return time.Time{}, false
	}
	return time.UnixMilli(latest).UTC(), true
}

// fallSaveAt is when to save the detector's states: each lag before the
// latest end-tidal reading (the pipeline moves a time before the state
// resumed from up to it). A lag whose time is before the resumed state
// (which is kept, and would only be copied) or less than a pairing window
// after it is left out: the next evaluation reads at most a window more,
// and the detector is not copied after every reading. With no end-tidal reading yet, the
// empty state is saved at the epoch, so the next evaluation resumes from
// it.
func (e *Engine) fallSaveAt(latest time.Time, ok bool, resume *pipeline.FallState) []time.Time {
	if !ok {
		return []time.Time{time.UnixMilli(0).UTC()}
	}
	var at []time.Time
	for _, lag := range e.fallSaveLags() {
		target := latest.Add(-lag)
		if resume != nil && target.Sub(resume.At) < e.cfg.Derive.Window {
			continue
		}
		at = append(at, target)
	}
	return at
}

// keptFallStates chooses the states to keep after an evaluation: for each
// lag, the latest state saved at or before it, from the states just saved
// and those kept from before the state this evaluation resumed from (the
// change came after them, so they still hold).
func (e *Engine) keptFallStates(previous any, resume *pipeline.FallState, saved []*pipeline.FallState, latest time.Time, haveLatest bool) []*pipeline.FallState {
	var candidates []*pipeline.FallState
	if prev, ok := previous.(keptFall); ok && resume != nil {
		for _, st := range prev.states {
			if !st.At.After(resume.At) {
				candidates = append(candidates, st)
			}
		}
	}
	candidates = append(candidates, saved...)
	slices.SortStableFunc(candidates, func(a, b *pipeline.FallState) int { return a.At.Compare(b.At) })
	if !haveLatest {
		return candidates[len(candidates)-1:]
	}
	var kept []*pipeline.FallState
	for _, lag := range e.fallSaveLags() {
		target := latest.Add(-lag)
		var pick *pipeline.FallState
		for _, st := range candidates {
			if !st.At.After(target) {
				pick = st
			}
		}
		if pick == nil {
			pick = candidates[0]
		}
		if len(kept) == 0 || kept[len(kept)-1] != pick {
			kept = append(kept, pick)
		}
	}
	return kept
}

// loadEvaluationInputs reads what an evaluation of the blood gases
// sampled from gasesFrom on, with the detector resumed from resume, needs,
// and says whether a blood gas is among what it derives (then it needs the
// patient's facts) and from when the inputs it returns are all the stored
// ones (zero: every one): every input when the detector runs whole;
// otherwise the inputs from gasesFrom (or the pairing window before the
// resumed state) on, and, when a blood gas is among them, from the start of
// the earliest one's dependency span (an hour for its temperature). A new
// device reading far from any blood gas thus reads minutes of data, not
// hours, and of those only the end-tidal readings the detector reads
// (pipeline.DetectorKind). With the detector's readings the patient's
// last evaluation kept (kept, nil for none), those before gasesFrom come
// from there and the store is read from gasesFrom on only.
func (e *Engine) loadEvaluationInputs(ctx context.Context, subject string, gases pipeline.Incremental, resume *pipeline.FallState, kept *detectorInputs) ([]pipeline.Input, bool, time.Time, error) {
	if resume == nil {
		inputs, err := e.loadInputs(ctx, subject)
		return inputs, true, time.Time{}, err
	}
	readFrom := store.Earliest(gases.GasesFrom, resume.At.Add(-e.cfg.Derive.Window))
	// No blood gas before gasesFrom is derived, so a scan from there finds
	// the same earliest one as a scan from readFrom. Readings are timed to
	// the millisecond, and so is the boundary, so each is on one side of
	// it only.
	useKept := kept != nil && !kept.from.After(readFrom) && gases.GasesFrom.After(readFrom) &&
		wholeMillisecond(gases.GasesFrom) && wholeMillisecond(readFrom)
	scanFrom := readFrom
	if useKept {
		scanFrom = gases.GasesFrom
	}
	inputs, earliestGas, err := e.loadDetectorInputs(ctx, subject, scanFrom, gases)
	if err != nil {
		return nil, false, time.Time{}, err
	}
	if earliestGas == math.MaxInt64 {
		if useKept {
			inputs = append(kept.before(readFrom, scanFrom, len(inputs)), inputs...)
		}
		return inputs, false, readFrom, nil
	}
	spanFrom, _ := e.cfg.Derive.DependencySpan(time.UnixMilli(earliestGas).UTC())
	from := store.Earliest(readFrom, spanFrom)
	inputs, err = e.loadInputsFrom(ctx, subject, from)
	return inputs, true, from, err
}

// loadDetectorInputs reads the patient's stored inputs effective from
// from on and returns those of the detector's kind, unless a blood gas the
// evaluation of the blood gases sampled from gasesFrom on derives
// (pipeline.Incremental.Derives) is among them: then it returns the sample
// time of the earliest blood gas sampled from gasesFrom's millisecond on
// (math.MaxInt64 when there is none), from whose dependency span on every
// kind is needed. An evaluation that derives no blood gas gives the
// detector's findings alone, which depend on nothing else
// (pipeline.DetectorKind). Every input's head is checked, as
// loadInputsFrom checks it, but only the detector's readings are decoded.
func (e *Engine) loadDetectorInputs(ctx context.Context, subject string, from time.Time, inc pipeline.Incremental) ([]pipeline.Input, int64, error) {
	var inputs []pipeline.Input
	var hr headReader
	derives, earliestGas := false, int64(math.MaxInt64)
	err := e.scanInputs(ctx, subject, from, func(row store.InputRow) error {
		l, err := parseHead(row.Payload)
		if err != nil {
			return fmt.Errorf("stored input %s: %w", row.Logical, err)
		}
		if headItemType(row.Payload) != decode.ItemReading {
			return nil // a version that withdraws or invalidates an earlier one
		}
		at, detected := headAtMillis(row.Payload), false
		for i := -1; i < l.nAlso; i++ {
			k := headKind(row.Payload)
			if i >= 0 {
				k = l.alsoKind(row.Payload, i)
			}
			if inc.Derives(derive.Reading{Kind: k, AtMillis: at}) {
				derives = true
				earliestGas = min(earliestGas, at)
			}
			detected = detected || k == pipeline.DetectorKind
		}
		if derives || !detected {
			return nil // every kind will be read again
		}
		h, _, err := hr.decode(row.Payload, func() string { return versionedRef(row.Logical, row.VersionID) })
		if err != nil {
			return fmt.Errorf("stored input %s: %w", row.Logical, err)
		}
		if h.Reading.Kind == pipeline.DetectorKind {
			inputs = append(inputs, pipeline.Input{Reading: h.Reading, Priority: h.Priority})
		}
		for _, a := range h.Also {
			if a.Kind == pipeline.DetectorKind {
				p := a.Priority
				a.Priority = 0
				inputs = append(inputs, pipeline.Input{Reading: a, Priority: int(p)})
			}
		}
		return nil
	})
	if err != nil {
		return nil, 0, err
	}
	if derives {
		return nil, earliestGas, nil
	}
	return inputs, math.MaxInt64, nil
}

// loadInputs returns a patient's stored readings as pairing takes them.
func (e *Engine) loadInputs(ctx context.Context, subject string) ([]pipeline.Input, error) {
	return e.loadInputsFrom(ctx, subject, time.Time{})
}

// loadInputsFrom returns a patient's stored readings effective from from
// on (every one when from is zero). Only the binary head of each is
// decoded; the rest of the stored item (original value, conversion) is for
// explanations.
func (e *Engine) loadInputsFrom(ctx context.Context, subject string, from time.Time) ([]pipeline.Input, error) {
	var inputs []pipeline.Input
	var hr headReader
	err := e.scanInputs(ctx, subject, from, func(row store.InputRow) error {
		h, _, err := hr.decode(row.Payload, func() string { return versionedRef(row.Logical, row.VersionID) })
		if err != nil {
			return fmt.Errorf("stored input %s: %w", row.Logical, err)
		}
		if h.Type != decode.ItemReading {
			return nil // a version that withdraws or invalidates an earlier one
		}
		inputs = h.appendInputs(inputs)
		return nil
	})
	if err != nil {
		return nil, err
	}
	return inputs, nil
}

// scanInputs calls fn with each of the patient's stored inputs effective
// from from on (every one when from is zero), in the store's order: in
// place over a store that can show them so (store.InputScanner), which
// copies nothing, otherwise as InputsFrom returns them.
func (e *Engine) scanInputs(ctx context.Context, subject string, from time.Time, fn func(store.InputRow) error) error {
	if sc, ok := e.cfg.Store.(store.InputScanner); ok {
		return sc.ScanInputsFrom(ctx, subject, from, fn)
	}
	var stored []store.Input
	var err error
	if from.IsZero() {
		stored, err = e.cfg.Store.Inputs(ctx, subject)
	} else {
		stored, err = e.cfg.Store.InputsFrom(ctx, subject, from)
	}
	if err != nil {
		return err
	}
	for _, in := range stored {
		if err := fn(store.InputRow{Logical: []byte(in.Logical), VersionID: []byte(in.VersionID), Payload: in.Payload}); err != nil {
			return err
		}
	}
	return nil
}

// versionedRef is fhirref.Versioned of a stored row's logical reference
// and version, built in one allocation.
func versionedRef(logical, version []byte) string {
	if len(version) == 0 {
		return string(logical)
	}
	var b strings.Builder
	b.Grow(len(logical) + len("/_history/") + len(version))
	b.Write(logical)
	b.WriteString("/_history/")
	b.Write(version)
	return b.String()
}

// value is one derived value of a result with its identity.
type value struct {
	code derive.Code
	id   encode.Identity
}

// valuesOf lists the values a result gives, with their identities,
// computed without encoding any resource.
func valuesOf(r pipeline.Result) ([]value, error) {
	if r.Fall != nil {
		id, err := encode.FallIdentity(r.Subject, *r.Fall)
		if err != nil {
			return nil, fmt.Errorf("engine: fall identity: %w", err)
		}
		return []value{{derive.CodeEtCO2Drop, id}}, nil
	}
	out := make([]value, 0, len(r.Derivation.Values))
	for _, v := range r.Derivation.Values {
		id, err := encode.ValueIdentity(*r.Derivation, v)
		if err != nil {
			return nil, fmt.Errorf("engine: value identity: %w", err)
		}
		out = append(out, value{v.Code, id})
	}
	return out, nil
}

// diff compares fresh results with the ledger and decides the entries to
// record and the writes to queue.
//
// With gases.GasesFrom set, results holds only the blood gases sampled in
// gases' range (and every fall): entries of other blood gases are left
// alone.
func (e *Engine) diff(ctx context.Context, d store.Dirty, results []pipeline.Result, ledger []store.Entry, gases pipeline.Incremental, partial bool, ids identities) (store.Change, error) {
	now := e.now()
	frozen := now.Add(-(e.cfg.Retention - e.cfg.Freeze))
	bySeries := make(map[string]store.Entry, len(ledger))
	for _, en := range ledger {
		bySeries[en.Series] = en
	}
	change := store.Change{Subject: d.Subject, Generation: d.Generation, Expect: make(map[string]store.Expect)}
	produced := make(map[string]bool)
	for _, r := range results {
		vals, err := ids.of(r)
		if err != nil {
			return store.Change{}, err
		}
		var fresh, changed []value
		for _, v := range vals {
			series, key := v.id.Series, v.id.Key
			produced[series] = true
			prev, ok := bySeries[series]
			if !ok && !r.Time().Before(frozen) {
				// The series may be filed under another patient: its blood
				// gas was corrected to name this one. Then the Observation
				// on the server is updated, not created again, so the
				// wrong patient keeps nothing.
				other, err := e.cfg.Store.Entry(ctx, series)
				switch {
				case errors.Is(err, store.ErrNotFound):
					fresh = append(fresh, v)
					continue
				case err != nil:
					return store.Change{}, fmt.Errorf("engine: %w", err)
				case other.Subject != d.Subject:
					bySeries[series] = other
					changed = append(changed, v)
					continue
				case !partial:
					// Not re-filed: another evaluation of this patient (on
					// another replica) committed it since the ledger was
					// read. Evaluate again from what is stored now, rather
					// than amend a value that did not change.
					return store.Change{}, store.ErrConflict
				}
				// Stored outside the part of the ledger read (its effective
				// time outside the range): compared with the stored entry as
				// with one read, and the commit's expectation still guards
				// it.
				prev, ok = other, true
				bySeries[series] = other
			}
			switch {
			case r.Time().Before(frozen):
				// Too old to touch: its inputs may already be pruned.
			case prev.Key == key && prev.Status != statusWithdrawn:
				// Already recorded as it is.
			default:
				changed = append(changed, v)
			}
		}
		if len(fresh)+len(changed) == 0 {
			continue
		}
		res, err := storedResult(r, resultID(r, vals))
		if err != nil {
			return store.Change{}, err
		}
		change.Results = append(change.Results, res)
		if err := e.record(&change, r, res, fresh, encode.WriteCreate, statusFinal, bySeries, now); err != nil {
			return store.Change{}, err
		}
		if err := e.record(&change, r, res, changed, encode.WriteRevise, statusAmended, bySeries, now); err != nil {
			return store.Change{}, err
		}
	}
	for _, en := range ledger {
		if produced[en.Series] || en.Status == statusWithdrawn || en.EffectiveAt.Before(frozen) {
			continue
		}
		if !gases.DerivesAt(en.EffectiveAt) && !isFall(en) {
			continue // a blood gas this evaluation did not derive again
		}
		if err := e.withdraw(ctx, &change, en, now); err != nil {
			return store.Change{}, err
		}
	}
	return change, nil
}

// record adds ledger entries for vals and, when a server is configured,
// the write that carries them.
func (e *Engine) record(change *store.Change, r pipeline.Result, res store.Result, vals []value, kind, status string, bySeries map[string]store.Entry, now time.Time) error {
	if len(vals) == 0 {
		return nil
	}
	w := encode.Write{Kind: kind, Subject: r.Subject, Derivation: r.Derivation, Fall: r.Fall}
	for _, v := range vals {
		series := v.id.Series
		payload, err := json.Marshal(EntryPayload{Code: v.code, Result: res.ID, Version: res.Version})
		if err != nil {
			return fmt.Errorf("engine: encode entry: %w", err)
		}
		en := store.Entry{
			Series: series, Subject: r.Subject, Key: v.id.Key, Status: status,
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
		w.Series = append(w.Series, series)
	}
	return e.queue(change, w)
}

// withdraw marks a ledger entry entered-in-error: the inputs that supported
// it were withdrawn or no longer support it.
func (e *Engine) withdraw(ctx context.Context, change *store.Change, en store.Entry, now time.Time) error {
	var p EntryPayload
	if err := json.Unmarshal(en.Payload, &p); err != nil {
		return fmt.Errorf("engine: ledger entry: %w", err)
	}
	p.Why = "an input it was derived from was withdrawn or no longer supports it"
	payload, err := json.Marshal(p)
	if err != nil {
		return fmt.Errorf("engine: encode entry: %w", err)
	}
	if err := e.loadResult(ctx, &p); err != nil {
		return err
	}
	change.Expect[en.Series] = store.Expect{Key: en.Key, Status: en.Status}
	out := en
	out.ServerID, out.ServerVersion = "", "" // the store keeps the current ones
	out.Status = statusWithdrawn
	out.UpdatedAt = now
	out.Payload = payload
	change.Entries = append(change.Entries, out)
	return e.queue(change, encode.Write{
		Kind: encode.WriteWithdraw, Subject: en.Subject, Derivation: p.Derivation, Fall: p.Fall,
		Series: []string{en.Series}, Why: p.Why,
	})
}

// queue adds the typed write to the change's outbox records.
func (e *Engine) queue(change *store.Change, w encode.Write) error {
	if e.cfg.Client == nil {
		return nil
	}
	raw, err := json.Marshal(w)
	if err != nil {
		return fmt.Errorf("engine: encode write: %w", err)
	}
	change.Writes = append(change.Writes, store.Write{Series: w.Series, Subject: w.Subject, Body: raw})
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
