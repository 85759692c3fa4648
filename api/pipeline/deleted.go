package pipeline

import (
	"bytes"
	"errors"
	"fmt"
	"strings"
	"time"

	"github.com/deadspace-fhir/deadspace/derive"
	"github.com/deadspace-fhir/deadspace/fhir/bulk"
	"github.com/deadspace-fhir/deadspace/fhir/decode"
)

// Deletions counts the deletions an input lists and what became of each,
// as the live engine counts what it does with them (engine.DeletionReceipt).
type Deletions struct {
	// Listed are the DELETE entries read that could be applied.
	Listed int
	// Applied: the deletion is the latest version of an Observation the
	// input carries, which contributes nothing.
	Applied int
	// Older: the input carries a newer version (the resource was written
	// again after it was deleted), which stands.
	Older int
	// NotHeld: a resource the input carries no usable version of, a
	// Patient, or another resource type: nothing to do.
	NotHeld int
}

// DeletedOmission is what the version that withdraws a deleted resource
// says: how tells how the deletion was learned and placed in time. The
// live engine stores it (Engine.Deleted) and replay files it (Finish), so
// both order, at a tie, and report a deletion alike.
func DeletedOmission(logical, how string) derive.Omission {
	return derive.Omission{Ref: logical, Reason: derive.ReasonDeleted, Detail: "deleted on the server: " + how}
}

// deletedFrom is how a deletion read among the lines was learned.
const deletedFrom = "a Bundle of DELETE entries among the resources read lists it"

// DeletionsError is a line of DELETE entries some of which cannot be
// applied; the others were. Its text names the entries by position and
// never quotes a resource's id.
type DeletionsError struct {
	// Applied is how many of the line's entries were taken.
	Applied int
	Err     error
}

func (e *DeletionsError) Error() string {
	return fmt.Sprintf("a Bundle of DELETE entries: %d applied, these were not: %s",
		e.Applied, strings.ReplaceAll(e.Err.Error(), "\n", "; "))
}

func (e *DeletionsError) Unwrap() error { return e.Err }

var bundleType = []byte(`"Bundle"`)

// addDeletionLine reads line as a transaction or batch Bundle of DELETE
// entries (bulk.ParseDeletions, the rule backfill reads them by). ok is
// false when it is not one: the line is a resource to decode.
func (c *Collector) addDeletionLine(line []byte) (it decode.Item, ok bool, err error) {
	if !bytes.Contains(line, bundleType) {
		return decode.Item{}, false, nil
	}
	ds, err := bulk.ParseDeletions(line)
	if errors.Is(err, bulk.ErrNotDeletions) {
		return decode.Item{}, false, nil
	}
	c.AddDeletions(ds...)
	it = decode.Item{Type: decode.ItemUnrelated, ResourceType: "Bundle"}
	if err != nil {
		return it, true, &DeletionsError{Applied: len(ds), Err: err}
	}
	return it, true, nil
}

// AddDeletions lists resources deleted on the server. They are applied
// in Finish, after every line is read, whatever the order of lines:
// placed in time by the rule backfill applies them by (bulk.Listed; one
// without a time, for a resource the input carries, goes just before the
// latest version carried, which stands), then ordered against the versions
// read by the one version order, as the live engine orders a deletion
// (Engine.Deleted) against the versions it holds: the later
// meta.lastUpdated wins.
func (c *Collector) AddDeletions(ds ...bulk.Deletion) {
	if len(ds) == 0 {
		return
	}
	if c.deleted == nil {
		c.deleted = bulk.NewListed()
	}
	c.deleted.Add(ds...)
}

// applyDeletions files each deletion as the live engine stores it: an
// unusable version (reason deleted, no versionId, last updated when it was
// deleted) of an Observation of which a version was read, under the
// patient the newest version read names. Version selection (latest) then
// treats it like any version: newest, it withdraws the resource; older
// than a version read, it is superseded. alone are re-coded versions read
// with no other version of their resource, which the live store never
// holds.
func (c *Collector) applyDeletions(alone map[string]bool) Deletions {
	var n Deletions
	if c.deleted == nil {
		return n
	}
	newest := make(map[string]version)
	note := func(v version) {
		if alone[v.logical] || !c.deleted.Lists(v.logical) {
			return
		}
		c.deleted.Carries(v.logical, fromNanos(v.lastUpdated))
		if h, ok := newest[v.logical]; !ok || compare(v, h) > 0 {
			newest[v.logical] = v
		}
	}
	for s, recs := range c.bySubject {
		for i := range recs {
			l, vid := splitRef(recs[i].ref)
			note(version{logical: l, versionID: vid, subject: s, lastUpdated: recs[i].lastUpdated, rec: &recs[i]})
		}
	}
	for i := range c.omitted {
		o := &c.omitted[i]
		if l, vid := splitRef(o.ref); o.subject != "" && l != "" {
			note(version{logical: l, versionID: vid, subject: o.subject, lastUpdated: o.lastUpdated, omitted: o})
		}
	}
	for _, d := range c.deleted.Placed(time.Time{}) {
		n.Listed++
		held, ok := newest[d.Ref()]
		switch {
		case d.Placement == bulk.CarriedStands:
			n.Older++
			continue
		case d.Type != "Observation" || !ok:
			n.NotHeld++
			continue
		}
		at := d.At
		if at.IsZero() {
			// Taken as when it is applied: after every version read.
			at = fromNanos(held.lastUpdated).Add(time.Nanosecond)
		}
		o := &omittedRecord{subject: held.subject, ref: d.Ref(), lastUpdated: nanos(at),
			omission: DeletedOmission(d.Ref(), d.Placement.How(deletedFrom))}
		v := version{logical: d.Ref(), subject: held.subject, lastUpdated: o.lastUpdated, omitted: o}
		if compare(v, held) < 0 {
			n.Older++
		} else {
			n.Applied++
			newest[d.Ref()] = v
		}
		c.omitted = append(c.omitted, *o)
	}
	return n
}
