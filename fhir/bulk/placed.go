package bulk

import "time"

// Listed holds the deletions an input lists (an export's deleted files, or
// Bundles of DELETE entries among NDJSON files) and notes the versions the
// same input carries of each resource they name, so that a deletion
// without a time can be placed among those versions ([Listed.Placed]).
// It is the one rule backfill and replay place deletions by; the version
// order then decides (fhir/ref.Compare: the later meta.lastUpdated wins).
// One small record is kept per deletion.
type Listed struct {
	list  []listed
	byRef map[string][]int
}

type listed struct {
	Deletion
	// carried is the latest meta.lastUpdated of a version of the resource
	// the input carries (zero when that version has none); inInput says
	// there is one.
	carried time.Time
	inInput bool
}

// NewListed returns an empty list of deletions.
func NewListed() *Listed { return &Listed{byRef: map[string][]int{}} }

// Add lists deletions.
func (l *Listed) Add(ds ...Deletion) {
	for _, d := range ds {
		l.byRef[d.Ref()] = append(l.byRef[d.Ref()], len(l.list))
		l.list = append(l.list, listed{Deletion: d})
	}
}

// Len is how many deletions are listed.
func (l *Listed) Len() int { return len(l.list) }

// Lists reports whether a deletion names logical ("Type/id").
func (l *Listed) Lists(logical string) bool {
	_, ok := l.byRef[logical]
	return ok
}

// Wanted reports whether a resource of resourceType read from the input
// may be one a deletion names (a Bundle is never one).
func (l *Listed) Wanted(resourceType string) bool {
	return len(l.byRef) > 0 && resourceType != "" && resourceType != "Bundle"
}

// Carries notes a version of logical the input carries, last updated at
// lastUpdated (zero when it says nothing, or nothing readable).
func (l *Listed) Carries(logical string, lastUpdated time.Time) {
	for _, i := range l.byRef[logical] {
		p := &l.list[i]
		if !p.inInput || lastUpdated.After(p.carried) {
			p.carried = lastUpdated
		}
		p.inInput = true
	}
}

// Placement says how a deletion was placed in time.
type Placement int

// How a deletion is placed.
const (
	// AtEntry: at the time its entry gives (response.lastModified).
	AtEntry Placement = iota
	// BeforeCarried: without a time, for a resource the input also
	// carries: just before the latest version it carries. An export shows
	// each resource as of its transactionTime, so one it carries was
	// written again after it was deleted, and that version stands.
	BeforeCarried
	// CarriedStands: without a time, for a resource the input carries
	// only in a version without meta.lastUpdated, which leaves no time to
	// place the deletion before: that version stands, as a newer one
	// would, and the deletion is not applied (At is zero).
	CarriedStands
	// AtTransactionTime: without a time, for a resource an export does
	// not carry: at the export's transactionTime, the latest instant the
	// deletion can have happened, after every version known up to that
	// export and before any written since.
	AtTransactionTime
	// WhenApplied: without a time, for a resource local files do not
	// carry: when it is applied (At is zero), as the live service applies
	// a deletion it learns of without a time.
	WhenApplied
)

// How says, for the stored record, how a deletion placed so was learned
// and placed; from says where it was listed ("a Bulk Data export's
// deleted file lists it").
func (p Placement) How(from string) string {
	switch p {
	case BeforeCarried:
		return from + " without a time, and the input also carries it: taken as before the version carried"
	case CarriedStands:
		return from + " without a time, and the input also carries it without a time: that version stands"
	case AtTransactionTime:
		return from + " without a time: taken as at the export's transactionTime"
	case WhenApplied:
		return from + " without a time: taken as when it was applied"
	}
	return from + ", at the time its entry gives"
}

// Placed is a deletion with its time as placed.
type Placed struct {
	Deletion
	Placement Placement
}

// Placed places every deletion listed, in the order they were listed. A
// deletion whose entry gives a time keeps it. One without a time is placed
// by what the input says: just before the latest version the input
// carries (BeforeCarried; CarriedStands when that version has no time),
// or, for a resource it does not carry, at transactionTime when it is not
// zero (an export), else when it is applied (local files).
func (l *Listed) Placed(transactionTime time.Time) []Placed {
	out := make([]Placed, 0, len(l.list))
	for _, p := range l.list {
		d := Placed{Deletion: p.Deletion}
		switch {
		case !p.At.IsZero():
			d.Placement = AtEntry
		case p.inInput && p.carried.IsZero():
			d.Placement = CarriedStands
		case p.inInput:
			d.Placement, d.At = BeforeCarried, p.carried.Add(-time.Nanosecond)
		case !transactionTime.IsZero():
			d.Placement, d.At = AtTransactionTime, transactionTime
		default:
			d.Placement = WhenApplied
		}
		out = append(out, d)
	}
	return out
}
