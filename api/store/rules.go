package store

import (
	"bytes"
	"time"

	"github.com/deadspace-fhir/deadspace/fhir/ref"
)

// The rules below are part of the contract, and every implementation
// applies them the same way; they live here so that the stores cannot
// drift apart.

// ResultOf says what a put did with a version, given whether a version of
// the resource was stored and how the new one compares with it (c > 0:
// newer, 0: the same, < 0: older, by ref.Compare).
func ResultOf(exists bool, c int) PutResult {
	switch {
	case !exists:
		return PutNew
	case c > 0:
		return PutNewer
	case c == 0:
		return PutSame
	default:
		return PutOlder
	}
}

// CompareStored orders in against a stored version of the same resource
// (old, filed under old.Subject, its payload read from the store): by
// ref.Compare of their versions, and at a tie of time and id by in.Tie,
// which reads what the stored version says; without Tie the two are the
// same version. +1: in is newer; 0: the same; -1: older.
func CompareStored(in Input, old Input) int {
	if c := CompareVersions(in, old); c != 0 || in.Tie == nil {
		return c
	}
	return in.Tie(old.Subject, old.Payload)
}

// CompareVersions is ref.Compare of two inputs' versions alone (time and
// id), without the tie-break.
func CompareVersions(in Input, old Input) int {
	return ref.Compare(ref.Version{LastUpdated: in.LastUpdated, ID: in.VersionID}, ref.Version{LastUpdated: old.LastUpdated, ID: old.VersionID})
}

// ComparePatients orders two versions of a patient's facts by ref.Compare,
// a tie of time and id broken by the greater payload (the facts in the
// engine's encoding, which replay orders its Patients by too).
func ComparePatients(p, old Patient) int {
	return ref.Compare(ref.Version{LastUpdated: p.LastUpdated, ID: p.VersionID, Content: string(p.Payload)},
		ref.Version{LastUpdated: old.LastUpdated, ID: old.VersionID, Content: string(old.Payload)})
}

// Span is what one transaction changed of one patient: results may change
// from From on (zero: at any time, the whole patient) until Until (zero:
// with no end), and Urgent when a blood gas changed. It is what a dirty
// mark accumulates until an evaluation clears it (Dirty.From, Dirty.Until,
// Dirty.Urgent).
type Span struct {
	From, Until time.Time
	Urgent      bool
}

// Merge is the span covering both.
func (a Span) Merge(b Span) Span {
	return Span{From: Earliest(a.From, b.From), Until: Latest(a.Until, b.Until), Urgent: a.Urgent || b.Urgent}
}

// SpanOf is the span of one input's own change (before the versions it
// replaces widen it): an end only with a start, since a change to the
// whole patient has none.
func SpanOf(in Input) Span {
	sp := Span{From: in.ChangedAt, Urgent: in.Urgent}
	if !in.ChangedAt.IsZero() {
		sp.Until = in.ChangedUntil
	}
	return sp
}

// Replacing widens sp by the results of a version in replaces, effective
// at effectiveAt with payload: what in.Replaced says of it (the whole
// patient without it).
func (sp Span) Replacing(in Input, effectiveAt time.Time, payload []byte) Span {
	old, ok := Span{}, true
	if in.Replaced != nil {
		old, ok = in.Replaced(effectiveAt, payload)
	}
	if !ok {
		return sp
	}
	return Span{From: Earliest(sp.From, old.From), Until: Latest(sp.Until, old.Until), Urgent: sp.Urgent || old.Urgent}
}

// MovedAway is the change to the patient a newer version moves an input
// away from (Input.Withdrawal), whose stored version was effective at
// effectiveAt with payload: the whole patient, urgent when either version
// is (what in.Replaced says of the one moved away; a blood gas filed to
// the wrong patient must leave that patient's record at once).
func MovedAway(in Input, effectiveAt time.Time, payload []byte) Span {
	urgent := in.Urgent
	if in.Replaced != nil {
		if old, ok := in.Replaced(effectiveAt, payload); ok {
			urgent = urgent || old.Urgent
		}
	}
	return Span{Urgent: urgent}
}

// PatientChange is the change a newer version of a patient's facts makes:
// the whole patient, urgent when the facts differ from those stored
// (stored nil: none were), since every blood gas's values may change with
// them; a new version with the same facts changes nothing at once.
func PatientChange(p Patient, stored []byte, had bool) Span {
	return Span{Urgent: !had || !bytes.Equal(p.Payload, stored)}
}

// Latest is the later time, where zero (no end) is the latest.
func Latest(a, b time.Time) time.Time {
	if a.IsZero() || b.IsZero() {
		return time.Time{}
	}
	if a.After(b) {
		return a
	}
	return b
}

// Earliest is the earlier time, where zero (everything) is the earliest.
func Earliest(a, b time.Time) time.Time {
	if a.IsZero() || b.IsZero() {
		return time.Time{}
	}
	if a.Before(b) {
		return a
	}
	return b
}

// MergeRevisions lists the previous keys of an entry that replaces old,
// oldest first: old's revisions, old's key, then any the new entry
// carries, each once, never the new entry's key. A store keeps keys the
// caller left out, so that EntryByKey still finds them.
func MergeRevisions(old, en Entry) []string {
	all := append(append(append([]string(nil), old.Revisions...), old.Key), en.Revisions...)
	out := make([]string, 0, len(all))
	seen := map[string]bool{en.Key: true}
	for _, k := range all {
		if !seen[k] {
			seen[k] = true
			out = append(out, k)
		}
	}
	if len(out) == 0 {
		return nil
	}
	return out
}

// EventsReorderSpan is how far below the highest event number seen a
// subscription's notification may be numbered and still be taken for a
// late delivery (a sender with several connections, a delivery retried)
// rather than a restarted numbering: see [EventsRestarted].
const EventsReorderSpan = 100

// EventsRestarted says whether a notification numbered number (its highest
// event number, or its count of events since the subscription started),
// arriving when the highest seen was highest, shows that the server
// started the subscription's numbering again (its counters lost, or the
// subscription re-created under the same id): number is below highest by
// more than [EventsReorderSpan] and by more than half of highest. A late
// delivery falls behind by the few notifications in flight or retried
// meanwhile; a restarted numbering starts again from 1. A drop that is
// neither (a restart noticed only after the new numbers came close to
// the old ones) is taken for a late delivery, as before; a handshake says
// so at once.
func EventsRestarted(highest, number uint64) bool {
	if number >= highest {
		return false
	}
	drop := highest - number
	return drop > EventsReorderSpan && drop > highest/2
}
