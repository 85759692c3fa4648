package engine

import (
	"context"
	"fmt"
	"time"

	"github.com/deadspace-fhir/deadspace/api/store"
)

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
