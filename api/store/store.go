// Package store is the live service's durable state: the latest version of
// every input per patient, the patient facts the equations need, the ledger
// of derivations already made, the outbox of writes the FHIR server has not
// yet acknowledged, dead letters, polling cursors, subscription event
// counters, and the feed of new derivations that watchers resume from.
//
// The interface is narrow on purpose: every method is one transaction, and
// no method leaks the technology behind it, so a PostgreSQL implementation
// serving several replicas can follow the embedded one (package
// store/boltstore). Every method that changes state returns only after the
// change is durable.
package store

import (
	"context"
	"errors"
	"time"
)

// ErrNotFound is returned, wrapped, when a requested record does not exist.
var ErrNotFound = errors.New("store: not found")

// ErrConflict is returned, wrapped, by [Store.Commit] when a series is no
// longer what the change expected: another evaluation (in this process or
// another replica) committed first. Nothing of the change was applied.
var ErrConflict = errors.New("store: conflict: the ledger changed since it was read")

// ErrClaimedElsewhere is returned, wrapped, by [Store.Reschedule] and
// [Store.Bury] when another replica holds an unexpired claim on the write
// (see [Replicated]): this replica's claim lapsed and the other took the
// write over. Nothing changed; the outcome of the write is the other
// replica's to record. A store of one replica never returns it.
var ErrClaimedElsewhere = errors.New("store: the write is claimed by another replica")

// Input is the latest known version of one input resource. Payload is the
// engine's own encoding of everything it needs (the decoded reading, the
// original value and unit, the conversion); the store does not look inside.
type Input struct {
	Subject     string // "Patient/x"
	Logical     string // "Observation/x"
	VersionID   string
	LastUpdated time.Time
	// EffectiveAt is the physiological time, used for retention.
	EffectiveAt time.Time
	Payload     []byte
	// OnlyReplaces keeps the input only when a version of the same
	// resource is stored (under any patient). Otherwise it is PutSkipped.
	OnlyReplaces bool
	// Inert marks a version no result can use (a withdrawal, a refused
	// status, specimen or code): it is stored like any other, so that an
	// older version arriving after it compares against it and is
	// PutOlder, but it marks its patient dirty only when it replaces a
	// version stored under that patient (the patient a version moves the
	// input away from is marked as for any version).
	Inert bool
	// ChangedAt is the earliest blood gas sample time whose results may
	// change because of this input (the reading's time less how far its
	// kind reaches back); zero means any time, and the patient is
	// evaluated whole.
	ChangedAt time.Time
	// ChangedUntil is the latest blood gas sample time whose results may
	// change because of this input (the reading's time plus how far its
	// kind reaches forward, derive.Config.ReachLater); zero means no
	// bound. It is read only when ChangedAt is set.
	ChangedUntil time.Time
	// Replaced says what results a version this one replaces (under the
	// same patient) changed, from that version's effective time and
	// payload, since those change too: the store does not look inside a
	// payload, its writer can. ok false: it changed none (a version no
	// result could use); a zero span: the whole patient (a height, say,
	// whose effective time is not its own). Nil: every replaced version
	// changed the whole patient.
	Replaced func(effectiveAt time.Time, payload []byte) (sp Span, ok bool)
	// Tie orders this version against a stored version of the same
	// resource with the same meta.lastUpdated and versionId (two copies
	// without meta, under one patient or two), from the stored version's
	// subject and payload: +1 when this one is newer, 0 when they are the
	// same, -1 when older (ref.Compare with Version.Unusable and Content,
	// which the store cannot fill: it does not look inside a payload).
	// Nil: a tie is the same version (PutSame).
	Tie func(subject string, payload []byte) int
	// Urgent marks a change that alters a blood gas's values directly (a
	// blood gas, a patient fact): its patient is evaluated before patients
	// with device readings only, and the device pace does not hold it
	// back. The version it replaces makes the change urgent too when
	// Replaced says so of it (a blood gas corrected, withdrawn or
	// deleted).
	Urgent bool
	// Withdrawal is the payload stored, with this input's version, under
	// the patient the latest stored version names when this newer version
	// names another one: the first patient must keep nothing derived from
	// it. Empty: the copy under the first patient is left as it is.
	Withdrawal []byte
}

// PutResult says what [Store.PutInputs] did with each input, in order.
type PutResult int

// What happened to one input.
const (
	PutNew   PutResult = iota + 1 // first version seen
	PutNewer                      // replaced an older version
	PutSame                       // the same version again: nothing changed
	PutOlder                      // an older version than the stored one: ignored
	// PutMoved: a newer version that names another patient than the stored
	// latest one; the copy under that patient became the Withdrawal.
	PutMoved
	// PutSkipped: an OnlyReplaces input with nothing to replace.
	PutSkipped
)

// Patient is what is known about a patient's demographics.
type Patient struct {
	Subject     string // "Patient/x"
	VersionID   string
	LastUpdated time.Time
	Payload     []byte
	// FetchedAt is when the service last read it from the FHIR server.
	FetchedAt time.Time
}

// Dirty is a patient whose inputs changed since the last evaluation.
type Dirty struct {
	Subject string
	// Since is when the patient first became dirty after the last
	// evaluation, by the clock of the replica that marked it; the engine
	// waits a settle delay from it.
	Since time.Time
	// Waited, from a store shared by replicas ([Replicated]), is how long
	// the mark has waited at the listing by the store's own clock, from
	// when the store recorded Since: the engine measures the settle delay
	// with it, since another replica's clock may not agree with its own.
	// A store of one replica leaves it zero.
	Waited time.Duration
	// Generation increases with every change; [Store.Commit] clears the
	// dirty mark only if no change arrived after the generation it read.
	Generation uint64
	// From is the earliest blood gas sample time a change since the last
	// evaluation can affect: the earliest ChangedAt of the inputs written,
	// and the effective time less Reach of the versions they replaced. Zero
	// means the whole patient (patient facts, a withdrawal, a mark without
	// an input).
	From time.Time
	// Until is the latest blood gas sample time a change since the last
	// evaluation can affect (Input.ChangedUntil, and what the versions
	// they replaced changed, Input.Replaced); zero means no bound.
	// A store may always leave it zero: the evaluation then derives every
	// blood gas from From on, as before marks had an end.
	Until time.Time
	// Urgent is set when a change altered a blood gas's values directly
	// (Input.Urgent, Span.Urgent, a patient's facts).
	Urgent bool
	// Cleared, from a store shared by replicas ([Replicated]), is the
	// Generation of the mark that the patient's last committed evaluation
	// cleared, on any replica (0 when none has). While it stands, every
	// change since that evaluation is in this mark, so a replica that ran
	// that evaluation may go on from what it found (the engine's fall
	// detector state). A store of one replica leaves it 0.
	Cleared uint64
	// EvaluatedElsewhere, from a store shared by replicas, says that
	// another replica's evaluation cleared the patient's last mark and
	// that replica still runs (Replicated.KeepAlive): it holds what it
	// found, and may go on from it where this one would start over. False
	// when this replica's did, or none did, or that replica stopped, or
	// the store does not know.
	EvaluatedElsewhere bool
}

// Entry is one derived Observation in the ledger, keyed by its series (the
// identity that stays stable when inputs are corrected).
type Entry struct {
	Series  string
	Subject string
	// Key is the version-specific identifier: it changes when any input
	// version changes.
	Key string
	// Status is the FHIR status last decided for it: final, amended or
	// entered-in-error.
	Status string
	// ServerID and ServerVersion are the resource's id and versionId on the
	// FHIR server once a write was acknowledged; empty before, and always
	// empty in standalone mode.
	ServerID, ServerVersion string
	// Revisions are the previous Keys, oldest first.
	Revisions []string
	// EffectiveAt is the physiological time of the value.
	EffectiveAt time.Time
	UpdatedAt   time.Time
	// Payload is the engine's encoding of the result (resources and the
	// explanation), opaque to the store.
	Payload []byte
}

// Result is one derivation (of a blood gas) or one fall finding, in the
// engine's encoding, shared by the ledger entries of all its values: the
// store holds it once per version, not once per derived Observation. The
// store keeps every version (ID, Version) until it is pruned, so a value
// that has since been superseded can still be explained from what it was
// computed from.
type Result struct {
	ID, Version string
	Subject     string
	// EffectiveAt is the physiological time, used for retention.
	EffectiveAt time.Time
	Payload     []byte
}

// Write is one transaction the FHIR server has not yet acknowledged.
type Write struct {
	ID uint64 // assigned by the store
	// Series are the ledger entries this write carries.
	Series   []string
	Subject  string
	Body     []byte // the engine's encoding of the write
	Attempts int
	// NotBefore is the earliest time of the next attempt, by the clock of
	// the replica that set it.
	NotBefore time.Time
	// Wait and StoreClock: from a store shared by replicas, when the
	// write was rescheduled with Replicated.RescheduleIn, StoreClock is set
	// and Wait is how much longer the next attempt waits at the listing by
	// the store's own clock (zero when due), which the engine trusts over
	// NotBefore: another replica's clock may not agree with its own.
	Wait       time.Duration
	StoreClock bool
	CreatedAt  time.Time
	LastError  string
}

// DeadLetter is a write the server refused for good.
type DeadLetter struct {
	Write
	Reason string
	At     time.Time
}

// Event is one entry of the derivation feed. Seq is the resume token:
// strictly increasing, never reused.
type Event struct {
	Seq     uint64
	Series  string
	Subject string
	Key     string
	Status  string
	At      time.Time
}

// Expect is what a commit expects a series to be: the Key and Status of
// its ledger entry as the evaluation read it. The zero Expect means the
// series must not exist.
type Expect struct {
	Key, Status string
}

// Change is what one evaluation of a patient decided.
type Change struct {
	Subject string
	// Generation is the Dirty.Generation the evaluation read.
	Generation uint64
	// Expect holds, for every series the change writes, what the
	// evaluation read of it. A commit whose expectation does not hold
	// fails with ErrConflict and applies nothing, so two evaluations that
	// overlap can never both write a change of one series.
	Expect map[string]Expect
	// Entries are ledger entries to create or replace.
	Entries []Entry
	// Results are results the entries refer to; a version already stored
	// is kept as it is.
	Results []Result
	// Writes are appended to the outbox (IDs are assigned).
	Writes []Write
}

// Pruned counts what PruneHistory removed.
type Pruned struct {
	Entries, Results, Events, DeadLetters int
}

// Stats is the outbox's state, for readiness and metrics.
type Stats struct {
	OutboxDepth   int
	OldestWrite   time.Time // zero when the outbox is empty
	DeadLetters   int
	DirtyPatients int
}

// Committer is implemented by a store whose writes are committed one
// transaction at a time by one committer (the embedded store: bbolt has a
// single writer, and concurrent writes are merged into its transactions).
// Every webhook answer waits for a commit, so the share of time the
// committer is busy is how near the webhook is to the most it can accept:
// near 1, notifications queue for the committer and answers slow down.
type Committer interface {
	CommitStats() CommitStats
}

// CommitStats counts a committer's work since the store was opened.
type CommitStats struct {
	// Transactions committed or rolled back.
	Transactions uint64
	// Calls are the write calls the transactions ran (several callers'
	// writes share one transaction).
	Calls uint64
	// Busy is the time the committer spent in transactions, syncs included.
	Busy time.Duration
}

// Exclusive is implemented by a store that one process holds at a time
// (the embedded store, behind its file lock). The engine over it is then
// the only one that evaluates its patients, and may keep what one
// evaluation found for the next in memory (the fall detector's state):
// no other process can change a patient's inputs unseen.
type Exclusive interface {
	Exclusive() bool
}

// InputScanner is implemented by a store that can show a patient's
// stored inputs one at a time where they lie, without copying them (the
// embedded store, from its memory map). An evaluation reads every input in
// its span and keeps a few fields of some of them; a store without it is
// read through [Store.InputsFrom].
type InputScanner interface {
	// ScanInputsFrom calls fn with each of subject's stored inputs whose
	// EffectiveAt is at or after from (every one when from is zero), in the
	// order of [Store.InputsFrom], and stops at the first error fn returns,
	// which it returns wrapped. The row's slices are valid only during the
	// call, and fn must not call the store.
	ScanInputsFrom(ctx context.Context, subject string, from time.Time, fn func(InputRow) error) error
}

// Holder is implemented by a store that can say in one read, for many
// inputs at once, whether it holds a version of each (what
// [Store.Owner] finds). The engine asks it about the Observations an
// ingest finds no use for, most of what an unfiltered export holds, to
// tell a re-coded version of a held resource from the others; a store
// without it is asked with Owner, one at a time.
type Holder interface {
	// Held reports, for each logical reference in order, whether Owner
	// would find a subject for it.
	Held(ctx context.Context, logicals []string) ([]bool, error)
}

// InputRow is a stored input as [InputScanner] shows it: the fields an
// evaluation reads, as slices of the store's own bytes.
type InputRow struct {
	Logical, VersionID, Payload []byte
}

// Store is the service's durable state. Implementations are safe for
// concurrent use.
type Store interface {
	// PutInputs stores the latest version of each input and marks every
	// patient with a new or newer input dirty, in one transaction: the
	// checks (is there a version to replace, which patient holds the
	// latest one) and the writes cannot interleave with another call.
	// Versions are ordered by ref.Compare, across patients, a tie of time
	// and id broken by Input.Tie (CompareStored): a version older than the
	// latest stored under any patient is PutOlder, so a late earlier
	// version never revives a state that a correction (even one that moved
	// the input to another patient) replaced, and which of two tied
	// versions is kept does not depend on the order they arrive in.
	PutInputs(ctx context.Context, inputs []Input, now time.Time) ([]PutResult, error)
	// Inputs returns a patient's stored inputs in EffectiveAt order, those
	// of one instant in Logical order: the order pairing reads them in.
	Inputs(ctx context.Context, subject string) ([]Input, error)
	// InputsFrom returns a patient's stored inputs whose EffectiveAt is at
	// or after from, in the order of Inputs: what an evaluation needs when a
	// change can affect results from a time on. (A body height is stored
	// with its EffectiveAt a year after its measurement, so it is among
	// them for as long as a derivation may use it.)
	InputsFrom(ctx context.Context, subject string, from time.Time) ([]Input, error)
	// Input returns one stored input by its logical reference.
	Input(ctx context.Context, subject, logical string) (Input, error)
	// Owner returns the subject the latest stored version of an input was
	// filed under (ErrNotFound when none), so a version that moves the
	// input to another patient can withdraw the copy under the first.
	Owner(ctx context.Context, logical string) (string, error)

	// PutPatient stores patient facts (the newer version wins as for
	// inputs, a tie broken by the payload: ComparePatients) and marks the
	// patient dirty when they changed.
	PutPatient(ctx context.Context, p Patient, now time.Time) (PutResult, error)
	// Patient returns stored facts, or ErrNotFound.
	Patient(ctx context.Context, subject string) (Patient, error)

	// MarkDirty marks a patient for evaluation without a new input (after
	// a restart, or when a settle delay has passed).
	MarkDirty(ctx context.Context, subject string, now time.Time) error
	// DirtyPatients lists dirty patients: urgent ones (a new blood gas)
	// first, then oldest first.
	DirtyPatients(ctx context.Context) ([]Dirty, error)
	// Commit applies one evaluation atomically: ledger entries, outbox
	// writes and feed events for every entry, after checking change.Expect
	// (ErrConflict when it does not hold); it clears the dirty mark only
	// when the patient's generation is still change.Generation. Otherwise
	// the patient stays dirty and its Since becomes now: the changes that
	// arrived during the evaluation have waited only since it ended.
	//
	// A change with no entries, results, writes or expectations (an
	// evaluation that changed nothing) only clears the mark; the store may
	// make that clear durable later, with its next synced write, since
	// losing it in a crash costs only one more evaluation. It is visible
	// at once to DirtyPatients and Stats.
	Commit(ctx context.Context, change Change, now time.Time) error

	// Ledger returns a patient's ledger entries, in Series order.
	Ledger(ctx context.Context, subject string) ([]Entry, error)
	// Entry returns one ledger entry by series, or ErrNotFound.
	Entry(ctx context.Context, series string) (Entry, error)
	// EntryByKey finds a ledger entry by its current or a previous Key.
	EntryByKey(ctx context.Context, key string) (Entry, error)
	// EntryVersion returns the ledger entry as it stood while key was its
	// Key (the last state under that key): the current entry when key is
	// current, else the version it superseded, until pruned; ErrNotFound
	// otherwise.
	EntryVersion(ctx context.Context, key string) (Entry, error)
	// Result returns one version of a result, or ErrNotFound.
	Result(ctx context.Context, id, version string) (Result, error)
	// EntriesBetween lists a patient's entries with EffectiveAt in
	// [from, to), in EffectiveAt then Series order, starting after the
	// given Series (for paging), at most limit.
	EntriesBetween(ctx context.Context, subject string, from, to time.Time, after string, limit int) ([]Entry, error)

	// DueWrites returns up to limit outbox writes with NotBefore <= now,
	// oldest first.
	DueWrites(ctx context.Context, now time.Time, limit int) ([]Write, error)
	// Acknowledge removes a write from the outbox and records the server ids
	// of its entries (series → id, version), in one transaction.
	Acknowledge(ctx context.Context, writeID uint64, server map[string][2]string) error
	// Reschedule records a failed attempt and the time of the next one.
	// On a store shared by replicas it changes the write only while the
	// caller holds its claim, or no replica holds an unexpired one;
	// otherwise nothing changes and the answer wraps ErrClaimedElsewhere
	// (a replica that stalled past its claim must not release the claim
	// of the replica that took the write over). A write no longer in the
	// outbox is ErrNotFound.
	Reschedule(ctx context.Context, writeID uint64, notBefore time.Time, lastErr string) error
	// Bury moves a write to the dead letters, under the same rule as
	// Reschedule: ErrClaimedElsewhere while another replica holds it.
	Bury(ctx context.Context, writeID uint64, reason string, now time.Time) error
	// DeadLetters lists dead letters, oldest first, at most limit.
	DeadLetters(ctx context.Context, limit int) ([]DeadLetter, error)
	Stats(ctx context.Context) (Stats, error)

	// Cursor returns a named value ("" when unset); SetCursor sets it.
	Cursor(ctx context.Context, name string) (string, error)
	SetCursor(ctx context.Context, name, value string) error
	// SeenEvent records the highest event number seen for a subscription
	// and returns the previous highest (0 when none). A lower number leaves
	// the highest as it is (a late delivery), unless [EventsRestarted] says
	// the numbering started again: then number becomes the highest.
	SeenEvent(ctx context.Context, subscription string, number uint64) (previous uint64, err error)
	// RestartEvents sets the highest event number seen for a subscription
	// to number, lower or not, and returns the previous highest (0 when
	// none): the server said it started the subscription again (a
	// handshake, with its count of events since the start).
	RestartEvents(ctx context.Context, subscription string, number uint64) (previous uint64, err error)
	// PutNotified is PutInputs followed by SeenEvent, for a notification
	// that carries its inputs, with both answers. The event number is
	// never durable before the inputs: when the call fails the counter
	// may stay behind, never run ahead, so a notification whose content
	// was not stored cannot pass for one already seen. An implementation
	// may do both in one transaction (one commit per notification).
	PutNotified(ctx context.Context, inputs []Input, now time.Time, subscription string, number uint64) (results []PutResult, previous uint64, err error)

	// Events returns feed events with Seq > after, at most limit, in order.
	Events(ctx context.Context, after uint64, limit int) ([]Event, error)
	// LastEvent returns the highest Seq (0 when the feed is empty).
	LastEvent(ctx context.Context) (uint64, error)

	// Prune removes inputs whose EffectiveAt is before the horizon, and
	// returns how many went.
	Prune(ctx context.Context, horizon time.Time) (int, error)
	// PruneHistory removes what the service keeps of its own past once it
	// is older than the horizons: ledger entries with EffectiveAt before
	// ledger (with their earlier versions and their results) unless a
	// write for their series is still in the outbox or in a dead letter
	// buried at or after dead, feed events recorded before feed, and dead
	// letters buried before dead.
	PruneHistory(ctx context.Context, ledger, feed, dead time.Time) (Pruned, error)
	Close() error
}
