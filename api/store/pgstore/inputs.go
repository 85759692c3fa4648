package pgstore

import (
	"context"
	"errors"
	"fmt"
	"time"

	"github.com/jackc/pgx/v5"

	"github.com/deadspace-fhir/deadspace/api/store"
)

var _ store.Store = (*Store)(nil)

// lockKeys takes a transaction-scoped advisory lock on each name, in the
// order of their lock keys so that two transactions locking overlapping
// sets cannot deadlock. It is how PutInputs keeps its checks and writes
// from interleaving with another replica's for the same resources.
func lockKeys(ctx context.Context, tx pgx.Tx, names []string) error {
	_, err := tx.Exec(ctx, `
		SELECT pg_advisory_xact_lock(k)
		  FROM (SELECT DISTINCT hashtextextended(n, 0) AS k FROM unnest($1::text[]) AS n ORDER BY k) AS keys`, names)
	return err
}

// PutInputs stores the newer versions and marks their patients dirty, each
// patient once per call, in one transaction that holds a lock per input
// resource: a concurrent call on another replica for the same resource
// waits rather than interleaving its checks with these writes. The version
// to beat is the latest stored under any patient (input_owner names where
// it is), so the order of versions is one across patients.
func (s *Store) PutInputs(ctx context.Context, inputs []store.Input, now time.Time) ([]store.PutResult, error) {
	results := make([]store.PutResult, len(inputs))
	if len(inputs) == 0 {
		if err := ctx.Err(); err != nil {
			return nil, fmt.Errorf("pgstore.PutInputs: %w", err)
		}
		return results, nil
	}
	logicals := make([]string, len(inputs))
	for i, in := range inputs {
		if err := checkSubject(in.Subject); err != nil {
			return nil, fmt.Errorf("pgstore.PutInputs: input %d: %w", i, err)
		}
		if in.Logical == "" {
			return nil, fmt.Errorf("pgstore.PutInputs: input %d: empty logical reference", i)
		}
		logicals[i] = in.Logical
	}
	err := s.inTx(ctx, "PutInputs", func(tx pgx.Tx) error {
		if err := lockKeys(ctx, tx, logicals); err != nil {
			return err
		}
		var changed []string
		spans := map[string]store.Span{}
		for i, in := range inputs {
			res, touched, err := putInput(ctx, tx, in, now)
			if err != nil {
				return fmt.Errorf("input %d: %w", i, err)
			}
			results[i] = res
			for _, t := range touched {
				if prev, ok := spans[t.subject]; ok {
					spans[t.subject] = prev.Merge(t.span)
				} else {
					changed = append(changed, t.subject)
					spans[t.subject] = t.span
				}
			}
		}
		for _, subject := range changed {
			if err := markDirty(ctx, tx, subject, now, spans[subject]); err != nil {
				return err
			}
		}
		return nil
	})
	if err != nil {
		return nil, err
	}
	return results, nil
}

// touched is a patient whose inputs one put changed, and how.
type touched struct {
	subject string
	span    store.Span
}

// putInput applies one input under the resource's lock and returns the
// patients whose inputs changed (the embedded store's rule, step for
// step).
func putInput(ctx context.Context, tx pgx.Tx, in store.Input, now time.Time) (store.PutResult, []touched, error) {
	var owner, keptID *string
	var keptUpdated, keptUntil *int64
	err := tx.QueryRow(ctx, `
		SELECT o.subject, k.version_id, k.last_updated_ns, k.until_ns
		  FROM (SELECT $1::text AS logical) q
		  LEFT JOIN input_owner o ON o.logical = q.logical
		  LEFT JOIN input_kept k ON k.logical = q.logical`, in.Logical).Scan(&owner, &keptID, &keptUpdated, &keptUntil)
	if err != nil {
		return 0, nil, err
	}
	ownerSubject := ""
	if owner != nil {
		ownerSubject = *owner
	}
	// The version to beat is the latest stored: the owner's copy, under any
	// patient; without one (pruned), the version kept of it (input_kept),
	// or the copy under this subject. A copy under this subject that is
	// not the owner's is a withdrawal, never newer than the owner's: it
	// refuses only a strictly older version, and is read for what it
	// changed.
	exists, ownerHasCopy, decided, replacedHere := false, false, false, false
	var ownerCopy store.Input // the owner's stored copy, when it has one
	sp := store.SpanOf(in)
	var keep int64 // the latest effective time of what this version replaces
	decide := func(old store.Input, kept bool) (store.PutResult, bool) {
		c := store.CompareVersions(in, old)
		if !kept && !decided {
			c = store.CompareStored(in, old)
		}
		if !decided || c < 0 {
			decided = true
			if c <= 0 {
				return store.ResultOf(true, c), true
			}
		}
		return 0, false
	}
	for i, subject := range []string{ownerSubject, "", in.Subject} {
		if i == 1 {
			if keptID == nil {
				continue
			}
			if res, done := decide(store.Input{VersionID: *keptID, LastUpdated: fromNanos(*keptUpdated)}, true); done {
				return res, nil, nil
			}
			keep = max(keep, *keptUntil)
			continue
		}
		if subject == "" || (i == 2 && subject == ownerSubject) {
			continue // no copy there, or the owner's, read already
		}
		old := store.Input{Subject: subject, Logical: in.Logical}
		var lu, eff int64
		err := tx.QueryRow(ctx, `SELECT version_id, last_updated_ns, effective_ns, payload FROM inputs WHERE subject = $1 AND logical = $2`,
			subject, in.Logical).Scan(&old.VersionID, &lu, &eff, &old.Payload)
		if errors.Is(err, pgx.ErrNoRows) {
			continue
		}
		if err != nil {
			return 0, nil, err
		}
		old.LastUpdated, old.EffectiveAt = fromNanos(lu), fromNanos(eff)
		exists = true
		if subject == ownerSubject {
			ownerHasCopy, ownerCopy = true, old
		}
		if res, done := decide(old, false); done {
			return res, nil, nil
		}
		keep = max(keep, eff)
		if subject == in.Subject {
			// The replaced version's results change too.
			sp = sp.Replacing(in, old.EffectiveAt, old.Payload)
			replacedHere = true
		}
	}
	if in.OnlyReplaces && !exists {
		return store.PutSkipped, nil, nil
	}
	// An inert version changes no result of its own: its patient changes
	// only when it replaces a version there.
	var changed []touched
	if !in.Inert || replacedHere {
		changed = append(changed, touched{in.Subject, sp})
	}
	res := store.ResultOf(exists, 1)
	if ownerSubject != "" && ownerSubject != in.Subject && len(in.Withdrawal) > 0 && ownerHasCopy {
		moved := in
		moved.Subject, moved.Payload = ownerSubject, in.Withdrawal
		if err := writeInput(ctx, tx, moved); err != nil {
			return 0, nil, err
		}
		changed = append(changed, touched{ownerSubject, store.MovedAway(in, ownerCopy.EffectiveAt, ownerCopy.Payload)})
		res = store.PutMoved
	}
	if err := writeInput(ctx, tx, in); err != nil {
		return 0, nil, err
	}
	if _, err := tx.Exec(ctx, `INSERT INTO input_owner (logical, subject) VALUES ($1, $2)
		ON CONFLICT (logical) DO UPDATE SET subject = EXCLUDED.subject`, in.Logical, in.Subject); err != nil {
		return 0, nil, err
	}
	if keptID != nil || exists {
		// A version that replaced others is kept until the latest of their
		// effective times and its arrival, unless its own row lasts as long
		// (the embedded store's keptSubject).
		until := max(keep, nanos(now))
		if until > nanos(in.EffectiveAt) {
			_, err = tx.Exec(ctx, `INSERT INTO input_kept (logical, version_id, last_updated_ns, until_ns) VALUES ($1, $2, $3, $4)
				ON CONFLICT (logical) DO UPDATE SET version_id = EXCLUDED.version_id,
				   last_updated_ns = EXCLUDED.last_updated_ns, until_ns = EXCLUDED.until_ns`,
				in.Logical, in.VersionID, nanos(in.LastUpdated), until)
		} else if keptID != nil {
			_, err = tx.Exec(ctx, `DELETE FROM input_kept WHERE logical = $1`, in.Logical)
		}
	}
	return res, changed, err
}

// writeInput replaces the copy under in.Subject.
func writeInput(ctx context.Context, tx pgx.Tx, in store.Input) error {
	payload := in.Payload
	if payload == nil {
		payload = []byte{}
	}
	_, err := tx.Exec(ctx, `
		INSERT INTO inputs (subject, logical, version_id, last_updated_ns, effective_ns, payload)
		VALUES ($1, $2, $3, $4, $5, $6)
		ON CONFLICT (subject, logical) DO UPDATE
		   SET version_id = EXCLUDED.version_id, last_updated_ns = EXCLUDED.last_updated_ns,
		       effective_ns = EXCLUDED.effective_ns, payload = EXCLUDED.payload`,
		in.Subject, in.Logical, in.VersionID, nanos(in.LastUpdated), nanos(in.EffectiveAt), payload)
	return err
}

func scanInput(row pgx.CollectableRow) (store.Input, error) {
	var in store.Input
	var lu, eff int64
	err := row.Scan(&in.Subject, &in.Logical, &in.VersionID, &lu, &eff, &in.Payload)
	in.LastUpdated, in.EffectiveAt = fromNanos(lu), fromNanos(eff)
	return in, err
}

const inputColumns = `subject, logical, version_id, last_updated_ns, effective_ns, payload`

// Inputs returns the patient's inputs in EffectiveAt, then Logical order.
func (s *Store) Inputs(ctx context.Context, subject string) ([]store.Input, error) {
	return s.queryInputs(ctx, "Inputs", `subject = $1`, subject)
}

// InputsFrom returns the patient's inputs effective at or after from.
func (s *Store) InputsFrom(ctx context.Context, subject string, from time.Time) ([]store.Input, error) {
	if from.IsZero() {
		return s.Inputs(ctx, subject) // zero is stored as 0 ns, after times before 1970
	}
	return s.queryInputs(ctx, "InputsFrom", `subject = $1 AND effective_ns >= $2`, subject, nanos(from))
}

// queryInputs returns the inputs matching where, in EffectiveAt, then
// Logical order.
func (s *Store) queryInputs(ctx context.Context, op, where string, args ...any) ([]store.Input, error) {
	var out []store.Input
	err := s.run(ctx, op, func(q querier) error {
		rows, err := q.Query(ctx, `SELECT `+inputColumns+` FROM inputs WHERE `+where+` ORDER BY effective_ns, logical`, args...)
		if err != nil {
			return err
		}
		out, err = pgx.CollectRows(rows, scanInput)
		return err
	})
	if err != nil {
		return nil, err
	}
	return out, nil
}

// Input returns one stored input, or ErrNotFound.
func (s *Store) Input(ctx context.Context, subject, logical string) (store.Input, error) {
	var in store.Input
	err := s.run(ctx, "Input", func(q querier) error {
		rows, err := q.Query(ctx, `SELECT `+inputColumns+` FROM inputs WHERE subject = $1 AND logical = $2`, subject, logical)
		if err != nil {
			return err
		}
		in, err = pgx.CollectExactlyOneRow(rows, scanInput)
		if errors.Is(err, pgx.ErrNoRows) {
			return notFound("input")
		}
		return err
	})
	return in, err
}

// Owner returns the subject under which the latest stored version of an
// input was filed, or ErrNotFound.
func (s *Store) Owner(ctx context.Context, logical string) (string, error) {
	var subject string
	err := s.run(ctx, "Owner", func(q querier) error {
		err := q.QueryRow(ctx, `SELECT subject FROM input_owner WHERE logical = $1`, logical).Scan(&subject)
		if errors.Is(err, pgx.ErrNoRows) {
			return notFound("input owner")
		}
		return err
	})
	if err != nil {
		return "", err
	}
	return subject, nil
}

// PutPatient stores newer facts and marks the patient dirty. A fetch that
// brings nothing newer still advances FetchedAt, as in the embedded store.
func (s *Store) PutPatient(ctx context.Context, p store.Patient, now time.Time) (store.PutResult, error) {
	if err := checkSubject(p.Subject); err != nil {
		return 0, fmt.Errorf("pgstore.PutPatient: %w", err)
	}
	var res store.PutResult
	err := s.inTx(ctx, "PutPatient", func(tx pgx.Tx) error {
		if err := lockKeys(ctx, tx, []string{"patient " + p.Subject}); err != nil {
			return err
		}
		old := store.Patient{Subject: p.Subject}
		var oldUpdated, oldFetched int64
		err := tx.QueryRow(ctx, `SELECT version_id, last_updated_ns, fetched_at_ns, payload FROM patients WHERE subject = $1`, p.Subject).
			Scan(&old.VersionID, &oldUpdated, &oldFetched, &old.Payload)
		exists := err == nil
		if err != nil && !errors.Is(err, pgx.ErrNoRows) {
			return err
		}
		c := 0
		if exists {
			old.LastUpdated = fromNanos(oldUpdated)
			c = store.ComparePatients(p, old)
		}
		res = store.ResultOf(exists, c)
		if exists && c <= 0 {
			if nanos(p.FetchedAt) > oldFetched {
				_, err := tx.Exec(ctx, `UPDATE patients SET fetched_at_ns = $2 WHERE subject = $1`, p.Subject, nanos(p.FetchedAt))
				return err
			}
			return nil
		}
		payload := p.Payload
		if payload == nil {
			payload = []byte{}
		}
		if _, err := tx.Exec(ctx, `
			INSERT INTO patients (subject, version_id, last_updated_ns, fetched_at_ns, payload) VALUES ($1, $2, $3, $4, $5)
			ON CONFLICT (subject) DO UPDATE
			   SET version_id = EXCLUDED.version_id, last_updated_ns = EXCLUDED.last_updated_ns,
			       fetched_at_ns = EXCLUDED.fetched_at_ns, payload = EXCLUDED.payload`,
			p.Subject, p.VersionID, nanos(p.LastUpdated), nanos(p.FetchedAt), payload); err != nil {
			return err
		}
		return markDirty(ctx, tx, p.Subject, now, store.PatientChange(p, old.Payload, exists))
	})
	if err != nil {
		return 0, err
	}
	return res, nil
}

// Patient returns stored facts, or ErrNotFound.
func (s *Store) Patient(ctx context.Context, subject string) (store.Patient, error) {
	p := store.Patient{Subject: subject}
	err := s.run(ctx, "Patient", func(q querier) error {
		var lu, fetched int64
		err := q.QueryRow(ctx, `SELECT version_id, last_updated_ns, fetched_at_ns, payload FROM patients WHERE subject = $1`, subject).
			Scan(&p.VersionID, &lu, &fetched, &p.Payload)
		if errors.Is(err, pgx.ErrNoRows) {
			return notFound("patient")
		}
		p.LastUpdated, p.FetchedAt = fromNanos(lu), fromNanos(fetched)
		return err
	})
	return p, err
}

// Prune deletes inputs whose EffectiveAt is before the horizon, the
// owner rows that pointed at exactly those copies, and the versions kept
// until before the horizon.
func (s *Store) Prune(ctx context.Context, horizon time.Time) (int, error) {
	var n int
	err := s.inTx(ctx, "Prune", func(tx pgx.Tx) error {
		if _, err := tx.Exec(ctx, `DELETE FROM input_kept WHERE until_ns < $1`, nanos(horizon)); err != nil {
			return err
		}
		return tx.QueryRow(ctx, `
			WITH gone AS (
				DELETE FROM inputs WHERE effective_ns < $1 RETURNING subject, logical),
			owners AS (
				DELETE FROM input_owner o USING gone WHERE o.logical = gone.logical AND o.subject = gone.subject)
			SELECT count(*) FROM gone`, nanos(horizon)).Scan(&n)
	})
	if err != nil {
		return 0, err
	}
	return n, nil
}
