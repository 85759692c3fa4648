// Package engine is the live service's core. Every input mode (subscription
// notifications, classic rest-hooks, polling, the gRPC submit call) hands it
// FHIR resources; it stores them durably, re-evaluates the patients they
// belong to once their data has settled, records each derived value in a
// ledger, and queues what must be written back to the FHIR server in an
// outbox that a writer drains with retries. Corrections are carried
// through: an amended input re-derives and updates the derived Observation,
// an entered-in-error one withdraws it.
//
// Exactly once, end to end: inputs are idempotent by (id, version); each
// derived value has a series identity that survives re-derivation and a key
// that changes with any input version, so the ledger knows whether a result
// is new, changed or already written; and every write is a transaction of
// conditional creates keyed on those identifiers, so a write repeated after
// a crash or a lost response leaves one copy on the server.
package engine

import (
	"context"
	"encoding/json"
	"errors"
	"fmt"
	"log/slog"
	"slices"
	"sync"
	"time"

	"github.com/deadspace-fhir/deadspace/api/pipeline"
	"github.com/deadspace-fhir/deadspace/api/store"
	"github.com/deadspace-fhir/deadspace/derive"
	"github.com/deadspace-fhir/deadspace/fhir/client"
	"github.com/deadspace-fhir/deadspace/fhir/decode"
	"github.com/deadspace-fhir/deadspace/fhir/encode"
	"github.com/deadspace-fhir/deadspace/fhir/notify"
	fhirref "github.com/deadspace-fhir/deadspace/fhir/ref"
)

// ErrInvalid marks input the engine refuses as a whole; callers answer it
// as a client error.
var ErrInvalid = errors.New("invalid input")

// Hooks let the caller count what the engine does without the engine
// knowing how it is exported. Any nil field is skipped.
type Hooks struct {
	Received func(mode, resourceType string)
	// LeftOut is told of every input left out as it arrives: refused by
	// the decoder, not recognised, or a version superseded by another.
	LeftOut func(reason derive.Reason)
	// Evaluated is told everything a patient's stored data leaves out:
	// inputs (Code empty) and values not emitted. A complete evaluation
	// tells it once committed; after an incremental one, which derives only
	// part of the patient, a complete re-derivation that commits nothing
	// tells it, off the evaluation path and at most once per patient per
	// refresh round ([Engine.EvaluateNow] returns only after it). Together
	// with LeftOut it is replay's summary.
	Evaluated func(subject string, omitted []derive.Omission)
	// Evaluation is told of every patient evaluation begun, and whether
	// the new data it evaluates holds a blood gas (or only device readings
	// and patient facts, which the device pace holds back).
	Evaluation  func(bloodGas bool)
	Emitted     func(code string, status string)
	Gap         func()
	CatchUp     func(trigger string)
	DeadLetter  func()
	WriteResult func(outcome string)
	// WritesStopped is told when the writer stops sending (true: the
	// software Device cannot be resolved on the server) and when it
	// resumes (false).
	WritesStopped func(stopped bool)
}

// Config configures an Engine.
type Config struct {
	Store   store.Store
	Decoder *decode.Decoder
	Encoder *encode.Encoder
	Derive  derive.Config
	// Client is the FHIR server; nil runs standalone: results stay in the
	// store and nothing is written back.
	Client *client.Client
	// Settle is how long a patient's new data waits before it is derived,
	// so readings that arrive just after a blood gas are included.
	Settle time.Duration
	// DevicePace is the shortest time between two evaluations of one
	// patient whose new data holds no blood gas (device readings only):
	// a patient monitored reading by reading is evaluated once for all the
	// readings of a pace, not once per reading, and a flood of them leaves
	// the cores to ingest and to blood gases, which are evaluated at once.
	// Zero evaluates every change as soon as it settled.
	DevicePace time.Duration
	// Retention is how long inputs are kept, measured back from now by
	// their effective time. Results older than Retention minus Freeze are
	// never re-derived or withdrawn, so pruning cannot rewrite history.
	Retention time.Duration
	Freeze    time.Duration
	// HistoryRetention is how long the ledger (with earlier versions of
	// each value and the results they came from) and the derivation feed
	// are kept, by the value's physiological time and the event's time;
	// DefaultHistoryRetention when zero, never shorter than Retention.
	HistoryRetention time.Duration
	// DeadLetterRetention is how long dead letters are kept after burial;
	// DefaultDeadLetterRetention when zero.
	DeadLetterRetention time.Duration
	// PollInterval is how often to search the server for changes; zero
	// means only on gaps, empty rest-hooks and at start.
	PollInterval time.Duration
	// Overlap is subtracted from the polling cursor to cover clock skew and
	// late commits.
	Overlap time.Duration
	// HeartbeatTimeout triggers a catch-up when no notification arrived for
	// that long; zero disables it.
	HeartbeatTimeout time.Duration
	// FetchBudget is how long the reads of an id-only notification
	// (Fetch) may take while its sender waits for the answer, retries and
	// Retry-After waits included; a read that does not fit is deferred
	// (ReadDeferred). DefaultFetchBudget when zero, at most MaxFetchBudget.
	FetchBudget time.Duration
	// GapGrace is how long events that a notification skipped over may take
	// to arrive before a catch-up search looks for them (notifications sent
	// at once over several connections arrive out of order).
	// DefaultGapGrace when zero.
	GapGrace time.Duration
	// JobLease is how long one replica keeps the right to poll, catch up
	// and register the subscription, and its claim on a patient it is
	// evaluating, when the store is shared by replicas (store.Replicated):
	// another replica takes these over within about this long after the
	// holder died. DefaultJobLease when zero.
	JobLease time.Duration
	// OwnerGrace is how long, on a store shared by replicas, a dirty
	// patient whose last evaluation another replica committed is left to
	// that replica (store.Dirty.EvaluatedElsewhere), counted from when the
	// patient became dirty: it holds the patient's fall detector state and
	// falls, and goes on from them where this replica would run the
	// detector over the whole series and read the whole ledger. After it,
	// any replica takes the patient, so one that is stalled delays its
	// patients' evaluations by about this long; one that stopped hands them
	// over at once, and one that died once its word that it runs lapses,
	// which it renews four times a grace. DefaultOwnerGrace when zero.
	OwnerGrace time.Duration
	// Register, when set, is run by the replica that polls each time it
	// takes the jobs over (once at start with a store of one replica): it
	// creates or re-activates the rest-hook Subscription.
	Register func(ctx context.Context) error
	// SearchCodes are the "system|code" tokens polling searches for.
	SearchCodes []string
	// MaxTransactionEntries caps the entries of one transaction; zero means
	// DefaultMaxTransactionEntries.
	MaxTransactionEntries int
	// ProvenanceTagSystem tags each Provenance so a repeated write can be
	// made conditional on it (R4 Provenance has no identifier).
	ProvenanceTagSystem string
	Logger              *slog.Logger
	Now                 func() time.Time
	Hooks               Hooks
}

// Default retentions of what the service keeps of its own past.
const (
	DefaultHistoryRetention    = 7 * 24 * time.Hour
	DefaultDeadLetterRetention = 30 * 24 * time.Hour
)

// DefaultProvenanceTagSystem is the system of the tag that makes a
// Provenance write conditional.
const DefaultProvenanceTagSystem = "https://deadspace-fhir.github.io/fhir/sid/provenance"

// DefaultMaxTransactionEntries is the largest transaction Medplum accepts
// when entries are conditional (it needs strict isolation for them); other
// servers allow more, and --fhir-max-transaction-entries raises it.
const DefaultMaxTransactionEntries = 8

// DefaultDevicePace is the device pace (Config.DevicePace) of deadspace
// serve: a fall in end-tidal CO2 is warned of at most about a second
// later than at once, and a patient monitored at one reading a second or
// faster is evaluated about once a second.
const DefaultDevicePace = time.Second

// MaxDevicePace is the longest device pace accepted: a longer one would
// hold back the warnings of a falling end-tidal CO2.
const MaxDevicePace = time.Minute

// Engine is safe for concurrent use.
type Engine struct {
	cfg  Config
	log  *slog.Logger
	now  func() time.Time
	wake chan struct{} // evaluation wanted
	// wakeDevice: new device readings only, which the evaluation loop
	// lists at most every tenth of the device pace.
	wakeDevice chan struct{}
	flush      chan struct{} // outbox has writes
	catch      chan string   // catch-up wanted, with the trigger

	// evaluating holds one lock per patient being evaluated: evaluations
	// of one patient never overlap in this process (the claim on a shared
	// store, and the compare-and-swap commit, cover other replicas).
	evaluating sync.Map // subject → *sync.Mutex
	// evaluators is how many patients the evaluation loop evaluates at
	// once.
	evaluators int
	// fallStates holds each patient's fall detector states as of its last
	// committed evaluation in this process (subject → keptFall).
	fallStates sync.Map
	// fallSeries holds, for each patient evaluated here, the series of
	// every fall in its ledger as of its last committed evaluation
	// (subject → keptSeries), so an incremental evaluation reads only the
	// entries it can change (see ledgerFor).
	fallSeries sync.Map
	// evaluatedHere holds the patients evaluated and committed in this
	// process, with the time of the last such evaluation (subject →
	// time.Time): a patient's first evaluation derives every blood gas,
	// whatever its dirty mark says (see evaluateLocked). A patient with
	// no evaluation within the retention is forgotten here, with its
	// fallStates and fallSeries (forgetIdle).
	evaluatedHere sync.Map
	// missing holds the subscription events skipped over and not arrived
	// yet.
	missing missingEvents
	// readsDeferred is the catch-up search owed to reads given up within
	// the fetch budget (fetchbudget.go).
	readsDeferred deferredCatchUp
	// noFacts holds the patients whose Patient read the server refused
	// for good, for a while (fetchPatient).
	noFacts factsUnavailable
	// retries and marks keep the outbox's and the dirty marks' waits by
	// the monotonic clock too (clocksteps.go).
	retries retryDue
	marks   marksSeen
	// withdrawn are the patients whose next evaluation does not wait
	// for the settle delay (withdrawals.go).
	withdrawn withdrawals
	// probe is readiness's last write to the store (StoreWrites).
	probe writeProbe

	pictures *pictures // what the derivations leave out, kept complete

	mu            sync.Mutex
	lastNotified  time.Time // by the monotonic clock (notifiedAt)
	handshakes    handshakesSeen
	outboxBlocked time.Time    // when the head write last failed, for readiness
	deviceRef     string       // the server's "Device/<id>" of the software Device
	writesStopped string       // why no write is sent, empty while they are
	deviceCheckAt inMemoryWait // while writes are stopped, when the Device is looked for again
}

// New checks the configuration and returns an Engine. Nothing runs until
// [Engine.Run].
func New(cfg Config) (*Engine, error) {
	var errs []error
	if cfg.Store == nil {
		errs = append(errs, errors.New("engine: a store is required"))
	}
	if cfg.Decoder == nil {
		errs = append(errs, errors.New("engine: a decoder is required"))
	}
	if cfg.Encoder == nil {
		errs = append(errs, errors.New("engine: an encoder is required"))
	}
	if err := cfg.Derive.Validate(); err != nil {
		errs = append(errs, fmt.Errorf("engine: %w", err))
	}
	if cfg.Settle < 0 {
		errs = append(errs, fmt.Errorf("engine: settle delay must not be negative, got %v", cfg.Settle))
	}
	if cfg.DevicePace < 0 || cfg.DevicePace > MaxDevicePace {
		errs = append(errs, fmt.Errorf("engine: device pace must be between 0s and %v, got %v", MaxDevicePace, cfg.DevicePace))
	}
	if cfg.Retention <= 0 {
		cfg.Retention = 24 * time.Hour
	}
	if cfg.Freeze <= 0 {
		cfg.Freeze = time.Hour
	}
	if need := cfg.Derive.Window + cfg.Derive.Fall.Baseline + cfg.Derive.Fall.Sustain; cfg.Freeze < need {
		errs = append(errs, fmt.Errorf("engine: the freeze margin (%v) must cover the pairing window and the fall look-back (%v), or pruning could change results", cfg.Freeze, need))
	}
	if cfg.Freeze >= cfg.Retention {
		errs = append(errs, fmt.Errorf("engine: retention (%v) must be longer than the freeze margin (%v)", cfg.Retention, cfg.Freeze))
	}
	if cfg.HistoryRetention <= 0 {
		cfg.HistoryRetention = DefaultHistoryRetention
	}
	cfg.HistoryRetention = max(cfg.HistoryRetention, cfg.Retention)
	if cfg.DeadLetterRetention <= 0 {
		cfg.DeadLetterRetention = DefaultDeadLetterRetention
	}
	if cfg.Overlap <= 0 {
		cfg.Overlap = 5 * time.Minute
	}
	if cfg.JobLease <= 0 {
		cfg.JobLease = DefaultJobLease
	}
	if cfg.OwnerGrace < 0 {
		errs = append(errs, fmt.Errorf("engine: owner grace must not be negative, got %v", cfg.OwnerGrace))
	}
	if cfg.OwnerGrace == 0 {
		cfg.OwnerGrace = DefaultOwnerGrace
	}
	if cfg.FetchBudget < 0 || cfg.FetchBudget > MaxFetchBudget {
		errs = append(errs, fmt.Errorf("engine: fetch budget must be between 0s and %v, got %v", MaxFetchBudget, cfg.FetchBudget))
	}
	if cfg.FetchBudget == 0 {
		cfg.FetchBudget = DefaultFetchBudget
	}
	if cfg.GapGrace < 0 {
		errs = append(errs, fmt.Errorf("engine: gap grace must not be negative, got %v", cfg.GapGrace))
	}
	if cfg.GapGrace == 0 {
		cfg.GapGrace = DefaultGapGrace
	}
	if cfg.ProvenanceTagSystem == "" {
		cfg.ProvenanceTagSystem = DefaultProvenanceTagSystem
	}
	if err := errors.Join(errs...); err != nil {
		return nil, err
	}
	if cfg.Logger == nil {
		cfg.Logger = slog.New(slog.DiscardHandler)
	}
	if cfg.Now == nil {
		cfg.Now = time.Now
	}
	return &Engine{
		cfg: cfg, log: cfg.Logger, now: cfg.Now, evaluators: defaultEvaluators,
		wake: make(chan struct{}, 1), wakeDevice: make(chan struct{}, 1), flush: make(chan struct{}, 1), catch: make(chan string, 1),
		pictures: newPictures(),
	}, nil
}

func signal(ch chan struct{}) {
	select {
	case ch <- struct{}{}:
	default:
	}
}

// RequestCatchUp asks for a search of the server from the cursor. It does
// not block; requests made while one is pending merge.
func (e *Engine) RequestCatchUp(trigger string) {
	if e.cfg.Client == nil {
		return
	}
	select {
	case e.catch <- trigger:
	default:
	}
}

// Rejection is one resource that was not taken, with the reason.
type Rejection struct {
	Index  int
	Reason derive.Reason
	Detail string
}

// Receipt says what an ingest took.
type Receipt struct {
	Accepted int
	// Ignored counts resources this service has no use for.
	Ignored  int
	Rejected []Rejection
}

// Ingest decodes resources, stores the usable ones and every unusable
// version that names its resource and patient (it hides the versions it
// supersedes, whenever they arrive), and marks the patients whose results
// can change for evaluation. It returns after the store has made them
// durable.
func (e *Engine) Ingest(ctx context.Context, mode string, resources []json.RawMessage) (Receipt, error) {
	rec, inputs, err := e.decodeInputs(ctx, mode, resources)
	if err != nil || len(inputs) == 0 {
		return rec, err
	}
	res, err := e.cfg.Store.PutInputs(ctx, inputs, e.now())
	if err != nil {
		return Receipt{}, fmt.Errorf("engine: ingest: %w", err)
	}
	e.stored(inputs, res)
	return rec, nil
}

// IngestNotified is Ingest followed by Notified, for a notification that
// carries its resources, with both stored in one step where the store can
// (one commit, so one fsync per notification instead of two). The
// counters are never recorded ahead of the content.
func (e *Engine) IngestNotified(ctx context.Context, mode string, resources []json.RawMessage, n notify.Notification) (Receipt, error) {
	lowest, highest := eventRange(n)
	if n.Subscription == "" || highest == 0 {
		rec, err := e.Ingest(ctx, mode, resources)
		if err != nil {
			return Receipt{}, err
		}
		return rec, e.Notified(ctx, n)
	}
	rec, inputs, err := e.decodeInputs(ctx, mode, resources)
	if err != nil {
		return Receipt{}, err
	}
	if len(inputs) == 0 {
		return rec, e.Notified(ctx, n)
	}
	res, previous, err := e.cfg.Store.PutNotified(ctx, inputs, e.now(), n.Subscription, highest)
	if err != nil {
		return Receipt{}, fmt.Errorf("engine: ingest: %w", err)
	}
	e.stored(inputs, res)
	e.notifiedAt()
	e.noteEvents(ctx, n.Subscription, lowest, highest, previous)
	return rec, nil
}

// decodeInputs decodes resources, stores patients (each in its own
// transaction) and returns the inputs to store with what the receipt says
// of every resource.
func (e *Engine) decodeInputs(ctx context.Context, mode string, resources []json.RawMessage) (Receipt, []store.Input, error) {
	var rec Receipt
	var inputs []store.Input
	// The logical references of inputs, for re-coded versions of resources
	// this call holds (batch are those in inBatch, in order).
	var batch []string
	inBatch := map[string]bool{}
	// Observations with no code this service uses, each perhaps a re-coded
	// version of a resource this call or the store holds: decided after
	// the loop, with one question to the store for them all.
	type unrelated struct {
		index  int
		raw    []byte
		id     string
		before bool // a version of its resource is among the inputs before it
	}
	var maybeRecoded []unrelated
	now := e.now()
	for i, raw := range resources {
		it, err := e.cfg.Decoder.Decode(raw)
		if err != nil {
			rec.Rejected = append(rec.Rejected, Rejection{i, derive.ReasonMalformed, err.Error()})
			e.leftOut(derive.ReasonMalformed)
			continue
		}
		e.received(mode, it.ResourceType)
		switch it.Type {
		case decode.ItemUnrelated:
			if it.ResourceType == "Observation" && it.ID != "" {
				for _, in := range inputs[len(batch):] {
					batch = append(batch, in.Logical)
					inBatch[in.Logical] = true
				}
				maybeRecoded = append(maybeRecoded, unrelated{i, raw, it.ID, inBatch["Observation/"+it.ID]})
				continue
			}
			rec.Ignored++
			if it.ResourceType == "Observation" {
				e.leftOut(derive.ReasonUnrecognised)
			}
		case decode.ItemPatient:
			if err := e.putPatient(ctx, it, now, time.Time{}); err != nil {
				return Receipt{}, nil, err
			}
			rec.Accepted++
		case decode.ItemReading:
			// A reading the retention is already over for would be pruned
			// at once and never derived: refuse it with a reason of its
			// own, so the sender learns to replay it or lengthen the
			// retention instead of losing it silently.
			if horizon := now.Add(-e.cfg.Retention); retentionTime(it, now).Before(horizon) {
				rec.Rejected = append(rec.Rejected, Rejection{i, derive.ReasonPastRetention,
					fmt.Sprintf("effective before the retention horizon (%v back)", e.cfg.Retention)})
				e.leftOut(derive.ReasonPastRetention)
				continue
			}
			in, err := e.toStored(it, now)
			if err != nil {
				return Receipt{}, nil, err
			}
			inputs = append(inputs, in)
			rec.Accepted++
		case decode.ItemOmitted:
			e.leftOut(it.Omission.Reason)
			rec.Rejected = append(rec.Rejected, Rejection{i, it.Omission.Reason, it.Omission.Detail})
			// An unusable version is kept whenever it names its resource
			// and patient, as replay keeps it: a withdrawal, an amended
			// result that fails a check or a cancelled one must hide the
			// versions it supersedes, including those that arrive after
			// it. It changes no result of its own (store.Input.Inert).
			if it.ID == "" || it.Subject == "" {
				continue
			}
			in, err := e.toStored(it, now)
			if err != nil {
				return Receipt{}, nil, err
			}
			in.Inert = true
			inputs = append(inputs, in)
		}
	}
	if len(maybeRecoded) > 0 {
		var ask []string
		for _, u := range maybeRecoded {
			if !u.before {
				ask = append(ask, "Observation/"+u.id)
			}
		}
		held, err := e.held(ctx, ask)
		if err != nil {
			return Receipt{}, nil, err
		}
		for _, u := range maybeRecoded {
			if !u.before && !held["Observation/"+u.id] {
				rec.Ignored++
				e.leftOut(derive.ReasonUnrecognised)
				continue
			}
			// A re-coded version (a blood gas corrected to glucose, say)
			// supersedes the version held, so nothing derived from it
			// stays. The store checks again as it writes (OnlyReplaces).
			rc, ok := e.cfg.Decoder.Recoded(u.raw)
			if !ok {
				rec.Ignored++
				e.leftOut(derive.ReasonUnrecognised)
				continue
			}
			in, err := e.toStored(rc, now)
			if err != nil {
				return Receipt{}, nil, err
			}
			in.Inert, in.OnlyReplaces = true, true
			inputs = append(inputs, in)
			rec.Rejected = append(rec.Rejected, Rejection{u.index, derive.ReasonRecoded, rc.Omission.Detail})
		}
		slices.SortStableFunc(rec.Rejected, func(a, b Rejection) int { return a.Index - b.Index })
	}
	return rec, inputs, nil
}

// held reports which of logicals the store holds a version of (Owner
// finds one), in one read where the store can (store.Holder).
func (e *Engine) held(ctx context.Context, logicals []string) (map[string]bool, error) {
	out := make(map[string]bool, len(logicals))
	if len(logicals) == 0 {
		return out, nil
	}
	if h, ok := e.cfg.Store.(store.Holder); ok {
		got, err := h.Held(ctx, logicals)
		if err != nil {
			return nil, fmt.Errorf("engine: ingest: %w", err)
		}
		for i, l := range logicals {
			out[l] = got[i]
		}
		return out, nil
	}
	for _, l := range logicals {
		switch _, err := e.cfg.Store.Owner(ctx, l); {
		case err == nil:
			out[l] = true
		case !errors.Is(err, store.ErrNotFound):
			return nil, fmt.Errorf("engine: ingest: %w", err)
		}
	}
	return out, nil
}

// stored counts what the store did with the inputs and wakes the
// evaluator. Two versions of one resource: one of them is superseded, as
// replay counts it; a version that moves the input to another patient is
// counted as re-filed. A version stored only when it replaces one (a
// re-coded or deleted resource, Input.OnlyReplaces) is counted by its own
// reason when it was stored; a re-coded one that had nothing to replace
// is an Observation this service does not recognise. Device readings
// alone wake the evaluator's device listing (wakeDevice).
func (e *Engine) stored(inputs []store.Input, res []store.PutResult) {
	e.withdrawn.note(inputs, res)
	wake := e.wakeDevice
	for i, r := range res {
		// A withdrawal or deletion may retract a blood gas's values: the
		// store's mark says whether it does (urgent), and the listing it
		// asks for is made at once.
		if inputs[i].Urgent || inputs[i].OnlyReplaces || inputs[i].Inert {
			wake = e.wake
		}
		switch r {
		case store.PutNewer, store.PutOlder:
			e.leftOut(derive.ReasonSuperseded)
		case store.PutMoved:
			e.leftOut(derive.ReasonRefiled)
		}
		if !inputs[i].OnlyReplaces {
			continue
		}
		reason := derive.ReasonRecoded
		if si, err := decodeStored(inputs[i].Payload, inputs[i].Logical, inputs[i].VersionID); err == nil {
			reason = si.Item.Omission.Reason
		}
		switch {
		case r != store.PutSkipped:
			e.leftOut(reason)
		case reason == derive.ReasonRecoded:
			e.leftOut(derive.ReasonUnrecognised)
		}
	}
	signal(wake)
}

// withdrawal is the stored payload that replaces the copy of an input
// under the patient its earlier version named, when a newer version names
// another patient: a result corrected to the right patient must leave
// nothing derived from it under the wrong one. The store writes it with
// the new version's id and time, so it supersedes the old copy.
func withdrawal(it decode.Item) ([]byte, error) {
	ref := it.Ref
	if ref == "" {
		ref = fhirref.Versioned(it.ResourceType+"/"+it.ID, it.VersionID)
	}
	return encodeStored(decode.Item{
		Type: decode.ItemOmitted, ResourceType: it.ResourceType, ID: it.ID, VersionID: it.VersionID, Ref: ref,
		LastUpdated: it.LastUpdated,
		Omission:    derive.Omission{Ref: ref, Reason: derive.ReasonRefiled, Detail: "a newer version names another patient"},
	})
}

// toStored is the stored input of a decoded item, kept by its retention
// time as of now, the engine's clock (Config.Now).
func (e *Engine) toStored(it decode.Item, now time.Time) (store.Input, error) {
	payload, err := encodeStored(it)
	if err != nil {
		return store.Input{}, err
	}
	moved, err := withdrawal(it)
	if err != nil {
		return store.Input{}, err
	}
	in := store.Input{
		Subject: it.Subject, Logical: it.ResourceType + "/" + it.ID, VersionID: it.VersionID,
		LastUpdated: it.LastUpdated, EffectiveAt: retentionTime(it, now), Payload: payload,
		Withdrawal: moved,
	}
	// A reading changes the results of blood gases sampled from its own
	// time less its kind's reach until its time plus its kind's reach the
	// other way (a height, which serves a year, and a withdrawal change
	// them at any time: zero).
	if it.Type == decode.ItemReading {
		kinds := []derive.Kind{it.Reading.Kind}
		for _, a := range it.Also {
			kinds = append(kinds, a.Kind)
		}
		in.Urgent = slices.ContainsFunc(kinds, urgentKind)
		if it.Reading.Kind != derive.KindHeight {
			sp := e.readingSpan(it.Reading.At(), kinds)
			in.ChangedAt, in.ChangedUntil = sp.From, sp.Until
		}
	}
	// The version it replaces may have been of another kind: its own
	// stored head says which (a height's effective time is a year on).
	in.Replaced = e.replacedSpan
	in.Tie = tieWith(it)
	return in, nil
}

// tieWith is store.Input.Tie for a decoded item: at a tie of time and id
// with a stored version, the one version order (ref.Compare) goes on to
// what each says, as replay's does (pipeline.VersionContent). A stored
// payload this build cannot read is the same version.
func tieWith(it decode.Item) func(subject string, payload []byte) int {
	return func(subject string, payload []byte) int {
		si, err := decodeStored(payload, it.ResourceType+"/"+it.ID, it.VersionID)
		if err != nil {
			return 0
		}
		return fhirref.Compare(versionOf(it.Subject, it), versionOf(subject, si.Item))
	}
}

// versionOf is the order of a version of an input filed under subject,
// its time and id left out: they are equal at a tie.
func versionOf(subject string, it decode.Item) fhirref.Version {
	usable := it.Type == decode.ItemReading
	return fhirref.Version{Unusable: !usable,
		Content: pipeline.VersionContent(subject, usable, it.Reading, it.Priority, it.Also, it.Omission)}
}

// readingSpan is the blood gas sample times a reading taken at at, of
// kinds (its own and those of the other readings it carries, which share
// its time), can change: each kind's reach either side.
func (e *Engine) readingSpan(at time.Time, kinds []derive.Kind) store.Span {
	d := e.cfg.Derive
	var sp store.Span
	for i, k := range kinds {
		from, until := at.Add(-d.Reach(k)), at.Add(d.ReachLater(k))
		if i == 0 {
			sp.From, sp.Until = from, until
			continue
		}
		sp.From, sp.Until = store.Earliest(sp.From, from), store.Latest(sp.Until, until)
	}
	return sp
}

// replacedSpan is store.Input.Replaced: the blood gas sample times a
// stored version changed, read from its head. A version that is not a
// reading changed none; a height (kept by its time a year on) and a
// payload this build cannot read changed the whole patient.
func (e *Engine) replacedSpan(_ time.Time, payload []byte) (store.Span, bool) {
	l, err := parseHead(payload)
	if err != nil {
		// Unreadable: the whole patient, at once, to be safe.
		return store.Span{Urgent: true}, true
	}
	if headItemType(payload) != decode.ItemReading {
		return store.Span{}, false
	}
	kinds := []derive.Kind{headKind(payload)}
	for i := range l.nAlso {
		kinds = append(kinds, l.alsoKind(payload, i))
	}
	urgent := slices.ContainsFunc(kinds, urgentKind)
	if slices.Contains(kinds, derive.KindHeight) {
		return store.Span{Urgent: urgent}, true
	}
	sp := e.readingSpan(time.UnixMilli(headAtMillis(payload)).UTC(), kinds)
	sp.Urgent = urgent
	return sp, true
}

// urgentKind reports whether a change to a reading of kind k alters a
// blood gas's values directly: the blood gas itself (its PaCO2, as
// measured or at the patient's temperature) and the height, a patient
// fact. Such a change, a deletion or withdrawal of one included, is
// evaluated at once (store.Input.Urgent); the device pace holds back
// only the readings that arrive in floods.
func urgentKind(k derive.Kind) bool {
	return k == derive.KindPaCO2 || k == derive.KindPaCO2Adjusted || k == derive.KindHeight
}

// retentionTime is the time the store prunes an input by. A body height is
// a patient fact, not a reading: it stays usable for a year (the derive
// package's HeightMaxAge), so it is kept as if it had been measured a year
// later; otherwise a long stay would lose the ventilatory ratio after one
// retention period.
//
// A version that cannot be used carries no effective time; it is kept by
// its last-updated time (or its arrival), so a withdrawal outlives, by the
// retention, the readings it hides.
func retentionTime(it decode.Item, now time.Time) time.Time {
	switch {
	case it.Type != decode.ItemReading:
		if it.LastUpdated.After(now) {
			return it.LastUpdated
		}
		return now
	case it.Reading.Kind == derive.KindHeight:
		return it.Reading.At().Add(derive.DefaultConfig().HeightMaxAge)
	}
	return it.Reading.At()
}

func (e *Engine) putPatient(ctx context.Context, it decode.Item, now, fetched time.Time) error {
	payload, err := pipeline.PatientFacts(it.Patient)
	if err != nil {
		return fmt.Errorf("engine: encode patient: %w", err)
	}
	_, err = e.cfg.Store.PutPatient(ctx, store.Patient{
		Subject: "Patient/" + it.ID, VersionID: it.VersionID, LastUpdated: it.LastUpdated,
		Payload: payload, FetchedAt: fetched,
	}, now)
	if err != nil {
		return fmt.Errorf("engine: store patient: %w", err)
	}
	signal(e.wake)
	return nil
}

func (e *Engine) received(mode, rt string) {
	if e.cfg.Hooks.Received != nil {
		e.cfg.Hooks.Received(mode, rt)
	}
}

func (e *Engine) leftOut(r derive.Reason) {
	if e.cfg.Hooks.LeftOut != nil {
		e.cfg.Hooks.LeftOut(r)
	}
}

// Run evaluates, writes and catches up until ctx is done. On return every
// evaluation in progress has been committed or abandoned before its commit
// (the store's dirty marks bring it back on the next start), and no write is
// half-recorded.
func (e *Engine) Run(ctx context.Context) error {
	var wg sync.WaitGroup
	loops := []func(context.Context){e.evaluateLoop, e.pruneLoop, e.pictureLoop}
	if e.sharedStore() {
		loops = append(loops, e.aliveLoop)
	}
	if e.cfg.Client != nil {
		loops = append(loops, e.writeLoop, e.catchUpLoop)
		e.RequestCatchUp("start")
	}
	for _, loop := range loops {
		wg.Add(1)
		go func() {
			defer wg.Done()
			loop(ctx)
		}()
	}
	signal(e.wake)
	signal(e.flush)
	wg.Wait()
	return nil
}

// forgetIdle drops what the engine keeps in memory of each patient whose
// last evaluation here committed before horizon (the retention's: their
// inputs are being pruned), so a process that runs for months does not
// hold every patient it ever saw. What it drops only saves work: such a
// patient's next evaluation derives every blood gas, runs the detector
// whole and reads the whole ledger, as a first one does. An evaluation
// that commits meanwhile stores its time anew and is not dropped (the
// compare-and-delete), though its detector states may be. It returns how
// many patients it forgot.
func (e *Engine) forgetIdle(horizon time.Time) int {
	n := 0
	e.evaluatedHere.Range(func(subject, at any) bool {
		if at.(time.Time).Before(horizon) && e.evaluatedHere.CompareAndDelete(subject, at) {
			e.fallStates.Delete(subject)
			e.fallSeries.Delete(subject)
			n++
		}
		return true
	})
	return n
}

// sleep waits for d or ctx; it reports false when ctx ended.
func sleep(ctx context.Context, d time.Duration) bool {
	t := time.NewTimer(d)
	defer t.Stop()
	select {
	case <-ctx.Done():
		return false
	case <-t.C:
		return true
	}
}

func (e *Engine) pruneLoop(ctx context.Context) {
	for {
		now := e.now()
		n, err := e.cfg.Store.Prune(ctx, now.Add(-e.cfg.Retention))
		if err != nil && ctx.Err() == nil {
			e.log.ErrorContext(ctx, "prune failed", "err", err)
		} else if n > 0 {
			e.log.InfoContext(ctx, "pruned inputs past retention", "inputs", n)
		}
		if n := e.forgetIdle(now.Add(-e.cfg.Retention)); n > 0 {
			e.log.InfoContext(ctx, "forgot the detector states of patients not evaluated within the retention", "patients", n)
		}
		history := now.Add(-e.cfg.HistoryRetention)
		p, err := e.cfg.Store.PruneHistory(ctx, history, history, now.Add(-e.cfg.DeadLetterRetention))
		if err != nil && ctx.Err() == nil {
			e.log.ErrorContext(ctx, "pruning the ledger, feed and dead letters failed", "err", err)
		} else if p != (store.Pruned{}) {
			e.log.InfoContext(ctx, "pruned history past retention", "entries", p.Entries, "results", p.Results, "events", p.Events, "dead_letters", p.DeadLetters)
		}
		if !sleep(ctx, 10*time.Minute) {
			return
		}
	}
}

// Health is what readiness needs to know from the engine. Whether the FHIR
// server answers is not here: the service tracks it once, from every
// request the client makes (api/serve).
type Health struct {
	// OutboxBlockedSince is when the oldest pending write first failed and
	// has kept failing; zero when it is flowing.
	OutboxBlockedSince time.Time
	// StalePictures counts the patients whose report of what their data
	// leaves out (Hooks.Evaluated) waits for a refresh.
	StalePictures int
	// WritesStopped says why the writer sends nothing (the software Device
	// cannot be resolved on the server); empty while it sends.
	WritesStopped string
	Stats         store.Stats
}

// Health reports the engine's state.
func (e *Engine) Health(ctx context.Context) (Health, error) {
	st, err := e.cfg.Store.Stats(ctx)
	if err != nil {
		return Health{}, fmt.Errorf("engine: health: %w", err)
	}
	e.mu.Lock()
	defer e.mu.Unlock()
	return Health{OutboxBlockedSince: e.outboxBlocked, StalePictures: e.stalePictures(), WritesStopped: e.writesStopped, Stats: st}, nil
}

// Standalone reports whether the engine writes to no server.
func (e *Engine) Standalone() bool { return e.cfg.Client == nil }

// SearchCodes returns the "system|code" tokens the engine searches for.
func (e *Engine) SearchCodes() []string { return append([]string(nil), e.cfg.SearchCodes...) }

// InputCount returns how many inputs the store holds for a patient, for
// audits and tests that must show nothing was stored.
func (e *Engine) InputCount(ctx context.Context, subject string) (int, error) {
	ins, err := e.cfg.Store.Inputs(ctx, subject)
	if err != nil {
		return 0, fmt.Errorf("engine: %w", err)
	}
	return len(ins), nil
}
