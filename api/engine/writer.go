package engine

import (
	"cmp"
	"context"
	"encoding/json"
	"errors"
	"fmt"
	"maps"
	"math/rand/v2"
	"net/http"
	"net/url"
	"slices"
	"strings"
	"time"

	"github.com/deadspace-fhir/deadspace/api/store"
	"github.com/deadspace-fhir/deadspace/fhir/client"
	"github.com/deadspace-fhir/deadspace/fhir/encode"
	fhirref "github.com/deadspace-fhir/deadspace/fhir/ref"
)

// errOrphan means a write updates a derived Observation the server never
// acknowledged creating: its create was refused. Writes of one series go in
// order, so by the time this write is sent no create can still be pending.
var errOrphan = errors.New("the derived Observation was never created on the server (its create was refused; see the dead letters)")

// Backoff bounds for outbox retries. The client already retries each call a
// few times; these are the longer waits between outbox attempts.
const (
	backoffBase = 500 * time.Millisecond
	backoffMax  = 2 * time.Minute
)

func (e *Engine) writeLoop(ctx context.Context) {
	for {
		wait := e.drain(ctx)
		t := time.NewTimer(wait)
		select {
		case <-ctx.Done():
			t.Stop()
			return
		case <-e.flush:
		case <-t.C:
		}
		t.Stop()
	}
}

// FlushNow sends every due write once, for tests and shutdown.
func (e *Engine) FlushNow(ctx context.Context) { e.drain(ctx) }

// drain sends due writes until none is due and returns how long to wait.
//
// Writes of one series go in the order they were queued: a write waits
// while an earlier write that carries any of its series is still in the
// outbox (not yet due, or failed in this pass). Otherwise a revision
// retried after an outage could overtake, and undo, a later withdrawal.
func (e *Engine) drain(ctx context.Context) time.Duration {
	// unsettled are the writes whose outcome the store could not record in
	// this drain: not sent again before the next.
	unsettled := make(map[uint64]bool)
	deviceChecked := false
	for ctx.Err() == nil {
		pending, err := e.cfg.Store.DueWrites(ctx, farFuture, outboxScan)
		if err != nil {
			e.log.ErrorContext(ctx, "reading the outbox failed", "err", err)
			return time.Second
		}
		if len(pending) == 0 {
			e.mu.Lock()
			e.outboxBlocked = time.Time{}
			e.mu.Unlock()
			return 30 * time.Second
		}
		if len(pending) < outboxScan {
			e.retries.keep(pending)
		}
		now := e.now()
		blocked := make(map[string]bool)
		progressed, unrecorded := false, false
		for _, w := range pending {
			if ctx.Err() != nil {
				return 0
			}
			waits := e.retries.waits(w, now) || unsettled[w.ID]
			for _, s := range w.Series {
				waits = waits || blocked[s]
			}
			if !waits && !deviceChecked {
				// Before the first write sent in this drain: the Device
				// every write cites.
				deviceChecked = true
				if !e.writesCanGo(ctx) {
					return backoffMax
				}
			}
			if !waits {
				ok, err := e.attempt(ctx, w)
				if err != nil {
					// The write stays, and so do the later writes of its
					// series; other series' writes still go, so that one
					// write the store cannot settle does not hold up every
					// patient's.
					e.log.ErrorContext(ctx, "recording a write's outcome failed; it is tried again later", "write", w.ID, "err", err)
					unsettled[w.ID], unrecorded = true, true
				}
				if ok {
					progressed = true
					continue
				}
			}
			for _, s := range w.Series {
				blocked[s] = true
			}
		}
		switch {
		case !progressed && unrecorded:
			return time.Second
		case !progressed:
			return 250 * time.Millisecond
		}
	}
	return 0
}

// farFuture is after every record's time: DueWrites lists the whole
// outbox with it, due or not, and ledgerFor reads the ledger from a time on.
var farFuture = time.Date(9999, 1, 1, 0, 0, 0, 0, time.UTC)

// outboxScan bounds one pass over the outbox.
const outboxScan = 512

// attempt sends one write and records the outcome. It reports whether the
// write left the outbox (acknowledged or buried); an error means the store
// could not record the outcome.
func (e *Engine) attempt(ctx context.Context, w store.Write) (bool, error) {
	rep, shared := e.cfg.Store.(store.Replicated)
	if shared {
		ok, err := rep.RenewWriteClaim(ctx, w.ID)
		if err != nil {
			return false, fmt.Errorf("renewing the claim on write %d: %w", w.ID, err)
		}
		if !ok {
			// Another replica took the write over after this one's claim
			// lapsed; it sends it, this one must not send it again.
			e.log.WarnContext(ctx, "a write's claim lapsed and another replica took it over", "write", w.ID)
			return false, nil
		}
	}
	server, err := e.sendHoldingClaim(ctx, w, rep)
	now := e.now()
	switch {
	case err == nil:
		if aerr := e.cfg.Store.Acknowledge(ctx, w.ID, server); aerr != nil {
			if shared && errors.Is(aerr, store.ErrNotFound) {
				// This replica stalled past its claim and the replica
				// that took the write over settled it first.
				return e.takenOver(ctx, w, aerr), nil
			}
			// The server has it; the next attempt's conditional creates
			// will find it again rather than write it twice.
			return false, aerr
		}
		e.writeResult("acknowledged")
		e.mu.Lock()
		e.outboxBlocked = time.Time{}
		e.mu.Unlock()
		return true, nil
	case ctx.Err() != nil:
		// Shutting down: the write stays in the outbox as it was.
		return false, nil
	case permanent(err) && !resendFailedEntries(err, w.Attempts):
		reason := err.Error()
		if berr := e.cfg.Store.Bury(ctx, w.ID, reason, now); berr != nil {
			if lost(shared, berr) {
				return e.takenOver(ctx, w, berr), nil
			}
			return false, berr
		}
		e.writeResult("dead-letter")
		if e.cfg.Hooks.DeadLetter != nil {
			e.cfg.Hooks.DeadLetter()
		}
		e.log.ErrorContext(ctx, "the FHIR server refused a write; moved to the dead letters", "write", w.ID, "reason", reason)
		return true, nil
	default:
		wait := backoff(w.Attempts)
		var ce *client.Error
		if errors.As(err, &ce) && ce.RetryAfter > wait {
			wait = min(ce.RetryAfter, maxRetryAfter)
		}
		var rerr error
		if shared {
			// The wait runs on the store's clock, so a replica whose
			// clock disagrees with this one's still waits it out.
			rerr = rep.RescheduleIn(ctx, w.ID, wait, now.Add(wait), err.Error())
		} else {
			rerr = e.cfg.Store.Reschedule(ctx, w.ID, now.Add(wait), err.Error())
		}
		if rerr != nil {
			if lost(shared, rerr) {
				return e.takenOver(ctx, w, rerr), nil
			}
			return false, rerr
		}
		e.retries.scheduled(w.ID, w.Attempts+1, wait)
		e.writeResult("retry")
		e.mu.Lock()
		if e.outboxBlocked.IsZero() {
			e.outboxBlocked = now
		}
		e.mu.Unlock()
		e.log.WarnContext(ctx, "write failed; will retry", "write", w.ID, "attempt", w.Attempts+1, "wait", wait, "err", err)
		return false, nil
	}
}

// lost reports whether a store's refusal to record a write's outcome
// means that the write is no longer this replica's: another replica holds
// its claim (store.ErrClaimedElsewhere), or, on a store shared by
// replicas, the write left the outbox (the replica that took it over
// acknowledged or buried it).
func lost(shared bool, err error) bool {
	return errors.Is(err, store.ErrClaimedElsewhere) || (shared && errors.Is(err, store.ErrNotFound))
}

// takenOver notes an attempt whose outcome the store did not record
// because this replica's claim on the write lapsed (it stalled past the
// write lease) and another replica took the write over: that replica
// sends it and records its outcome, so this is no failure of the store,
// and the write is not tried again from here in this drain. It reports
// whether the write left the outbox.
func (e *Engine) takenOver(ctx context.Context, w store.Write, err error) bool {
	e.writeResult("taken-over")
	e.log.InfoContext(ctx, "a write's claim lapsed during its attempt and another replica took it over; its outcome is that replica's", "write", w.ID)
	return errors.Is(err, store.ErrNotFound)
}

// sendHoldingClaim sends a write and, when the store is shared by
// replicas (rep not nil), keeps renewing this replica's claim on it while
// the send runs. DueWrites claims a whole batch for one write lease, and a
// batch sent one write at a time, or one slow send with its retries, can
// outlast it; without renewal another replica would take the write over
// and send the same conditional creates at the same moment, which a
// server may not keep apart. attempt renews the claim once before the send
// and skips a write whose claim was lost.
func (e *Engine) sendHoldingClaim(ctx context.Context, w store.Write, rep store.Replicated) (map[string][2]string, error) {
	if rep == nil {
		return e.send(ctx, w)
	}
	sendCtx, stop := context.WithCancel(ctx)
	defer stop()
	go func() {
		t := time.NewTicker(max(rep.WriteLease()/3, 10*time.Millisecond))
		defer t.Stop()
		for {
			select {
			case <-sendCtx.Done():
				return
			case <-t.C:
				// A claim lost after all (this replica stalled for a whole
				// lease) ends the renewals; the send's outcome is still
				// recorded, and the conditional creates stand behind it.
				if ok, err := rep.RenewWriteClaim(sendCtx, w.ID); err == nil && !ok {
					return
				}
			}
		}
	}()
	return e.send(sendCtx, w)
}

func (e *Engine) writeResult(outcome string) {
	if e.cfg.Hooks.WriteResult != nil {
		e.cfg.Hooks.WriteResult(outcome)
	}
}

// permanent reports whether the server refused the write for a reason a
// retry cannot change: the content (400, 422), the resource (404, 405,
// 410), a create this write depends on that was itself refused, a
// revision on the server this service did not write, a conditional
// create whose condition matched several resources (412 on a request of
// conditional creates only, or on a transaction of updates whose every
// If-Match still holds, where only its Provenance's condition can have
// failed), or a Provenance create whose condition matched a resource that
// is not the write's Provenance, or one that cannot be checked (see
// [Engine.provenanceLanded]). Authentication (401, 403) and conflicts (409,
// and 412 on an update) are retried: a rotated credential or a concurrent
// edit must not send a whole backlog to the dead letters.
func permanent(err error) bool {
	if errors.Is(err, errOrphan) || errors.Is(err, errNewerOnServer) || errors.Is(err, errCreateMatchesMany) ||
		errors.Is(err, errProvenanceMatchedAnother) || errors.Is(err, errProvenanceUnchecked) {
		return true
	}
	var ce *client.Error
	if !errors.As(err, &ce) {
		return false
	}
	switch ce.Status {
	case http.StatusBadRequest, http.StatusNotFound, http.StatusMethodNotAllowed, http.StatusGone, http.StatusUnprocessableEntity:
		return true
	}
	return false
}

// backoff is exponential with full jitter.
func backoff(attempts int) time.Duration {
	d := backoffBase << min(attempts, 16)
	if d <= 0 || d > backoffMax {
		d = backoffMax
	}
	return time.Duration(rand.Int64N(int64(d)) + 1)
}

// errNewerOnServer means an update met a revision on the server that this
// service did not write (or does not know): it is never overwritten.
var errNewerOnServer = errors.New("the server holds a revision of the derived Observation that this service did not write; it is left as it is")

// errCreateMatchesMany means a request made only of conditional creates was
// refused with 412: its condition (a series identifier, or a Provenance's
// tag) matched more than one resource on the server (R4 http.html#ccreate),
// which no retry changes; an operator must remove the duplicates.
var errCreateMatchesMany = errors.New("a conditional create matched more than one resource on the server; remove the duplicates, then retry the write")

// onlyCreates marks a 412 answer to a request made only of conditional
// creates as [errCreateMatchesMany], keeping the server's answer.
func onlyCreates(err error) error {
	if errors.Is(err, client.ErrPreconditionFailed) {
		return fmt.Errorf("%w: %w", errCreateMatchesMany, err)
	}
	return err
}

// provenanceMatchesMany marks a 412 that answered a write's Provenance,
// whose create is conditional on its tag, as [errCreateMatchesMany], saying
// whether the values were written (the Provenance was sent on its own,
// after them) or not (one transaction, refused whole), and keeping the
// server's answer. A server that ignores _tag in a condition matches every
// Provenance it holds, so the cause may be the server rather than
// duplicates.
func provenanceMatchesMany(err error, valuesWritten bool) error {
	if !errors.Is(err, client.ErrPreconditionFailed) {
		return err
	}
	what := "the transaction was refused whole and nothing of this write was written"
	if valuesWritten {
		what = "the values were written without their Provenance, which a retry writes"
	}
	return fmt.Errorf("%w: it was the write's Provenance, conditional on its tag (_tag): several Provenances carry the tag, or the server ignores _tag in a condition; %s: %w", errCreateMatchesMany, what, err)
}

// foreign is [errNewerOnServer] with what set the server's value apart.
func foreign(why string) error {
	return fmt.Errorf("%w (%s)", errNewerOnServer, why)
}

// send encodes the typed write with the server's ids as known now, posts
// it, and returns the server's id and version of each series it carried.
// A revision or withdrawal carries only the series whose ledger entry
// still records its value ([encode.Write.Current]); one with none left is
// settled without a request.
//
// A server may cap the entries of a transaction that needs strict isolation
// (conditional creates do): Medplum's cap is 8. When a write fits, it is one
// transaction of Observations and Provenance; when it does not, the
// Observations go in transactions of at most MaxTransactionEntries and the
// Provenance follows on its own. Every request is conditional, so a crash
// between them is mended by sending the write again.
//
// An update that fails its If-Match (412) is resolved by reading what the
// server holds: this write's own value (a copy the server committed late,
// or an answer lost) counts as acknowledged; an earlier value of this
// service's for the series is updated once more against the version read;
// anything else is a revision this service did not write, which it never
// overwrites: the write goes to the dead letters. A create whose condition
// matched an Observation of the series holding another value is sent on as
// an update of it (see [Engine.create]).
func (e *Engine) send(ctx context.Context, w store.Write) (map[string][2]string, error) {
	var tw encode.Write
	if err := json.Unmarshal(w.Body, &tw); err != nil {
		return nil, &client.Error{Op: "decode outbox write", Status: http.StatusBadRequest, Outcome: err.Error()}
	}
	deviceRef, err := e.serverDevice(ctx)
	if err != nil {
		return nil, err
	}
	if tw.Kind == encode.WriteCreate {
		return e.create(ctx, tw, deviceRef)
	}
	keys, err := tw.Keys()
	if err != nil {
		return nil, &client.Error{Op: "decode outbox write", Status: http.StatusBadRequest, Outcome: err.Error()}
	}
	server := make(map[string]encode.ServerRef, len(tw.Series))
	current := tw.Series[:0:0]
	for _, s := range tw.Series {
		en, err := e.cfg.Store.Entry(ctx, s)
		if err != nil {
			return nil, fmt.Errorf("engine: %w", err)
		}
		if !tw.Current(keys, s, en.Key, en.Status) {
			// A later write carries the series' current value; this one,
			// sent after it (a dead letter retried, say), would put an
			// older value back over it, If-Match and all, since the
			// ledger holds the server's version of the later one.
			continue
		}
		if en.ServerID == "" {
			return nil, errOrphan
		}
		server[s] = encode.ServerRef{ID: en.ServerID, Version: en.ServerVersion}
		current = append(current, s)
	}
	if len(current) < len(tw.Series) {
		e.log.InfoContext(ctx, "a write carried values that later writes replaced; only the current ones are sent", "write", w.ID, "series", len(tw.Series), "current", len(current))
	}
	if len(current) == 0 {
		return map[string][2]string{}, nil
	}
	tw.Series = current
	return e.update(ctx, tw, deviceRef, server, true)
}

// create sends a create write. A create is conditional on the series, so
// an entry answered 200 matched an Observation of the series already on
// the server: a copy of an earlier create committed late, or a value
// derived before (by serve from fewer readings, before a backfill). Unless
// it already holds this write's value, it is updated to this write's value
// against the version read, as a revision is; a value this service did
// not write is never overwritten (see [Engine.ownValue]). A matched value
// whose key this service's ledger does not know (written from another
// store) cannot be compared with what was written: it is updated when it
// holds a live status this service writes (final or amended), and
// otherwise left to an operator.
func (e *Engine) create(ctx context.Context, tw encode.Write, deviceRef string) (map[string][2]string, error) {
	plan, err := e.cfg.Encoder.Plan(tw, nil, encode.TxConfig{DeviceRef: deviceRef, ProvenanceTagSystem: e.cfg.ProvenanceTagSystem})
	if err != nil {
		return nil, &client.Error{Op: "encode outbox write", Status: http.StatusBadRequest, Outcome: err.Error()}
	}
	ids, matched, err := e.sendPlan(ctx, tw.Kind, plan, true)
	if err != nil || len(matched) == 0 {
		return ids, err
	}
	stale := make(map[string]encode.ServerRef, len(matched))
	var revise []string
	for i := range plan.Len() {
		series := plan.Series(i)
		if !matched[series] {
			continue
		}
		held, err := e.readHeld(ctx, ids[series][0])
		if err != nil {
			return nil, err
		}
		own, err := e.ownValue(ctx, series, held, plan.Key(i), plan.Observation(i))
		if err != nil {
			return nil, err
		}
		switch {
		case own.unknown && (held.status == statusFinal || held.status == statusAmended):
			// Another store's value of the series: updated below.
		case !own.ok:
			return nil, foreign(own.why)
		case held.key == plan.Key(i) && !held.withdrawn:
			ids[series] = [2]string{ids[series][0], held.version}
			continue
		}
		stale[series] = encode.ServerRef{ID: ids[series][0], Version: held.version}
		revise = append(revise, series)
	}
	if len(revise) == 0 {
		return ids, nil
	}
	// The create carried this derivation's Provenance, which the server
	// holds now, citing the matched Observations: the update writes the
	// values only, so the derivation keeps one Provenance.
	rw := tw
	rw.Kind = encode.WriteRevise
	rw.Series = revise
	revised, err := e.update(ctx, rw, deviceRef, stale, false)
	if err != nil {
		return nil, err
	}
	for s, id := range revised {
		ids[s] = id
	}
	return ids, nil
}

// update sends a revision or withdrawal against the server's versions,
// resolving a failed If-Match as [Engine.send] describes; withProvenance
// says whether its Provenance goes too.
//
// After a failed If-Match, the values the server already holds as this
// write writes them (a split write that partly landed, a late copy, an
// answer lost) are not sent again: the rest is sent against the versions
// read, and the Provenance still cites every value, with the versions the
// write was made to replace as the revised ones (server's versions when
// update was called). When every value landed, the Provenance is still
// sent: it may be what failed, and its create is conditional on its tag,
// so the server keeps one.
func (e *Engine) update(ctx context.Context, tw encode.Write, deviceRef string, server map[string]encode.ServerRef, withProvenance bool) (map[string][2]string, error) {
	server = maps.Clone(server)
	landed := make(map[string][2]string, len(tw.Series))
	for attempt := 0; ; attempt++ {
		plan, err := e.cfg.Encoder.Plan(tw, server, encode.TxConfig{DeviceRef: deviceRef, ProvenanceTagSystem: e.cfg.ProvenanceTagSystem})
		if err == nil && len(landed) > 0 {
			done := make(map[string]string, len(landed))
			for s, id := range landed {
				done[s] = id[0]
			}
			plan, err = plan.Remaining(done)
		}
		if err != nil {
			return nil, &client.Error{Op: "encode outbox write", Status: http.StatusBadRequest, Outcome: err.Error()}
		}
		ids, _, err := e.sendPlan(ctx, tw.Kind, plan, withProvenance)
		if err == nil {
			maps.Copy(ids, landed)
			return ids, nil
		}
		if !errors.Is(err, client.ErrPreconditionFailed) || errors.Is(err, errCreateMatchesMany) {
			return nil, err
		}
		now, again, rerr := e.afterPrecondition(ctx, tw.Kind, plan, server)
		if rerr != nil {
			return nil, rerr
		}
		if e.oneTransaction(plan, withProvenance) && ifMatchHeld(plan, server, again) {
			// Every update's If-Match names the version the server still
			// holds, so none of them failed: the 412 answered the only other
			// condition in the transaction, the Provenance's. Sending it
			// again meets the same answer.
			return nil, provenanceMatchesMany(err, false)
		}
		maps.Copy(landed, now)
		if len(again) > 0 && attempt >= 2 {
			return nil, err // retried later from the outbox
		}
		for s, v := range again {
			sr := server[s]
			if sr.Revises == "" {
				sr.Revises = sr.Version
			}
			sr.Version = v
			server[s] = sr
		}
	}
}

// sendPlan posts a plan's transactions. It returns the server's id and
// version of each series, and the series whose conditional create matched
// an Observation already on the server (answered 200, not 201). Without
// withProvenance it posts the Observations only; a plan without
// Observations (every value landed) posts its Provenance only. A 412 to a
// request made only of conditional creates is [errCreateMatchesMany]; so is
// a 412 to the Provenance sent on its own, whose values were written. A
// Provenance answered 200 must be this write's ([Engine.provenanceLanded]).
func (e *Engine) sendPlan(ctx context.Context, kind string, plan *encode.Plan, withProvenance bool) (map[string][2]string, map[string]bool, error) {
	server := make(map[string][2]string, plan.Len())
	matched := make(map[string]bool)
	if e.oneTransaction(plan, withProvenance) {
		tx, err := plan.Transaction(0, plan.Len(), true)
		if err != nil {
			return nil, nil, &client.Error{Op: "encode transaction", Status: http.StatusBadRequest, Outcome: err.Error()}
		}
		resp, err := e.transaction(ctx, tx, plan.Len()+1)
		if err != nil {
			if kind == encode.WriteCreate {
				err = onlyCreates(err)
			}
			return nil, nil, err
		}
		pe := resp.Entries[plan.Len()]
		if err := e.provenanceLanded(ctx, plan, pe.Status, pe.Resource, pe.Location); err != nil {
			return nil, nil, err
		}
		for i := range plan.Len() {
			server[plan.Series(i)] = [2]string{resp.Entries[i].ID, resp.Entries[i].VersionID}
			if kind == encode.WriteCreate && resp.Entries[i].Status == http.StatusOK {
				matched[plan.Series(i)] = true
			}
		}
		return server, matched, checkIDs(server)
	}
	ids := make(map[string]string, plan.Len())
	for from := 0; from < plan.Len(); from += e.maxEntries() {
		to := min(from+e.maxEntries(), plan.Len())
		tx, err := plan.Transaction(from, to, false)
		if err != nil {
			return nil, nil, &client.Error{Op: "encode transaction", Status: http.StatusBadRequest, Outcome: err.Error()}
		}
		resp, err := e.transaction(ctx, tx, to-from)
		if err != nil {
			if kind == encode.WriteCreate {
				err = onlyCreates(err)
			}
			return nil, nil, err
		}
		for i := from; i < to; i++ {
			r := resp.Entries[i-from]
			server[plan.Series(i)] = [2]string{r.ID, r.VersionID}
			ids[plan.Series(i)] = r.ID
			if kind == encode.WriteCreate && r.Status == http.StatusOK {
				matched[plan.Series(i)] = true
			}
		}
	}
	if err := checkIDs(server); err != nil {
		return nil, nil, err
	}
	if !withProvenance {
		return server, matched, nil
	}
	prov, q, err := plan.Provenance(ids)
	if err != nil {
		return nil, nil, &client.Error{Op: "encode provenance", Status: http.StatusBadRequest, Outcome: err.Error()}
	}
	body, meta, err := e.cfg.Client.ConditionalCreate(ctx, "Provenance", prov, q)
	if err != nil {
		return nil, nil, provenanceMatchesMany(err, true)
	}
	if err := e.provenanceLanded(ctx, plan, meta.Status, body, meta.Location); err != nil {
		return nil, nil, err
	}
	return server, matched, nil
}

// errProvenanceMatchedAnother means the server answered a write's
// Provenance create, conditional on its tag, with 200 and a Provenance
// that does not carry the tag: the condition matched another resource, so
// the server ignores _tag in conditions (or treats it in a way of its
// own), and this write's Provenance was never written. Retrying changes
// nothing until the server is fixed.
var errProvenanceMatchedAnother = errors.New("the write's Provenance was not written: its create, conditional on its tag (_tag), matched a Provenance that does not carry the tag, so the server seems to ignore _tag in conditions")

// errProvenanceUnchecked means the server answered a write's Provenance
// create, conditional on its tag, with 200 (an existing match) but gave
// neither the resource nor a location naming a Provenance, or something
// that is not a Provenance: whether this write's Provenance is on the
// server cannot be told.
var errProvenanceUnchecked = errors.New("the server answered the write's Provenance create, conditional on its tag (_tag), with 200 (an existing match), and what matched cannot be checked to be this write's Provenance")

// afterProvenance says what a buried Provenance leaves, and what to do.
const afterProvenance = "the values were written without their Provenance; fix the server, then retry the write, which writes the Provenance and finds the values already written"

// provenanceLanded checks the answer to a write's Provenance create,
// conditional on its tag: status, the resource the server returned (nil
// when none) and the location it named. 201 is this write's Provenance,
// created. 200 is an existing match, which is this write's Provenance (a
// repeated write) only when it carries the write's tag: a server that
// ignores _tag in a condition and holds exactly one Provenance answers
// with that one, whatever it is. The resource returned is checked when it
// is a Provenance; otherwise the Provenance the location names is read.
// Another Provenance is [errProvenanceMatchedAnother], and nothing to
// check [errProvenanceUnchecked]: either leaves the write unacknowledged,
// in the dead letters.
func (e *Engine) provenanceLanded(ctx context.Context, plan *encode.Plan, status int, resource json.RawMessage, location string) error {
	if status != http.StatusOK {
		return nil
	}
	own, err := plan.OwnProvenance(resource)
	if len(resource) == 0 || errors.Is(err, encode.ErrNotAProvenance) {
		id := provenanceAt(location)
		if id == "" {
			return fmt.Errorf("%w: it gave neither the resource nor its location; %s", errProvenanceUnchecked, afterProvenance)
		}
		body, _, rerr := e.cfg.Client.Read(ctx, "Provenance", id)
		if rerr != nil {
			return fmt.Errorf("engine: reading the Provenance the server matched to the write's Provenance create, conditional on its tag: %w", rerr)
		}
		if own, err = plan.OwnProvenance(body); err != nil {
			return fmt.Errorf("%w: its location names something else: %w; %s", errProvenanceUnchecked, err, afterProvenance)
		}
	}
	if !own {
		return fmt.Errorf("%w; %s", errProvenanceMatchedAnother, afterProvenance)
	}
	return nil
}

// provenanceAt returns the id of the Provenance a location names
// (relative or absolute, versioned or not), or "" when it names none.
func provenanceAt(location string) string {
	if i := strings.IndexAny(location, "?#"); i >= 0 {
		location = location[:i]
	}
	r, _, err := fhirref.ParseAny(strings.TrimSuffix(location, "/"))
	if err != nil || r.Type != "Provenance" {
		return ""
	}
	return r.ID
}

// oneTransaction reports whether [Engine.sendPlan] sends plan as one
// transaction of its Observations and its Provenance.
func (e *Engine) oneTransaction(plan *encode.Plan, withProvenance bool) bool {
	return withProvenance && plan.Len() > 0 && plan.Len()+1 <= e.maxEntries()
}

// ifMatchHeld reports whether every update of plan was sent with If-Match
// on the version the server holds now (again, from
// [Engine.afterPrecondition]): then no If-Match failed. Versions only move
// forward, so a version read after the refusal that equals the one sent
// was current when the server refused.
func ifMatchHeld(plan *encode.Plan, server map[string]encode.ServerRef, again map[string]string) bool {
	for i := range plan.Len() {
		s := plan.Series(i)
		v, ok := again[s]
		if !ok || server[s].Version == "" || v != server[s].Version {
			return false
		}
	}
	return plan.Len() > 0
}

// afterPrecondition reads what the server holds of each series of an
// update that failed its If-Match. It returns the server's id and version
// of the series that already hold this write's values, and the versions to
// send the others again against, which hold earlier values of this
// service's. Anything else is [errNewerOnServer].
func (e *Engine) afterPrecondition(ctx context.Context, kind string, plan *encode.Plan, server map[string]encode.ServerRef) (map[string][2]string, map[string]string, error) {
	landed := make(map[string][2]string, plan.Len())
	again := make(map[string]string, plan.Len())
	for i := range plan.Len() {
		series := plan.Series(i)
		sr := server[series]
		held, err := e.readHeld(ctx, sr.ID)
		if err != nil {
			return nil, nil, err
		}
		en, err := e.cfg.Store.Entry(ctx, series)
		if err != nil {
			return nil, nil, fmt.Errorf("engine: %w", err)
		}
		switch {
		case held.series != series:
			return nil, nil, foreign("it carries another series identifier")
		case held.key != plan.Key(i) && held.key != en.Key && !slices.Contains(en.Revisions, held.key):
			return nil, nil, foreign("it carries a key this service never gave the series")
		}
		own, err := e.ownValue(ctx, series, held, plan.Key(i), plan.Observation(i))
		switch {
		case err != nil:
			return nil, nil, err
		case !own.ok:
			return nil, nil, foreign(own.why)
		case held.key == plan.Key(i) && held.withdrawn == (kind == encode.WriteWithdraw):
			landed[series] = [2]string{sr.ID, held.version}
		default:
			// An earlier value of this service's: update it once more.
			again[series] = held.version
		}
	}
	return landed, again, nil
}

// heldValue is what the server holds of one derived Observation: this
// service's key and series identifiers, its status, whether it is
// withdrawn, the version read, and the resource.
type heldValue struct {
	key, series, version, status string
	withdrawn                    bool
	body                         json.RawMessage
}

// readHeld reads a derived Observation from the server.
func (e *Engine) readHeld(ctx context.Context, id string) (heldValue, error) {
	opts := e.cfg.Encoder.Options()
	body, meta, err := e.cfg.Client.Read(ctx, "Observation", id)
	if err != nil {
		return heldValue{}, err
	}
	var held struct {
		Status     string `json:"status"`
		Identifier []struct {
			System string `json:"system"`
			Value  string `json:"value"`
		} `json:"identifier"`
	}
	if err := json.Unmarshal(body, &held); err != nil {
		return heldValue{}, fmt.Errorf("engine: reading the server's derived Observation: %w", err)
	}
	h := heldValue{version: meta.VersionID, status: held.Status, withdrawn: held.Status == statusWithdrawn, body: body}
	for _, id := range held.Identifier {
		switch id.System {
		case opts.IdentifierSystem:
			h.key = id.Value
		case opts.SeriesSystem:
			h.series = id.Value
		}
	}
	return h, nil
}

// ownership says whether a value the server holds is this service's own:
// ok when it is; else why not, and unknown when the ledger keeps no
// record of its key for the series to compare it with.
type ownership struct {
	ok, unknown bool
	why         string
}

// ownValue decides whether held, read from the server for series, is a
// value this service wrote: it must carry the series, and say (in status,
// value, unit, interpretation, notes, effective time, subject and code,
// [encode.ValueDiff]) what this service wrote for its key and status. That
// is wrote, this write's own Observation (of key planKey), when held has
// its key and status; otherwise the Observation the ledger's version of
// held's key encodes with held's status. Identifiers alone do not make a
// value this service's: an edit on the server keeps them.
func (e *Engine) ownValue(ctx context.Context, series string, held heldValue, planKey string, wrote json.RawMessage) (ownership, error) {
	if held.series != series {
		return ownership{why: "it carries another series identifier"}, nil
	}
	var status struct {
		Status string `json:"status"`
	}
	if err := json.Unmarshal(wrote, &status); err != nil {
		return ownership{}, fmt.Errorf("engine: the written Observation: %w", err)
	}
	if held.key != planKey || held.status != status.Status {
		own, raw, err := e.wroteFor(ctx, series, held.key, held.status)
		if err != nil || !own.ok {
			return own, err
		}
		wrote = raw
	}
	diff, err := encode.ValueDiff(held.body, wrote)
	if err != nil {
		return ownership{}, fmt.Errorf("engine: %w", err)
	}
	switch len(diff) {
	case 0:
		return ownership{ok: true}, nil
	case 1:
		return ownership{why: "its " + diff[0] + " differs from what this service wrote"}, nil
	}
	return ownership{why: "its " + strings.Join(diff, ", ") + " differ from what this service wrote"}, nil
}

// wroteFor returns the Observation this service wrote for key in series
// with status, encoded again from the ledger's version of key.
func (e *Engine) wroteFor(ctx context.Context, series, key, status string) (ownership, json.RawMessage, error) {
	switch status {
	case statusFinal, statusAmended, statusWithdrawn:
	default:
		return ownership{why: fmt.Sprintf("its status %q is not one this service writes", status)}, nil, nil
	}
	unknown := ownership{unknown: true, why: "this service keeps no record of the value it carries"}
	en, err := e.cfg.Store.EntryVersion(ctx, key)
	switch {
	case errors.Is(err, store.ErrNotFound):
		return unknown, nil, nil
	case err != nil:
		return ownership{}, nil, fmt.Errorf("engine: %w", err)
	case en.Series != series:
		return ownership{why: "it carries the key of another series"}, nil, nil
	case status == statusWithdrawn && en.Status != statusWithdrawn:
		return ownership{why: "this service never withdrew the value it carries"}, nil, nil
	}
	var p EntryPayload
	if err := json.Unmarshal(en.Payload, &p); err != nil {
		return ownership{}, nil, fmt.Errorf("engine: ledger entry payload: %w", err)
	}
	if err := e.loadResult(ctx, &p); errors.Is(err, store.ErrNotFound) {
		return unknown, nil, nil
	} else if err != nil {
		return ownership{}, nil, err
	}
	raw, err := e.cfg.Encoder.ValueJSON(encode.Write{Subject: en.Subject, Derivation: p.Derivation, Fall: p.Fall, Why: p.Why}, series, status)
	if err != nil {
		return ownership{}, nil, fmt.Errorf("engine: ledger entry: %w", err)
	}
	return ownership{ok: true}, raw, nil
}

// checkIDs refuses an acknowledgement without a server id: every later
// update of the series would have nothing to address. The write is sent
// again; its conditional creates find the resources and return their ids.
func checkIDs(server map[string][2]string) error {
	for s, id := range server {
		if id[0] == "" {
			return fmt.Errorf("engine: the server gave no id for the Observation of series %s", s)
		}
	}
	return nil
}

func (e *Engine) maxEntries() int {
	if e.cfg.MaxTransactionEntries > 0 {
		return e.cfg.MaxTransactionEntries
	}
	return DefaultMaxTransactionEntries
}

// transaction posts one transaction Bundle of n entries.
func (e *Engine) transaction(ctx context.Context, tx []byte, n int) (client.TransactionResponse, error) {
	resp, err := e.cfg.Client.Transaction(ctx, tx)
	if err != nil {
		return client.TransactionResponse{}, err
	}
	if len(resp.Entries) != n {
		return client.TransactionResponse{}, fmt.Errorf("engine: transaction response has %d entries for %d requests", len(resp.Entries), n)
	}
	if err := failedEntries(resp); err != nil {
		return client.TransactionResponse{}, err
	}
	return resp, nil
}

// errDeviceMatchedAnother: the software Device's conditional create
// answered 200 with a Device that does not carry its identifier (the
// server ignores identifier in the condition).
var errDeviceMatchedAnother = errors.New("the software Device's create, conditional on its identifier, matched a Device that does not carry it (the server seems to ignore identifier in conditions)")

// deviceIsOurs reports whether the Device a conditional create matched
// carries the identifier of q: the resource the server returned, or the
// one read by its id when it returned none.
func (e *Engine) deviceIsOurs(ctx context.Context, body []byte, id string, q url.Values) (bool, error) {
	if !isResourceOf(body, "Device") {
		if id == "" {
			return false, nil
		}
		var err error
		if body, _, err = e.cfg.Client.Read(ctx, "Device", id); err != nil {
			return false, fmt.Errorf("engine: reading the Device the software Device's conditional create matched: %w", err)
		}
	}
	system, value, _ := strings.Cut(q.Get("identifier"), "|")
	return deviceCarries(body, system, value), nil
}

// isResourceOf reports whether body is a resource of type typ.
func isResourceOf(body []byte, typ string) bool {
	var m struct {
		ResourceType string `json:"resourceType"`
	}
	return json.Unmarshal(body, &m) == nil && m.ResourceType == typ
}

// deviceCarries reports whether the Device in body carries the identifier
// system|value.
func deviceCarries(body []byte, system, value string) bool {
	var d struct {
		ResourceType string `json:"resourceType"`
		Identifier   []struct {
			System string `json:"system"`
			Value  string `json:"value"`
		} `json:"identifier"`
	}
	if json.Unmarshal(body, &d) != nil || d.ResourceType != "Device" {
		return false
	}
	for _, id := range d.Identifier {
		if id.System == system && id.Value == value {
			return true
		}
	}
	return false
}

// errDeviceUnresolved means the software Device, which every write cites,
// can be neither created nor found: writes stop, and stay in the outbox,
// until it can (see [Engine.writesCanGo]).
var errDeviceUnresolved = errors.New("the software Device cannot be resolved on the FHIR server")

// deviceScan bounds the Devices read to resolve the software Device after
// its conditional create matched several: a server that ignores the
// identifier parameter returns them all.
const deviceScan = 1000

var errDeviceScanEnd = errors.New("too many Devices")

// writesCanGo resolves the software Device before a pass over the outbox.
// When it cannot be resolved ([errDeviceUnresolved]) no write is sent: each
// would be refused for a reason of the server's, not its own, so none is
// buried or counted as an attempt; the engine says why in [Health] and
// through Hooks.WritesStopped, and tries again after backoffMax. Any other
// failure is left to each write's attempt, which retries as usual.
func (e *Engine) writesCanGo(ctx context.Context) bool {
	e.mu.Lock()
	wait := e.writesStopped != "" && !e.deviceCheckAt.over(e.now())
	e.mu.Unlock()
	if wait {
		// New writes wake the writer early; the next check still waits.
		return false
	}
	_, err := e.serverDevice(ctx)
	if err != nil && !errors.Is(err, errDeviceUnresolved) {
		return true
	}
	e.mu.Lock()
	was := e.writesStopped
	if err != nil {
		e.writesStopped = err.Error()
		e.deviceCheckAt = waitFrom(e.now(), backoffMax)
		if e.outboxBlocked.IsZero() {
			e.outboxBlocked = e.now()
		}
	} else {
		e.writesStopped = ""
	}
	e.mu.Unlock()
	if err == nil {
		if was != "" {
			e.writesStoppedHook(false)
			e.log.InfoContext(ctx, "the software Device is resolved on the FHIR server; writes resume")
		}
		return true
	}
	if was == "" {
		e.writesStoppedHook(true)
	}
	e.log.ErrorContext(ctx, "writes are stopped; they stay in the outbox and go once the software Device can be resolved", "err", err, "next_check", backoffMax)
	return false
}

func (e *Engine) writesStoppedHook(stopped bool) {
	if e.cfg.Hooks.WritesStopped != nil {
		e.cfg.Hooks.WritesStopped(stopped)
	}
}

// deviceAmongMany resolves the software Device after its create,
// conditional on q (its identifier), was refused with 412 (refused):
// several resources matched. It searches Devices by the same condition and
// keeps those that carry the identifier, since a server that ignores the
// parameter returns Devices of every kind. Copies of this build's Device
// (two replicas' first writes on a server that does not keep simultaneous
// conditional creates apart) are alike, so it returns the lowest id, the
// same for every replica and restart, and how many carry the identifier.
// None carrying it, too many Devices to read, or a search refused for good
// is [errDeviceUnresolved].
func (e *Engine) deviceAmongMany(ctx context.Context, q url.Values, refused error) (string, int, error) {
	system, value, _ := strings.Cut(q.Get("identifier"), "|")
	var ids []string
	seen := 0
	err := e.cfg.Client.Search(ctx, "Device", q, func(entry json.RawMessage) error {
		if seen++; seen > deviceScan {
			return errDeviceScanEnd
		}
		var en struct {
			Search struct {
				Mode string `json:"mode"`
			} `json:"search"`
			Resource struct {
				ResourceType string `json:"resourceType"`
				ID           string `json:"id"`
				Identifier   []struct {
					System string `json:"system"`
					Value  string `json:"value"`
				} `json:"identifier"`
			} `json:"resource"`
		}
		if json.Unmarshal(entry, &en) != nil || en.Resource.ResourceType != "Device" || en.Resource.ID == "" ||
			(en.Search.Mode != "" && en.Search.Mode != "match") {
			return nil
		}
		for _, id := range en.Resource.Identifier {
			if id.System == system && id.Value == value {
				ids = append(ids, en.Resource.ID)
				break
			}
		}
		return nil
	})
	switch {
	case errors.Is(err, errDeviceScanEnd):
		return "", 0, fmt.Errorf("%w: its create, conditional on its identifier, did not resolve (%w), and the search by that identifier returned more than %d Devices", errDeviceUnresolved, refused, deviceScan)
	case err != nil && client.IsRetryable(err):
		return "", 0, fmt.Errorf("engine: searching the software Device by its identifier: %w", err)
	case err != nil:
		return "", 0, fmt.Errorf("%w: its create, conditional on its identifier, did not resolve (%w), and searching Devices by that identifier failed: %w", errDeviceUnresolved, refused, err)
	case len(ids) == 0:
		return "", 0, fmt.Errorf("%w: its create, conditional on its identifier, did not resolve (%w), and none of the Devices a search by that identifier returned carries it (the server ignores the identifier parameter of Device); create one Device carrying it on the server, or fix the server's search", errDeviceUnresolved, refused)
	}
	slices.SortFunc(ids, func(a, b string) int { return cmp.Or(cmp.Compare(len(a), len(b)), strings.Compare(a, b)) })
	ids = slices.Compact(ids)
	return ids[0], len(ids), nil
}

// serverDevice returns the server's reference to the software Device,
// creating it (conditionally on its identifier) the first time. When
// several resources match the condition (412), or the one matched (200)
// does not carry the identifier (a server that ignores it in conditions),
// it uses the lowest id among the Devices that carry the identifier, or
// fails with [errDeviceUnresolved] ([Engine.deviceAmongMany]).
func (e *Engine) serverDevice(ctx context.Context) (string, error) {
	e.mu.Lock()
	ref := e.deviceRef
	e.mu.Unlock()
	if ref != "" {
		return ref, nil
	}
	cursor := "device." + e.cfg.Encoder.DeviceRef()
	if v, err := e.cfg.Store.Cursor(ctx, cursor); err == nil && v != "" {
		ref = v
	} else {
		raw, q, err := e.cfg.Encoder.DeviceCreate()
		if err != nil {
			return "", fmt.Errorf("engine: %w", err)
		}
		body, meta, err := e.cfg.Client.ConditionalCreate(ctx, "Device", raw, q)
		id := meta.ID
		if err == nil && meta.Status == http.StatusOK {
			// A match, not a create: a server that ignores identifier in
			// the condition answers so with any one Device it holds.
			var own bool
			if own, err = e.deviceIsOurs(ctx, body, id, q); err != nil {
				return "", err
			}
			if !own {
				err = errDeviceMatchedAnother
			}
		}
		switch {
		case errors.Is(err, client.ErrPreconditionFailed), errors.Is(err, errDeviceMatchedAnother):
			var n int
			if id, n, err = e.deviceAmongMany(ctx, q, err); err != nil {
				return "", err
			}
			e.log.WarnContext(ctx, "the software Device's create, conditional on its identifier, did not resolve to one Device carrying it; every result cites the one with the lowest id among those that do", "devices", n)
		case err != nil:
			return "", err
		}
		if id == "" {
			return "", fmt.Errorf("engine: the server gave no id for the software Device")
		}
		ref = "Device/" + id
		if err := e.cfg.Store.SetCursor(ctx, cursor, ref); err != nil {
			return "", fmt.Errorf("engine: %w", err)
		}
	}
	e.mu.Lock()
	e.deviceRef = ref
	e.mu.Unlock()
	return ref, nil
}
