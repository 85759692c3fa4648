package engine

import (
	"context"
	"errors"
	"fmt"
	"sync/atomic"
	"time"

	"github.com/deadspace-fhir/deadspace/api/store"
)

// DefaultOwnerGrace is Config.OwnerGrace when unset: far longer than the
// replica that evaluated a patient last takes to pick up its next mark
// (milliseconds without a settle delay), short enough that a replica that
// died delays its patients' values by seconds, not by a job lease.
const DefaultOwnerGrace = 2 * time.Second

// sharedListing is how often, on a store shared by replicas, the
// evaluation loop lists the dirty patients when nothing else wakes it: a
// notification that reached another replica reaches the replica that
// evaluated its patient last within about this long. One indexed query a
// replica this often is little for the database.
const sharedListing = 50 * time.Millisecond

// aliveLoop tells the other replicas that this one runs (store.Replicated
// KeepAlive), renewing four times a grace, and that it stopped when ctx
// ends: they leave the patients it evaluated last to it only meanwhile.
func (e *Engine) aliveLoop(ctx context.Context) {
	rep := e.cfg.Store.(store.Replicated)
	ttl := e.cfg.OwnerGrace
	for {
		if err := rep.KeepAlive(ctx, ttl); err != nil && ctx.Err() == nil {
			e.log.WarnContext(ctx, "could not tell the other replicas this one runs; they take its patients after the owner grace", "err", err)
		}
		if !sleep(ctx, ttl/4) {
			break
		}
	}
	depart, cancel := context.WithTimeout(context.WithoutCancel(ctx), 5*time.Second)
	defer cancel()
	if err := rep.Depart(depart); err != nil {
		e.log.WarnContext(depart, "could not tell the other replicas this one stopped; they take its patients after the owner grace", "err", err)
	}
}

// leftToOwner reports whether d is left, for now, to the replica that
// evaluated the patient last, and if so for how much longer: on a shared
// store, while the mark is younger than the owner grace.
func (e *Engine) leftToOwner(d store.Dirty, now time.Time) (bool, time.Duration) {
	if !d.EvaluatedElsewhere {
		return false, 0
	}
	left := e.cfg.OwnerGrace - e.marks.age(d, now)
	return left > 0, left
}

// claimPatient makes this replica the only one evaluating d's patient, when
// the store is shared by replicas: it claims the patient for the job lease
// and returns the patient's mark as it stands now. ok is false when
// another replica is evaluating the patient (it commits, or its claim
// lapses and any replica takes the patient) or the patient's evaluation was
// committed meanwhile; there is nothing to do then. With a store of one
// replica the in-process lock is enough and d is returned as it is.
func (e *Engine) claimPatient(ctx context.Context, d store.Dirty) (store.Dirty, bool, error) {
	rep, shared := e.cfg.Store.(store.Replicated)
	if !shared {
		return d, true, nil
	}
	now, ok, err := rep.ClaimPatient(ctx, d.Subject, e.cfg.JobLease)
	if err != nil {
		return d, false, fmt.Errorf("engine: claim the patient for evaluation: %w", err)
	}
	return now, ok, nil
}

// errClaimLost ends an evaluation whose claim on the patient another
// replica took (this replica stalled past the job lease).
var errClaimLost = errors.New("engine: another replica took the claim on the patient")

// holdClaim keeps this replica's claim on subject, when the store is
// shared by replicas, while an evaluation runs: it renews the claim every
// third of the job lease, as sendHoldingClaim does a write's, so a slow
// evaluation (a slow read of the patient's facts, a loaded database) keeps
// the patient and no other replica evaluates it at the same time. When a
// renewal finds the claim taken (the replica stalled for a whole lease and
// another took the patient, or evaluated it and committed), it cancels the
// returned context, so the evaluation is abandoned before its commit. stop
// ends the renewals and reports whether the claim was lost. A renewal that
// fails for another reason (the database unreachable) is tried again at
// the next tick; the commit's compare-and-swap still keeps the ledger
// right.
func (e *Engine) holdClaim(ctx context.Context, subject string) (evalCtx context.Context, stop func() (lost bool)) {
	rep, shared := e.cfg.Store.(store.Replicated)
	if !shared {
		return ctx, func() bool { return false }
	}
	evalCtx, cancel := context.WithCancelCause(ctx)
	renewing, done := make(chan struct{}), make(chan struct{})
	var lost atomic.Bool
	go func() {
		defer close(done)
		t := time.NewTicker(max(e.cfg.JobLease/3, 10*time.Millisecond))
		defer t.Stop()
		for {
			select {
			case <-renewing:
				return
			case <-evalCtx.Done():
				return
			case <-t.C:
				ok, err := rep.RenewClaim(evalCtx, subject, e.cfg.JobLease)
				if err == nil && !ok {
					lost.Store(true)
					cancel(errClaimLost)
					return
				}
			}
		}
	}()
	return evalCtx, func() bool {
		close(renewing)
		<-done
		cancel(nil)
		return lost.Load()
	}
}

// unclaimPatient gives up this replica's claim on a patient whose
// evaluation did not commit, so any replica may evaluate it again at once.
// A claim that cannot be given up lapses after the job lease.
func (e *Engine) unclaimPatient(ctx context.Context, subject string) {
	rep, shared := e.cfg.Store.(store.Replicated)
	if !shared {
		return
	}
	ctx, cancel := context.WithTimeout(context.WithoutCancel(ctx), 5*time.Second)
	defer cancel()
	if err := rep.ReleaseClaim(ctx, subject); err != nil {
		e.log.WarnContext(ctx, "could not give up the claim on a patient; another replica takes it when the claim lapses", "err", err)
	}
}
