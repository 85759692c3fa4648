package store

import "time"

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

// Span is what one transaction changed of one patient: results may change
// from From on (zero: at any time, the whole patient), and Urgent when a
// blood gas changed. It is what a dirty mark accumulates until an
// evaluation clears it (Dirty.From, Dirty.Urgent).
type Span struct {
	From   time.Time
	Urgent bool
}

// Merge is the span covering both.
func (a Span) Merge(b Span) Span {
	return Span{From: Earliest(a.From, b.From), Urgent: a.Urgent || b.Urgent}
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
