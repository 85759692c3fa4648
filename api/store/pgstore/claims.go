package pgstore

import (
	"cmp"
	"context"
	"errors"
	"fmt"
	"slices"
	"strings"
	"time"

	"github.com/jackc/pgx/v5"
	"github.com/jackc/pgx/v5/pgconn"

	"github.com/deadspace-fhir/deadspace/api/store"
)

// querier is what both the pool and a transaction offer, so that helpers
// run inside or outside one.
type querier interface {
	Exec(ctx context.Context, sql string, args ...any) (pgconn.CommandTag, error)
	Query(ctx context.Context, sql string, args ...any) (pgx.Rows, error)
	QueryRow(ctx context.Context, sql string, args ...any) pgx.Row
}

// markDirtySQL marks a patient dirty: the earliest Since stands, the
// generation is a new one, the span grows to cover the change (from_ns 0,
// the whole patient, absorbs any other), and a blood gas makes the mark
// urgent. A claim on the patient stays: the replica evaluating it finds on
// commit that the generation moved, and leaves the mark for the next
// evaluation. reach_generation follows the generation: a mark whose
// reach_generation lags was last written by an earlier build (migration
// 0006), and every listing reads its span as the whole patient (spanOf).
// The end (until_ns, 0: none) grows the same way, and end_generation
// follows the generation as reach_generation does: a mark an earlier build
// wrote into (migration 0007) has no end, and one this build writes into
// it afterwards keeps none. since_at (migration 0011) is stamped by the
// database's clock when the mark is made and stays, as the earliest
// Since does.
const markDirtySQL = `
	WITH g AS (SELECT nextval('dirty_generation') AS gen)
	INSERT INTO dirty (subject, since_ns, generation, from_ns, urgent, reach_generation, until_ns, end_generation, since_at)
	SELECT $1, $2, g.gen, $3, $4, g.gen, $5, g.gen, clock_timestamp() FROM g
	ON CONFLICT (subject) DO UPDATE
	   SET since_ns = LEAST(dirty.since_ns, EXCLUDED.since_ns), generation = EXCLUDED.generation,
	       from_ns = CASE WHEN dirty.from_ns = 0 OR EXCLUDED.from_ns = 0 THEN 0 ELSE LEAST(dirty.from_ns, EXCLUDED.from_ns) END,
	       urgent = dirty.urgent OR EXCLUDED.urgent,
	       reach_generation = CASE WHEN dirty.reach_generation = dirty.generation THEN EXCLUDED.reach_generation ELSE 0 END,
	       until_ns = CASE WHEN dirty.end_generation = dirty.generation AND dirty.until_ns <> 0 AND EXCLUDED.until_ns <> 0
	                       THEN GREATEST(dirty.until_ns, EXCLUDED.until_ns) ELSE 0 END,
	       end_generation = EXCLUDED.end_generation`

func markDirty(ctx context.Context, q querier, subject string, now time.Time, sp store.Span) error {
	_, err := q.Exec(ctx, markDirtySQL, subject, nanos(now), nanos(sp.From), sp.Urgent, nanos(sp.Until))
	return err
}

// MarkDirty marks a patient for evaluation without a new input.
func (s *Store) MarkDirty(ctx context.Context, subject string, now time.Time) error {
	if err := checkSubject(subject); err != nil {
		return fmt.Errorf("pgstore.MarkDirty: %w", err)
	}
	return s.run(ctx, "MarkDirty", func(q querier) error { return markDirty(ctx, q, subject, now, store.Span{}) })
}

// DirtyPatients lists every dirty patient, claimed or not: urgent ones
// first, then by Since and Subject.
func (s *Store) DirtyPatients(ctx context.Context) ([]store.Dirty, error) {
	rows, err := s.pool.Query(ctx, `SELECT subject, since_ns, generation, `+spanOf("dirty")+`, urgent, `+clearedOf("dirty")+`, `+waitedOf("dirty")+` FROM dirty ORDER BY urgent DESC, since_ns, subject`)
	if err != nil {
		return nil, wrap("DirtyPatients", err)
	}
	out, err := pgx.CollectRows(rows, s.scanDirty)
	if err != nil {
		return nil, wrap("DirtyPatients", err)
	}
	return out, nil
}

// spanOf is the mark's from_ns and until_ns as every listing gives them:
// from 0, the whole patient, when a build before migration 0006 was the
// last to write the mark (its reach_generation lags), and until 0, no end,
// when a build before migration 0007 wrote into it (its end_generation
// lags); see markDirtySQL.
func spanOf(table string) string {
	return `CASE WHEN ` + table + `.reach_generation = ` + table + `.generation THEN ` + table + `.from_ns ELSE 0 END, ` +
		`CASE WHEN ` + table + `.end_generation = ` + table + `.generation THEN ` + table + `.until_ns ELSE 0 END`
}

// waitedOf is how long the mark named table has waited, in microseconds,
// by the database's clock (store.Dirty.Waited): from since_at, or, for a
// mark written before migration 0011 or by an earlier build, from since_ns.
func waitedOf(table string) string {
	return `(EXTRACT(EPOCH FROM clock_timestamp() - COALESCE(` + table + `.since_at, to_timestamp(` + table +
		`.since_ns / 1e9))) * 1e6)::bigint`
}

// clearedOf is the columns every listing of marks ends with: the
// generation of the mark the patient's last committed evaluation cleared
// (store.Dirty.Cleared; 0 when none did) and the replica that cleared it
// while that replica is running (empty when it is not, or unknown), read
// for the mark row named table.
func clearedOf(table string) string {
	return `COALESCE((SELECT c.generation FROM cleared c WHERE c.subject = ` + table + `.subject), 0), ` +
		`COALESCE((SELECT c.holder FROM cleared c JOIN replicas_alive r ON r.holder = c.holder AND r.alive_until > clock_timestamp()` +
		` WHERE c.subject = ` + table + `.subject), '')`
}

// KeepAlive records that this replica runs for ttl from now, and forgets
// replicas that have not renewed for an hour (those that died; a replica
// that stops deletes its own row).
func (s *Store) KeepAlive(ctx context.Context, ttl time.Duration) error {
	if ttl <= 0 {
		return fmt.Errorf("pgstore.KeepAlive: ttl %v must be positive", ttl)
	}
	return s.run(ctx, "KeepAlive", func(q querier) error {
		if _, err := q.Exec(ctx, `
			INSERT INTO replicas_alive (holder, alive_until) VALUES ($1, clock_timestamp() + $2 * interval '1 microsecond')
			ON CONFLICT (holder) DO UPDATE SET alive_until = EXCLUDED.alive_until`, s.holder, ttl.Microseconds()); err != nil {
			return err
		}
		_, err := q.Exec(ctx, `DELETE FROM replicas_alive WHERE alive_until < clock_timestamp() - interval '1 hour'`)
		return err
	})
}

// Depart deletes this replica's row: the others take its patients at once.
func (s *Store) Depart(ctx context.Context) error {
	return s.run(ctx, "Depart", func(q querier) error {
		_, err := q.Exec(ctx, `DELETE FROM replicas_alive WHERE holder = $1`, s.holder)
		return err
	})
}

// scanDirty reads a mark as every listing gives it.
func (s *Store) scanDirty(row pgx.CollectableRow) (store.Dirty, error) {
	var d store.Dirty
	var since, gen, from, until, cleared, waited int64
	var clearedBy string
	err := row.Scan(&d.Subject, &since, &gen, &from, &until, &d.Urgent, &cleared, &clearedBy, &waited)
	d.Since, d.Generation, d.From, d.Until, d.Cleared = fromNanos(since), uint64(gen), fromNanos(from), fromNanos(until), uint64(cleared)
	d.Waited = time.Duration(waited) * time.Microsecond
	d.EvaluatedElsewhere = clearedBy != "" && clearedBy != s.holder
	return d, err
}

// ClaimDirty claims for this replica, for ttl, up to limit dirty patients
// marked at or before settledBefore that no replica holds an unexpired
// claim on, urgent ones first, then oldest first. Replicas claiming at the same time get disjoint
// patients and do not wait for each other (FOR UPDATE SKIP LOCKED); a
// claim whose replica died lapses after ttl and the patient is claimed
// again. A patient this replica already claims is not returned twice.
//
// The claim keeps two replicas from evaluating one patient at once; the
// compare-and-swap of Commit still decides, so a replica that outlived its
// claim cannot overwrite a newer evaluation.
func (s *Store) ClaimDirty(ctx context.Context, settledBefore time.Time, limit int, ttl time.Duration) ([]store.Dirty, error) {
	if limit <= 0 || ttl <= 0 {
		return nil, fmt.Errorf("pgstore.ClaimDirty: limit %d and ttl %v must be positive", limit, ttl)
	}
	rows, err := s.pool.Query(ctx, `
		WITH picked AS (
			SELECT subject FROM dirty
			 WHERE since_ns <= $1 AND (claimed_by IS NULL OR claim_expires <= clock_timestamp())
			 ORDER BY urgent DESC, since_ns, subject
			 LIMIT $2
			 FOR UPDATE SKIP LOCKED)
		UPDATE dirty d
		   SET claimed_by = $3, claim_expires = clock_timestamp() + $4 * interval '1 microsecond'
		  FROM picked
		 WHERE d.subject = picked.subject
		RETURNING d.subject, d.since_ns, d.generation, `+spanOf("d")+`, d.urgent, `+clearedOf("d")+`, `+waitedOf("d"),
		nanos(settledBefore), limit, s.holder, ttl.Microseconds())
	if err != nil {
		return nil, wrap("ClaimDirty", err)
	}
	out, err := pgx.CollectRows(rows, s.scanDirty)
	if err != nil {
		return nil, wrap("ClaimDirty", err)
	}
	slices.SortFunc(out, func(a, b store.Dirty) int {
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

// ClaimPatient claims one dirty patient for this replica for ttl, unless
// another replica holds an unexpired claim on it; a claim this replica
// holds already is renewed. ok is false when another replica holds it or
// the patient is no longer dirty. The row lock of the UPDATE makes two
// replicas claiming at once agree: the second sees the first's claim.
// Commit ends the claim (settleDirty); ReleaseClaim gives it up.
func (s *Store) ClaimPatient(ctx context.Context, subject string, ttl time.Duration) (store.Dirty, bool, error) {
	if ttl <= 0 {
		return store.Dirty{}, false, fmt.Errorf("pgstore.ClaimPatient: ttl %v must be positive", ttl)
	}
	rows, err := s.pool.Query(ctx, `
		UPDATE dirty
		   SET claimed_by = $2, claim_expires = clock_timestamp() + $3 * interval '1 microsecond'
		 WHERE subject = $1 AND (claimed_by IS NULL OR claimed_by = $2 OR claim_expires <= clock_timestamp())
		RETURNING subject, since_ns, generation, `+spanOf("dirty")+`, urgent, `+clearedOf("dirty")+`, `+waitedOf("dirty"),
		subject, s.holder, ttl.Microseconds())
	if err != nil {
		return store.Dirty{}, false, wrap("ClaimPatient", err)
	}
	out, err := pgx.CollectRows(rows, s.scanDirty)
	if err != nil {
		return store.Dirty{}, false, wrap("ClaimPatient", err)
	}
	if len(out) == 0 {
		return store.Dirty{}, false, nil
	}
	return out[0], true, nil
}

// RenewClaim extends this replica's claim on a dirty patient by ttl from
// now, by the database's clock. A claim that lapsed is still renewed when
// no other replica took the patient meanwhile; one Commit or ReleaseClaim
// ended is not taken again.
func (s *Store) RenewClaim(ctx context.Context, subject string, ttl time.Duration) (bool, error) {
	if ttl <= 0 {
		return false, fmt.Errorf("pgstore.RenewClaim: ttl %v must be positive", ttl)
	}
	tag, err := s.pool.Exec(ctx, `UPDATE dirty SET claim_expires = clock_timestamp() + $3 * interval '1 microsecond'
		WHERE subject = $1 AND claimed_by = $2`, subject, s.holder, ttl.Microseconds())
	if err != nil {
		return false, wrap("RenewClaim", err)
	}
	return tag.RowsAffected() == 1, nil
}

// ReleaseClaim gives up this replica's claim on a patient that stays dirty
// (an evaluation that failed or was put off), so that any replica may take
// it at once. Commit releases the claim itself.
func (s *Store) ReleaseClaim(ctx context.Context, subject string) error {
	_, err := s.pool.Exec(ctx, `UPDATE dirty SET claimed_by = NULL, claim_expires = NULL WHERE subject = $1 AND claimed_by = $2`,
		subject, s.holder)
	if err != nil {
		return wrap("ReleaseClaim", err)
	}
	return nil
}

func checkSubject(subject string) error {
	if subject == "" {
		return errors.New("empty subject")
	}
	if strings.IndexByte(subject, 0) >= 0 {
		return errors.New("subject contains a NUL byte")
	}
	return nil
}
