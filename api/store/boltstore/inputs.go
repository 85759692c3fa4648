package boltstore

import (
	"bytes"
	"cmp"
	"context"
	"fmt"
	"slices"
	"strings"
	"time"

	bolt "go.etcd.io/bbolt"

	"github.com/deadspace-fhir/deadspace/api/store"
)

// appendFill is the page fill for buckets whose keys mostly grow (time or
// sequence first); bbolt's default of one half suits random keys.
const appendFill = 0.9

// markDirty gives the patient a new generation and keeps the earliest
// Since of the marks not yet cleared and the span covering them all.
func markDirty(tx *bolt.Tx, subject string, now time.Time, span store.Span) error {
	b := tx.Bucket(bDirty)
	gen, err := b.NextSequence()
	if err != nil {
		return fmt.Errorf("dirty generation: %w", err)
	}
	since := now
	if v := b.Get([]byte(subject)); v != nil {
		old, err := decodeDirty(subject, v)
		if err != nil {
			return err
		}
		if old.Since.Before(now) {
			since = old.Since
		}
		span = span.Merge(store.Span{From: old.From, Until: old.Until, Urgent: old.Urgent})
	} else if err := addCounter(tx, kDirtyN, 1); err != nil {
		return err
	}
	dt := store.Dirty{Subject: subject, Since: since, Generation: gen, From: span.From, Until: span.Until, Urgent: span.Urgent}
	return b.Put([]byte(subject), encodeDirty(dt))
}

// PutInputs stores the newer versions and marks their patients dirty,
// each patient once per call. The version to beat is the latest stored
// under any patient (the owner index names where it is), so the order of
// versions is one across patients.
func (s *Store) PutInputs(ctx context.Context, inputs []store.Input, now time.Time) ([]store.PutResult, error) {
	results := make([]store.PutResult, len(inputs))
	if len(inputs) == 0 {
		if err := ctx.Err(); err != nil {
			return nil, fmt.Errorf("boltstore.PutInputs: %w", err)
		}
		return results, nil
	}
	err := s.batch(ctx, "PutInputs", func(tx *bolt.Tx) error {
		return putInputs(tx, inputs, now, results)
	})
	if err != nil {
		return nil, err
	}
	return results, nil
}

// PutNotified writes the inputs and the event counter in one transaction,
// so a notification's answer costs one commit; the counter cannot be
// durable without the inputs.
func (s *Store) PutNotified(ctx context.Context, inputs []store.Input, now time.Time, subscription string, number uint64) ([]store.PutResult, uint64, error) {
	results := make([]store.PutResult, len(inputs))
	var prev uint64
	err := s.batch(ctx, "PutNotified", func(tx *bolt.Tx) error {
		if err := putInputs(tx, inputs, now, results); err != nil {
			return err
		}
		var err error
		prev, err = seenEvent(tx, subscription, number)
		return err
	})
	if err != nil {
		return nil, 0, err
	}
	return results, prev, nil
}

// putInputs applies inputs in order, writing each one's result into
// results, and marks every changed patient dirty once.
func putInputs(tx *bolt.Tx, inputs []store.Input, now time.Time, results []store.PutResult) error {
	var changed []string
	spans := map[string]store.Span{}
	for i, in := range inputs {
		if err := checkSubject(in.Subject); err != nil {
			return fmt.Errorf("input %d: %w", i, err)
		}
		if in.Logical == "" {
			return fmt.Errorf("input %d: empty logical reference", i)
		}
		res, touched, err := putInput(tx, in, now)
		if err != nil {
			return fmt.Errorf("input %d: %w", i, err)
		}
		results[i] = res
		for subject, span := range touched {
			if prev, ok := spans[subject]; ok {
				span = prev.Merge(span)
			} else {
				changed = append(changed, subject)
			}
			spans[subject] = span
		}
	}
	for _, subject := range changed {
		if err := markDirty(tx, subject, now, spans[subject]); err != nil {
			return err
		}
	}
	return nil
}

// putInput applies one input and returns the subjects whose inputs
// changed, with the span of each change.
func putInput(tx *bolt.Tx, in store.Input, now time.Time) (store.PutResult, map[string]store.Span, error) {
	logical := []byte(in.Logical)
	pl, err := getPlaces(tx, logical)
	if err != nil {
		return 0, nil, err
	}
	owner := pl.owner()
	// The version to beat is the latest stored: the owner's copy, under any
	// patient; without one (pruned), the version kept of it (keptSubject),
	// or the copy under this subject. A copy under this subject that is
	// not the owner's is a withdrawal, which carries the version that
	// moved the input away, never newer than the owner's: it refuses only
	// a strictly older version, and is read for what it changed.
	exists, decided, replacedHere := false, false, false
	span := store.SpanOf(in)
	replaces, keep := false, time.Time{} // the latest row time of what this version replaces
	for i, subject := range []string{owner, keptSubject, in.Subject} {
		if subject == "" || (i > 0 && subject == owner) {
			continue // no copy there, or the owner's, read already
		}
		t := pl.timeOf(subject)
		old, ok, err := inputHeadAt(tx, subject, in.Logical, t)
		if err != nil {
			return 0, nil, err
		}
		if !ok {
			continue
		}
		c := store.CompareVersions(in, old)
		if subject != keptSubject {
			exists = true
			if !decided {
				c = store.CompareStored(in, old)
			}
		}
		if !decided || c < 0 {
			decided = true
			if c <= 0 {
				return store.ResultOf(true, c), nil, nil
			}
		}
		replaces, keep = true, latestTime(keep, parseTimeKey(t))
		if subject == in.Subject {
			// The replaced version's results change too.
			span = span.Replacing(in, old.EffectiveAt, old.Payload)
			replacedHere = true
		}
	}
	if in.OnlyReplaces && !exists {
		return store.PutSkipped, nil, nil
	}
	// An inert version changes no result of its own: its patient changes
	// only when it replaces a version there.
	touched := map[string]store.Span{}
	if !in.Inert || replacedHere {
		touched[in.Subject] = span
	}
	res := store.ResultOf(exists, 1)
	if owner != "" && owner != in.Subject && len(in.Withdrawal) > 0 {
		if old, ok, err := inputHeadAt(tx, owner, in.Logical, pl.timeOf(owner)); err != nil {
			return 0, nil, err
		} else if ok {
			moved := in
			moved.Subject, moved.Payload = owner, in.Withdrawal
			if err := writeInput(tx, &pl, moved); err != nil {
				return 0, nil, err
			}
			touched[owner] = store.MovedAway(in, old.EffectiveAt, old.Payload)
			res = store.PutMoved
		}
	}
	if err := writeInput(tx, &pl, in); err != nil {
		return 0, nil, err
	}
	pl.own(in.Subject)
	if replaces {
		if err := keepVersion(tx, &pl, in, latestTime(keep, now)); err != nil {
			return 0, nil, err
		}
	}
	if err := putPlaces(tx, logical, pl); err != nil {
		return 0, nil, err
	}
	return res, touched, nil
}

// keptSubject files, in input_rows and in an input's places, the version
// kept of an input whose rows may be pruned before an older version of it
// can no longer arrive: a row with the newest version's id and
// last-updated time and no payload, at the time until which it is kept.
// No patient has this subject (checkSubject refuses it), so no patient's
// inputs list it; Prune removes it like any row once its time is past the
// horizon.
//
// A version that replaces others is kept until the latest of the row
// times of the versions it replaced and the time it arrived (now): a late
// copy of a version it superseded is refused for a retention after the
// newest version arrived, and for as long as that copy's own effective
// time is within the retention (the engine refuses it by its time after
// that), even when the newest version's row goes first (a correction
// that moves the sample time earlier, or to another patient). When its
// own row outlives both, nothing more is kept.
const keptSubject = "\x01kept"

// keepVersion records in's version as the one kept of its input until
// until, or drops what was kept when in's own row lasts as long.
func keepVersion(tx *bolt.Tx, pl *places, in store.Input, until time.Time) error {
	if !until.After(in.EffectiveAt) {
		if t := pl.timeOf(keptSubject); t != nil {
			if err := tx.Bucket(bInputRows).Delete(rowKey(subjectPrefix(keptSubject), t, []byte(in.Logical))); err != nil {
				return err
			}
			pl.remove(keptSubject)
		}
		return nil
	}
	return writeInput(tx, pl, store.Input{Subject: keptSubject, Logical: in.Logical, VersionID: in.VersionID, LastUpdated: in.LastUpdated, EffectiveAt: until})
}

func latestTime(a, b time.Time) time.Time {
	if a.After(b) {
		return a
	}
	return b
}

// inputHeadAt reads the version of subject's stored input, whose row is
// at time key t (nil: subject has none), with its payload as a slice of
// the transaction's page (valid only within it).
func inputHeadAt(tx *bolt.Tx, subject, logical string, t []byte) (store.Input, bool, error) {
	v, err := rowAt(tx, subject, logical, t)
	if v == nil || err != nil {
		return store.Input{}, false, err
	}
	id, lu, eff, payload, err := splitInput(v)
	if err != nil {
		return store.Input{}, false, err
	}
	return store.Input{Subject: subject, Logical: logical, VersionID: string(id), LastUpdated: lu, EffectiveAt: eff, Payload: payload}, true, nil
}

// inputRow returns the stored record of an input, nil when there is none:
// its place gives the time that finds its row.
func inputRow(tx *bolt.Tx, subject, logical string) ([]byte, error) {
	pl, err := getPlaces(tx, []byte(logical))
	if err != nil {
		return nil, err
	}
	return rowAt(tx, subject, logical, pl.timeOf(subject))
}

// rowAt returns the row of subject's input at time key t, nil when t is.
func rowAt(tx *bolt.Tx, subject, logical string, t []byte) ([]byte, error) {
	if t == nil {
		return nil, nil
	}
	key := subjectKey(subject, logical)
	prefix := key[:len(subject)+1]
	v := tx.Bucket(bInputRows).Get(rowKey(prefix, t, key[len(prefix):]))
	if v == nil {
		return nil, fmt.Errorf("%w: an input's row is missing at its time", ErrCorrupt)
	}
	return v, nil
}

// writeInput replaces the copy under in.Subject: its row moves to the new
// effective time, and its place in pl follows it (the caller writes pl).
func writeInput(tx *bolt.Tx, pl *places, in store.Input) error {
	rows := tx.Bucket(bInputRows)
	// Readings arrive nearly in time order, so a patient's rows grow at
	// the end of its range: pages filled to 90 % rather than half stay
	// that way.
	rows.FillPercent = appendFill
	key := subjectKey(in.Subject, in.Logical)
	prefix, logical := key[:len(in.Subject)+1], key[len(in.Subject)+1:]
	if old := pl.timeOf(in.Subject); old != nil {
		if err := rows.Delete(rowKey(prefix, old, logical)); err != nil {
			return err
		}
	}
	t := appendTimeKey(nil, in.EffectiveAt)
	if err := rows.Put(rowKey(prefix, t, logical), encodeInput(in)); err != nil {
		return err
	}
	pl.set(in.Subject, t)
	return nil
}

// Inputs returns the patient's inputs: every row under the subject.
func (s *Store) Inputs(ctx context.Context, subject string) ([]store.Input, error) {
	return s.inputsFrom(ctx, "Inputs", subject, time.Time{})
}

// InputsFrom seeks the patient's first row at or after from and reads on
// to the end of the patient's rows: the rows before from are not read, so
// the cost follows what is returned, not the retained history.
func (s *Store) InputsFrom(ctx context.Context, subject string, from time.Time) ([]store.Input, error) {
	return s.inputsFrom(ctx, "InputsFrom", subject, from)
}

// inputsFrom is Inputs and InputsFrom (every row when from is zero): the
// rows' key order (time, then logical) is the contract's order.
func (s *Store) inputsFrom(ctx context.Context, op, subject string, from time.Time) ([]store.Input, error) {
	var out []store.Input
	err := s.view(ctx, op, func(tx *bolt.Tx) error {
		// A first walk sizes the range, so that the inputs, their strings
		// and their payloads take one allocation each rather than a few
		// per input (an evaluation reads hundreds of them).
		n, nameBytes, payloadBytes := 0, 0, 0
		err := eachInputRow(tx, subject, from, func(logical, version, payload []byte) error {
			n, nameBytes, payloadBytes = n+1, nameBytes+len(logical)+len(version), payloadBytes+len(payload)
			return nil
		})
		if err != nil || n == 0 {
			return err
		}
		out = make([]store.Input, 0, n)
		// Logical references and version ids go into one string,
		// payloads into one byte slice; ends[i] are input i's ends of its
		// logical reference and version id in the string.
		names := make([]byte, 0, nameBytes)
		payloads := make([]byte, 0, payloadBytes)
		ends := make([]int, 0, 2*n)
		err = eachInputRowTimed(tx, subject, from, func(logical, version []byte, lastUpdated, effectiveAt time.Time, payload []byte) error {
			in := store.Input{Subject: subject, LastUpdated: lastUpdated, EffectiveAt: effectiveAt}
			names = append(names, logical...)
			names = append(names, version...)
			ends = append(ends, len(names)-len(version), len(names))
			if len(payload) > 0 {
				start := len(payloads)
				payloads = append(payloads, payload...)
				in.Payload = payloads[start:len(payloads):len(payloads)]
			}
			out = append(out, in)
			return nil
		})
		if err != nil {
			return err
		}
		all, start := string(names), 0
		for i := range out {
			out[i].Logical, out[i].VersionID = all[start:ends[2*i]], all[ends[2*i]:ends[2*i+1]]
			start = ends[2*i+1]
		}
		return nil
	})
	if err != nil {
		return nil, err
	}
	return out, nil
}

// ScanInputsFrom shows the rows InputsFrom would return, in its order,
// as slices of the memory map: nothing is copied, and the times, which an
// evaluation does not read, are checked but not decoded.
func (s *Store) ScanInputsFrom(ctx context.Context, subject string, from time.Time, fn func(store.InputRow) error) error {
	return s.view(ctx, "ScanInputsFrom", func(tx *bolt.Tx) error {
		return eachInputRow(tx, subject, from, func(logical, version, payload []byte) error {
			return fn(store.InputRow{Logical: logical, VersionID: version, Payload: payload})
		})
	})
}

// eachInputRow calls fn with the logical reference, version and payload
// of each of subject's rows effective from from on (every row when from is
// zero), in key order, as slices of tx's pages (their capacity ends with
// them, so an append copies instead of writing into the map).
func eachInputRow(tx *bolt.Tx, subject string, from time.Time, fn func(logical, version, payload []byte) error) error {
	return walkInputRows(tx, subject, from, func(logical, v []byte) error {
		version, payload, err := splitInputPayload(v)
		if err != nil {
			return err
		}
		return fn(logical, version, payload)
	})
}

// eachInputRowTimed is eachInputRow with the row's times decoded.
func eachInputRowTimed(tx *bolt.Tx, subject string, from time.Time, fn func(logical, version []byte, lastUpdated, effectiveAt time.Time, payload []byte) error) error {
	return walkInputRows(tx, subject, from, func(logical, v []byte) error {
		version, lastUpdated, effectiveAt, payload, err := splitInput(v)
		if err != nil {
			return err
		}
		return fn(logical, version, lastUpdated, effectiveAt, payload)
	})
}

// walkInputRows seeks subject's first row at or after from and calls fn
// with each row's logical reference and value to the end of its rows.
func walkInputRows(tx *bolt.Tx, subject string, from time.Time, fn func(logical, v []byte) error) error {
	prefix := subjectPrefix(subject)
	seek := prefix
	if !from.IsZero() {
		seek = appendTimeKey(bytes.Clone(prefix), from)
	}
	c := tx.Bucket(bInputRows).Cursor()
	for k, v := c.Seek(seek); k != nil && bytes.HasPrefix(k, prefix); k, v = c.Next() {
		if len(k) < len(prefix)+timeKeyLen {
			return fmt.Errorf("%w: input row key of %d bytes", ErrCorrupt, len(k))
		}
		if err := fn(k[len(prefix)+timeKeyLen:len(k):len(k)], v[:len(v):len(v)]); err != nil {
			return err
		}
	}
	return nil
}

// Input returns one stored input, or ErrNotFound.
func (s *Store) Input(ctx context.Context, subject, logical string) (store.Input, error) {
	var in store.Input
	err := s.view(ctx, "Input", func(tx *bolt.Tx) error {
		v, err := inputRow(tx, subject, logical)
		if err != nil {
			return err
		}
		if v == nil {
			return notFound("input")
		}
		in, err = decodeInput(subject, logical, v)
		return err
	})
	return in, err
}

// PutPatient stores newer facts and marks the patient dirty. A fetch that
// brings nothing newer still advances FetchedAt: it records when the
// service last read the resource, and a caller refreshing stale facts
// would otherwise fetch again and again.
func (s *Store) PutPatient(ctx context.Context, p store.Patient, now time.Time) (store.PutResult, error) {
	var res store.PutResult
	err := s.batch(ctx, "PutPatient", func(tx *bolt.Tx) error {
		if err := checkSubject(p.Subject); err != nil {
			return err
		}
		b := tx.Bucket(bPatients)
		key := []byte(p.Subject)
		v := b.Get(key)
		var c int
		var stored []byte
		if v != nil {
			old, err := decodePatient(p.Subject, v)
			if err != nil {
				return err
			}
			stored = old.Payload
			c = store.ComparePatients(p, old)
			if c <= 0 {
				res = store.ResultOf(true, c)
				if !p.FetchedAt.After(old.FetchedAt) {
					return nil
				}
				old.FetchedAt = p.FetchedAt
				return b.Put(key, encodePatient(old))
			}
		}
		res = store.ResultOf(v != nil, c)
		if err := b.Put(key, encodePatient(p)); err != nil {
			return err
		}
		return markDirty(tx, p.Subject, now, store.PatientChange(p, stored, v != nil))
	})
	if err != nil {
		return 0, err
	}
	return res, nil
}

// Patient returns stored facts, or ErrNotFound.
func (s *Store) Patient(ctx context.Context, subject string) (store.Patient, error) {
	var p store.Patient
	err := s.view(ctx, "Patient", func(tx *bolt.Tx) error {
		v := tx.Bucket(bPatients).Get([]byte(subject))
		if v == nil {
			return notFound("patient")
		}
		var err error
		p, err = decodePatient(subject, v)
		return err
	})
	return p, err
}

// MarkDirty always counts as a change: it is how a caller asks for one
// more evaluation, so it must also defeat a Commit of an evaluation that
// started before it.
func (s *Store) MarkDirty(ctx context.Context, subject string, now time.Time) error {
	return s.batch(ctx, "MarkDirty", func(tx *bolt.Tx) error {
		if err := checkSubject(subject); err != nil {
			return err
		}
		return markDirty(tx, subject, now, store.Span{})
	})
}

// DirtyPatients lists the marks by Since, then Subject. The bucket holds
// only patients awaiting evaluation, so it is read whole and sorted.
func (s *Store) DirtyPatients(ctx context.Context) ([]store.Dirty, error) {
	var out []store.Dirty
	err := s.view(ctx, "DirtyPatients", func(tx *bolt.Tx) error {
		return tx.Bucket(bDirty).ForEach(func(k, v []byte) error {
			dt, err := decodeDirty(string(k), v)
			if err != nil {
				return err
			}
			if s.clears.hidden(dt) {
				return nil // cleared by an evaluation, written later
			}
			out = append(out, dt)
			return nil
		})
	})
	if err != nil {
		return nil, err
	}
	slices.SortStableFunc(out, func(a, b store.Dirty) int {
		if a.Urgent != b.Urgent {
			if a.Urgent {
				return -1
			}
			return 1
		}
		return cmp.Or(a.Since.Compare(b.Since), strings.Compare(a.Subject, b.Subject))
	})
	return out, nil
}

// Prune visits each patient's rows from the first, up to the horizon:
// one seek per patient, then only rows it deletes. A row that its input's
// place does not point at (left behind by a bug) is deleted too, but not
// counted; the input's current row, at its own time, is kept.
func (s *Store) Prune(ctx context.Context, horizon time.Time) (int, error) {
	var n int
	err := s.update(ctx, "Prune", func(tx *bolt.Tx) error {
		n = 0
		rows := tx.Bucket(bInputRows)
		var stale [][]byte
		c := rows.Cursor()
		k, _ := c.First()
		for k != nil {
			i := bytes.IndexByte(k, sep)
			if i < 0 || len(k) < i+1+timeKeyLen {
				return fmt.Errorf("%w: input row key without a subject and time", ErrCorrupt)
			}
			prefix := bytes.Clone(k[:i+1])
			for ; k != nil && bytes.HasPrefix(k, prefix); k, _ = c.Next() {
				if len(k) < len(prefix)+timeKeyLen {
					return fmt.Errorf("%w: input row key of %d bytes", ErrCorrupt, len(k))
				}
				if !parseTimeKey(k[len(prefix):]).Before(horizon) {
					break
				}
				stale = append(stale, bytes.Clone(k))
			}
			// The next patient: subject 1 sorts after every key of
			// subject 0 and before any longer subject.
			prefix[len(prefix)-1] = sep + 1
			k, _ = c.Seek(prefix)
		}
		for _, k := range stale {
			if err := rows.Delete(k); err != nil {
				return err
			}
			i := bytes.IndexByte(k, sep)
			subject, t, logical := string(k[:i]), k[i+1:i+1+timeKeyLen], k[i+1+timeKeyLen:]
			pl, err := getPlaces(tx, logical)
			if err != nil {
				return err
			}
			if !bytes.Equal(pl.timeOf(subject), t) {
				continue
			}
			// The owner follows the latest version only: when the pruned
			// copy was that one, the input is left without an owner.
			pl.remove(subject)
			if err := putPlaces(tx, logical, pl); err != nil {
				return err
			}
			if subject != keptSubject {
				n++
			}
		}
		return nil
	})
	if err != nil {
		return 0, err
	}
	return n, nil
}

// Owner returns the subject under which the latest stored version of an
// input was filed, or ErrNotFound.
func (s *Store) Owner(ctx context.Context, logical string) (string, error) {
	var subject string
	err := s.view(ctx, "Owner", func(tx *bolt.Tx) error {
		pl, err := getPlaces(tx, []byte(logical))
		if err != nil {
			return err
		}
		if subject = pl.owner(); subject == "" {
			return store.ErrNotFound
		}
		return nil
	})
	if err != nil {
		return "", err
	}
	return subject, nil
}

var _ store.Holder = (*Store)(nil)

// Held reads, in one transaction, whether each input has an owner, as
// Owner would.
func (s *Store) Held(ctx context.Context, logicals []string) ([]bool, error) {
	out := make([]bool, len(logicals))
	err := s.view(ctx, "Held", func(tx *bolt.Tx) error {
		for i, l := range logicals {
			pl, err := getPlaces(tx, []byte(l))
			if err != nil {
				return err
			}
			out[i] = pl.owner() != ""
		}
		return nil
	})
	if err != nil {
		return nil, err
	}
	return out, nil
}
