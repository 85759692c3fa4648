package engine

import (
	"context"
	"encoding/json"
	"errors"
	"fmt"
	"net/url"
	"strconv"
	"strings"
	"sync"
	"time"

	"github.com/deadspace-fhir/deadspace/api/pipeline"
	"github.com/deadspace-fhir/deadspace/api/store"
	"github.com/deadspace-fhir/deadspace/derive"
	"github.com/deadspace-fhir/deadspace/fhir/client"
	"github.com/deadspace-fhir/deadspace/fhir/decode"
	"github.com/deadspace-fhir/deadspace/fhir/notify"
)

// cursorSearch names the polling cursor: the latest meta.lastUpdated taken
// in by a completed search.
const cursorSearch = "search.lastUpdated"

// searchPage is the page size asked of the server; servers may return
// fewer, and only a missing next link ends a search.
const searchPage = 100

// DefaultJobLease is Config.JobLease when unset: a replica that dies
// while polling is replaced within about this long.
const DefaultJobLease = 30 * time.Second

// leaseCatchUp names the lease under which one replica of several polls,
// catches up and registers the subscription.
const leaseCatchUp = "catch-up"

// cursorRequested is where a replica that does not hold the lease leaves a
// catch-up it was asked for (a gap, an empty rest-hook, silence) for the
// replica that does: "<trigger> <unique stamp>".
const cursorRequested = "catch-up.requested"

// jobLease is this replica's standing under the catch-up lease when the
// store is shared by replicas.
type jobLease struct {
	rep   store.Replicated
	lease store.Lease
	held  bool
	// seen is the last forwarded request this replica has acted on.
	seen string
}

func (e *Engine) catchUpLoop(ctx context.Context) {
	var poll <-chan time.Time
	if e.cfg.PollInterval > 0 {
		t := time.NewTicker(e.cfg.PollInterval)
		defer t.Stop()
		poll = t.C
	}
	// Silence counts from the start: a subscription the server stopped
	// (or never started) while this process was down sends nothing at all.
	started := time.Now()
	var heartbeat <-chan time.Time
	if e.cfg.HeartbeatTimeout > 0 {
		t := time.NewTicker(e.cfg.HeartbeatTimeout / 2)
		defer t.Stop()
		heartbeat = t.C
	}
	// With a store shared by replicas, the jobs run on the replica holding
	// the lease; the others renew nothing, forward what they are asked
	// for, and try the lease again every third of its length, so one of
	// them takes over soon after the holder dies. With a store of its own
	// the replica runs them all, as the only one.
	var jl *jobLease
	// published is the last notification time this replica wrote to the
	// shared store (sharedLastNotified).
	var published time.Time
	var renew <-chan time.Time
	if rep, shared := e.cfg.Store.(store.Replicated); shared {
		jl = &jobLease{rep: rep}
		t := time.NewTicker(e.cfg.JobLease / 3)
		defer t.Stop()
		renew = t.C
		defer e.releaseJobLease(ctx, jl)
	} else {
		e.register(ctx)
	}
	// Events a notification skipped over are searched for only once they
	// missed their grace (missingEvents).
	gaps := time.NewTicker(max(e.cfg.GapGrace/4, 5*time.Millisecond))
	defer gaps.Stop()
	for {
		trigger := ""
		select {
		case <-ctx.Done():
			return
		case <-gaps.C:
			if n := e.missing.expire(time.Now(), e.cfg.GapGrace); n > 0 {
				e.gapFound(ctx, n)
			}
			if !e.readsDeferred.due(e.now()) {
				continue
			}
			trigger = "read-deferred"
		case trigger = <-e.catch:
		case <-poll:
			trigger = "poll"
		case <-heartbeat:
			e.mu.Lock()
			last := e.lastNotified
			e.mu.Unlock()
			if jl != nil {
				last = e.sharedLastNotified(ctx, last, &published)
			}
			if last.IsZero() {
				last = started
			}
			silent := time.Since(last) > e.cfg.HeartbeatTimeout
			if !silent {
				continue
			}
			trigger = "heartbeat-missed"
		case <-renew:
		}
		if jl != nil {
			trigger = e.underLease(ctx, jl, trigger)
		}
		if trigger == "" {
			continue
		}
		err := e.catchUp(ctx, trigger, jl)
		switch {
		case err == nil || ctx.Err() != nil:
		case errors.Is(err, store.ErrLeaseHeld):
			e.log.InfoContext(ctx, "another replica took over polling and catch-up during a search; it searches again from the cursor", "err", err)
		default:
			e.log.WarnContext(ctx, "catch-up search failed; will try again", "trigger", trigger, "err", err)
			go func() {
				if sleep(ctx, 5*time.Second) {
					e.RequestCatchUp("retry")
				}
			}()
		}
	}
}

// underLease takes or renews the catch-up lease and says which catch-up,
// if any, this replica runs now: trigger when it holds the lease, "start"
// when it has just taken the lease over (a new holder searches from the
// shared cursor, which covers whatever its predecessor left), a request
// another replica forwarded, or "" when another replica holds the lease
// (a trigger that names something only this replica saw is forwarded to
// the holder).
func (e *Engine) underLease(ctx context.Context, jl *jobLease, trigger string) string {
	l, err := jl.rep.AcquireLease(ctx, leaseCatchUp, e.cfg.JobLease)
	if err != nil {
		if jl.held && ctx.Err() == nil {
			e.log.WarnContext(ctx, "this replica no longer holds the polling and catch-up lease", "err", err)
		}
		jl.held = false
		if !errors.Is(err, store.ErrLeaseHeld) {
			if ctx.Err() == nil {
				e.log.WarnContext(ctx, "could not take or renew the polling and catch-up lease", "err", err)
			}
			return ""
		}
		switch trigger {
		case "", "start", "poll", "retry":
			// The holder starts, polls and retries on its own.
		default:
			req := trigger + " " + strconv.FormatInt(e.now().UnixNano(), 10)
			if err := e.cfg.Store.SetCursor(ctx, cursorRequested, req); err != nil && ctx.Err() == nil {
				e.log.WarnContext(ctx, "could not pass a catch-up request to the replica that polls", "trigger", trigger, "err", err)
			}
		}
		return ""
	}
	took := !jl.held || l.Epoch != jl.lease.Epoch
	jl.lease, jl.held = l, true
	req, err := e.cfg.Store.Cursor(ctx, cursorRequested)
	if err != nil {
		e.log.WarnContext(ctx, "could not read the forwarded catch-up requests", "err", err)
		req = jl.seen
	}
	forwarded := req != jl.seen
	jl.seen = req
	if took {
		e.log.InfoContext(ctx, "this replica now polls, catches up and registers the subscription", "epoch", l.Epoch)
		e.register(ctx)
		return "start"
	}
	if trigger == "" && forwarded {
		trigger, _, _ = strings.Cut(req, " ")
	}
	return trigger
}

// releaseJobLease gives the lease up on shutdown, so another replica takes
// the jobs over at once rather than after the lease lapses.
func (e *Engine) releaseJobLease(ctx context.Context, jl *jobLease) {
	if !jl.held {
		return
	}
	ctx, cancel := context.WithTimeout(context.WithoutCancel(ctx), 5*time.Second)
	defer cancel()
	if err := jl.rep.ReleaseLease(ctx, leaseCatchUp); err != nil {
		e.log.WarnContext(ctx, "could not release the polling and catch-up lease; another replica takes over when it lapses", "err", err)
	}
}

// register runs the registration hook, if any; a failure is logged, and
// polling and catch-up still run.
func (e *Engine) register(ctx context.Context) {
	if e.cfg.Register == nil {
		return
	}
	if err := e.cfg.Register(ctx); err != nil && ctx.Err() == nil {
		e.log.ErrorContext(ctx, "registering the subscription failed; polling and catch-up still run", "err", err)
	}
}

// CatchUp searches the server for recognised Observations updated since the
// cursor, less the overlap, and ingests them. The cursor moves only after
// everything found is stored, and searches use ge, not gt, so an equal
// timestamp is never skipped; ingest is idempotent, so the overlap costs
// only a re-read.
func (e *Engine) CatchUp(ctx context.Context, trigger string) error {
	return e.catchUp(ctx, trigger, nil)
}

// catchUp is CatchUp, under the catch-up lease when jl is not nil: the
// lease is renewed with every page taken in, and the cursor moves only in
// the epoch the search began in, so a replica that lost the lease midway
// stops and leaves the cursor to the new holder.
func (e *Engine) catchUp(ctx context.Context, trigger string, jl *jobLease) error {
	if e.cfg.Client == nil {
		return nil
	}
	if e.cfg.Hooks.CatchUp != nil {
		e.cfg.Hooks.CatchUp(trigger)
	}
	cur, err := e.cfg.Store.Cursor(ctx, cursorSearch)
	if err != nil {
		return fmt.Errorf("engine: catch-up: %w", err)
	}
	since := e.now().Add(-e.cfg.Retention)
	var latest time.Time
	if cur != "" {
		t, err := time.Parse(time.RFC3339Nano, cur)
		if err != nil {
			return fmt.Errorf("engine: catch-up: bad cursor %q: %w", cur, err)
		}
		latest = t
		since = t.Add(-e.cfg.Overlap)
	}
	q := url.Values{
		"_lastUpdated": {"ge" + since.UTC().Format(time.RFC3339Nano)},
		"_count":       {fmt.Sprint(searchPage)},
	}
	if len(e.cfg.SearchCodes) > 0 {
		q.Set("code", strings.Join(e.cfg.SearchCodes, ","))
	}
	var batch []json.RawMessage
	flush := func() error {
		if len(batch) == 0 {
			return nil
		}
		_, err := e.Ingest(ctx, "poll", batch)
		batch = batch[:0]
		if err != nil || jl == nil {
			return err
		}
		l, err := jl.rep.AcquireLease(ctx, leaseCatchUp, e.cfg.JobLease)
		if err == nil && l.Epoch != jl.lease.Epoch {
			err = fmt.Errorf("%w: the lease changed hands during the search (epoch %d, now %d)", store.ErrLeaseHeld, jl.lease.Epoch, l.Epoch)
		}
		if err != nil {
			jl.held = false
			return err
		}
		jl.lease = l
		return nil
	}
	found := 0
	err = e.cfg.Client.Search(ctx, "Observation", q, func(entry json.RawMessage) error {
		var en struct {
			Resource json.RawMessage `json:"resource"`
			Search   struct {
				Mode string `json:"mode"`
			} `json:"search"`
		}
		if err := json.Unmarshal(entry, &en); err != nil || len(en.Resource) == 0 || en.Search.Mode == "outcome" {
			return nil
		}
		var m struct {
			Meta struct {
				LastUpdated string `json:"lastUpdated"`
			} `json:"meta"`
		}
		if json.Unmarshal(en.Resource, &m) == nil {
			if t, err := time.Parse(time.RFC3339Nano, m.Meta.LastUpdated); err == nil && t.After(latest) {
				latest = t
			}
		}
		found++
		batch = append(batch, en.Resource)
		if len(batch) >= searchPage {
			return flush()
		}
		return nil
	})
	if err == nil {
		err = flush()
	}
	if err != nil {
		return fmt.Errorf("engine: catch-up: %w", err)
	}
	if !latest.IsZero() {
		set := func() error { return e.cfg.Store.SetCursor(ctx, cursorSearch, latest.UTC().Format(time.RFC3339Nano)) }
		if jl != nil {
			set = func() error {
				return jl.rep.SetCursorUnderLease(ctx, jl.lease, cursorSearch, latest.UTC().Format(time.RFC3339Nano))
			}
		}
		if err := set(); err != nil {
			return fmt.Errorf("engine: catch-up: %w", err)
		}
	}
	e.log.InfoContext(ctx, "catch-up search done", "trigger", trigger, "resources", found)
	return nil
}

// Notified records a notification's counters and asks for a catch-up when
// events are missing: an event number that skips ahead of the last one
// seen, or a count of events since the subscription started that is ahead
// of it (a heartbeat after lost events). A handshake restarts the
// subscription's numbering at its count (0 when it has none), and so does
// a number far below the highest seen (store.EventsRestarted); a restart
// that lowered the numbering asks for a catch-up at once, since events may
// have been lost across it.
func (e *Engine) Notified(ctx context.Context, n notify.Notification) error {
	e.notifiedAt()
	lowest, highest := eventRange(n)
	if n.Subscription == "" {
		return nil
	}
	if n.Type == notify.TypeHandshake {
		if e.handshakes.repeated(n.Subscription, highest, time.Now()) {
			// The same handshake delivered again (the server retried it):
			// the events seen since it are of its numbering, not lost.
			return nil
		}
		previous, err := e.cfg.Store.RestartEvents(ctx, n.Subscription, highest)
		if err != nil {
			return fmt.Errorf("engine: handshake: %w", err)
		}
		if previous > highest {
			e.restarted(ctx, n.Subscription)
			return nil
		}
		e.noteEvents(ctx, n.Subscription, lowest, highest, previous)
		return nil
	}
	if highest == 0 {
		return nil
	}
	previous, err := e.cfg.Store.SeenEvent(ctx, n.Subscription, highest)
	if err != nil {
		return fmt.Errorf("engine: notification: %w", err)
	}
	e.noteEvents(ctx, n.Subscription, lowest, highest, previous)
	return nil
}

// noteEvents notes which events of subscription a notification carried
// (lowest to highest) after the highest seen before (previous): events it
// skipped over are searched for if they miss their grace. A numbering that
// started again (the store took highest as the new highest) is a restart.
func (e *Engine) noteEvents(ctx context.Context, subscription string, lowest, highest, previous uint64) {
	if store.EventsRestarted(previous, highest) {
		e.restarted(ctx, subscription)
		return
	}
	// The grace is the time a delivery takes, on the wall clock, whatever
	// clock the engine dates its work by (Config.Now).
	if e.missing.note(subscription, lowest, highest, previous, time.Now()) {
		e.gapFound(ctx, 0)
	}
}

// restarted handles a subscription whose event numbering the server
// started again: the events noted missing in the old numbering mean
// nothing in the new one, and events sent between the last one received
// and the restart may be lost, so a catch-up search runs now. The new
// numbering is tracked from the restart on.
func (e *Engine) restarted(ctx context.Context, subscription string) {
	e.missing.forget(subscription)
	e.log.WarnContext(ctx, "a subscription's event numbering started again on the server; catching up by search")
	e.RequestCatchUp("subscription-restart")
}

// lastNotifiedCursor is the store cursor that holds, on a store shared by
// replicas, when any replica last received a notification.
const lastNotifiedCursor = "heartbeat: last notification"

// sharedLastNotified returns when any replica sharing the store last
// received a notification, given this replica's own last one (zero when
// none): a load balancer may send every notification to one replica, and
// the others must not take that for a silent subscription. This replica's
// own time is written to the store when it is newer than the one it
// wrote before (*published), at most once per heartbeat tick. Times from
// the store are wall-clock times; a failure to read or write them leaves
// this replica's own.
func (e *Engine) sharedLastNotified(ctx context.Context, own time.Time, published *time.Time) time.Time {
	if !own.IsZero() && own.After(*published) {
		if err := e.cfg.Store.SetCursor(ctx, lastNotifiedCursor, own.UTC().Format(time.RFC3339Nano)); err == nil {
			*published = own
		}
	}
	v, err := e.cfg.Store.Cursor(ctx, lastNotifiedCursor)
	if err != nil || v == "" {
		return own
	}
	at, err := time.Parse(time.RFC3339Nano, v)
	if err != nil || !at.After(own) {
		return own
	}
	return at
}

// notifiedAt notes that a notification arrived, for the heartbeat timeout,
// by the monotonic clock: a silence is a duration, which a wall clock
// stepped back must not lengthen.
func (e *Engine) notifiedAt() {
	e.mu.Lock()
	e.lastNotified = time.Now()
	e.mu.Unlock()
}

// eventRange returns the lowest and highest event numbers a notification
// speaks of (0 when none): its events' numbers, and its count of events
// since the subscription started.
func eventRange(n notify.Notification) (lowest, highest uint64) {
	for _, ev := range n.Events {
		if ev.Number == 0 {
			continue
		}
		if lowest == 0 || ev.Number < lowest {
			lowest = ev.Number
		}
		highest = max(highest, ev.Number)
	}
	if n.HasEventsSinceStart {
		highest = max(highest, n.EventsSinceStart)
	}
	return lowest, highest
}

// gapFound asks for a catch-up of events that never came: events of them
// (0: too many runs to keep) missed their grace.
func (e *Engine) gapFound(ctx context.Context, events uint64) {
	if e.cfg.Hooks.Gap != nil {
		e.cfg.Hooks.Gap()
	}
	e.log.WarnContext(ctx, "subscription events missing; catching up by search", "events", events, "grace", e.cfg.GapGrace)
	e.RequestCatchUp("gap")
}

// Fetch reads resources named by an id-only notification from the server
// and ingests them. It returns only after they are stored, so the sender is
// answered 2xx only when nothing can be lost. A resource the server no
// longer has (404 Not Found, 410 Gone: deleted) is applied as a deletion
// (Deleted), learned now; it is not an error, or the sender would send the
// notification again for ever. The reads together take at most the fetch
// budget (Config.FetchBudget); one that does not fit in it, or fails
// transiently, is deferred: Fetch returns a [*ReadDeferred] at once and a
// catch-up search runs after its RetryAfter (fetchbudget.go).
func (e *Engine) Fetch(ctx context.Context, refs []string) (Receipt, error) {
	if e.cfg.Client == nil {
		return Receipt{}, fmt.Errorf("%w: id-only notifications need a FHIR server to read from (--fhir-base)", ErrInvalid)
	}
	var resources []json.RawMessage
	var gone []Deletion
	readCtx, cancel := context.WithTimeout(ctx, e.cfg.FetchBudget)
	defer cancel()
	for _, ref := range refs {
		typ, id, ok := notify.RelativeRef(ref, "")
		if !ok {
			return Receipt{}, fmt.Errorf("%w: focus %q is not a resource reference", ErrInvalid, ref)
		}
		if typ != "Observation" && typ != "Patient" {
			continue
		}
		body, _, err := e.cfg.Client.Read(readCtx, typ, id)
		if errors.Is(err, client.ErrNotFound) || errors.Is(err, client.ErrGone) {
			e.log.InfoContext(ctx, "a resource a notification named is not on the server; taken as deleted", "type", typ, "err", err)
			d := Deletion{Ref: typ + "/" + id, How: "a read of it answered " + readStatus(err)}
			if fe, ok := errors.AsType[*client.Error](err); ok {
				d.ServerNow = fe.Date
			}
			gone = append(gone, d)
			continue
		}
		if err != nil {
			return Receipt{}, e.readFailed(ctx, readCtx, err)
		}
		resources = append(resources, body)
	}
	var rec Receipt
	if len(resources) > 0 {
		var err error
		if rec, err = e.Ingest(ctx, "notification-id-only", resources); err != nil {
			return Receipt{}, err
		}
	}
	if len(gone) > 0 {
		if _, err := e.Deleted(ctx, gone); err != nil {
			return Receipt{}, err
		}
	}
	return rec, nil
}

func readStatus(err error) string {
	if errors.Is(err, client.ErrGone) {
		return "410 Gone"
	}
	return "404 Not Found"
}

// Deletion is a resource the FHIR server deleted.
type Deletion struct {
	// Ref names it: "Type/id", relative or absolute, possibly versioned.
	Ref string
	// At is when it was deleted, when the server said so (a history
	// entry's response.lastModified). Zero: learned now, from the
	// server's current state, so the deletion comes after every version
	// the store holds.
	At time.Time
	// How says how it was learned, for the stored record.
	How string
	// ServerNow, for a deletion learned from the server's current state
	// (At zero), is the server's clock when it said so (the Date of its
	// answer); zero when unknown. The deletion is dated by it, never by
	// the service's clock: a service clock ahead of the server's would
	// date the deletion after a re-creation the server made later, and
	// hide it.
	ServerNow time.Time
}

// DeletionReceipt says what Deleted did with each deletion it was given.
type DeletionReceipt struct {
	// Applied: the deletion is now the latest version of an Observation
	// the store holds (values derived from it are withdrawn when its
	// patient is evaluated), or already was.
	Applied int
	// Older: the store holds a newer version (the resource was written
	// again after it was deleted), which stands.
	Older int
	// NotHeld: an Observation the store never held or no longer holds,
	// any other resource type, or a reference that names no resource:
	// nothing to do.
	NotHeld int
}

// Deleted applies deletions: each Observation the store holds gets a
// version that withdraws it (reason deleted) under the patient its latest
// version names, last updated when it was deleted, or now, or just after
// the version held when the server's clock is behind this one's. A later
// version (the resource written again) still wins; an older one arriving
// late is refused. An Observation the store never held, or no longer
// holds, and any Patient, are left as they are. It returns after the
// store has made the withdrawals durable, with what became of each.
func (e *Engine) Deleted(ctx context.Context, deletions []Deletion) (DeletionReceipt, error) {
	now := e.now()
	var rec DeletionReceipt
	var inputs []store.Input
	for _, d := range deletions {
		typ, id, ok := notify.RelativeRef(d.Ref, "")
		if !ok || typ != "Observation" {
			rec.NotHeld++
			continue
		}
		logical := typ + "/" + id
		owner, err := e.cfg.Store.Owner(ctx, logical)
		if errors.Is(err, store.ErrNotFound) {
			rec.NotHeld++
			continue
		}
		if err != nil {
			return DeletionReceipt{}, fmt.Errorf("engine: deletion: %w", err)
		}
		at := d.At
		if at.IsZero() {
			// By the server's clock when it is known; after every version
			// held in any case (a Date has whole seconds only).
			at = d.ServerNow
			if at.IsZero() {
				at = now
			}
			held, err := e.cfg.Store.Input(ctx, owner, logical)
			switch {
			case errors.Is(err, store.ErrNotFound):
			case err != nil:
				return DeletionReceipt{}, fmt.Errorf("engine: deletion: %w", err)
			case !at.After(held.LastUpdated):
				at = held.LastUpdated.Add(time.Nanosecond)
			}
		}
		in, err := e.toStored(decode.Item{
			Type: decode.ItemOmitted, ResourceType: typ, ID: id, Ref: logical, Subject: owner, LastUpdated: at,
			Reading:  derive.Reading{Ref: logical},
			Omission: pipeline.DeletedOmission(logical, d.How),
		}, now)
		if err != nil {
			return DeletionReceipt{}, err
		}
		in.Inert, in.OnlyReplaces = true, true
		inputs = append(inputs, in)
	}
	if len(inputs) == 0 {
		return rec, nil
	}
	res, err := e.cfg.Store.PutInputs(ctx, inputs, now)
	if err != nil {
		return DeletionReceipt{}, fmt.Errorf("engine: deletion: %w", err)
	}
	e.stored(inputs, res)
	for _, r := range res {
		switch r {
		case store.PutOlder:
			rec.Older++
		case store.PutSkipped:
			rec.NotHeld++
		default:
			rec.Applied++
		}
	}
	return rec, nil
}

// fetchPatient reads a patient's demographics from the server when the
// stream never carried them. A patient the server does not give (404, 410,
// another refusal no retry changes: factsReadRefused) gives empty facts:
// the values that need them are omitted with a reason and derived when
// they arrive; the refusal is remembered for factsUnavailableFor, so the
// patient's next evaluations do not read it again. Any other failure (the
// server down, throttling) is an error, so the patient stays pending and
// is evaluated again, rather than committed without facts.
func (e *Engine) fetchPatient(ctx context.Context, subject string) (derive.Patient, error) {
	if e.noFacts.known(subject, time.Now()) {
		return derive.Patient{}, nil
	}
	id := strings.TrimPrefix(subject, "Patient/")
	body, _, err := e.cfg.Client.Read(ctx, "Patient", id)
	if err != nil && factsReadRefused(err) {
		e.log.WarnContext(ctx, "the server does not give a patient's Patient resource; evaluated with its facts unknown", "err", err)
		e.noFacts.remember(subject, time.Now())
		return derive.Patient{}, nil
	}
	if err != nil {
		return derive.Patient{}, fmt.Errorf("engine: read patient facts: %w", err)
	}
	it, err := e.cfg.Decoder.Decode(body)
	if err != nil || it.Type != decode.ItemPatient {
		e.log.WarnContext(ctx, "the server's Patient resource could not be read; its facts stay unknown")
		return derive.Patient{}, nil
	}
	if err := e.putPatient(ctx, it, e.now(), e.now()); err != nil {
		return derive.Patient{}, err
	}
	return it.Patient, nil
}

// handshakeRepeat is how long after a subscription's handshake one with
// the same count of events is taken for the same handshake delivered
// again, not a second restart of the numbering.
const handshakeRepeat = 10 * time.Minute

// handshakesSeen remembers each subscription's last handshake in this
// process: its count of events since the subscription started, and when
// it came (monotonic clock).
type handshakesSeen struct {
	mu   sync.Mutex
	last map[string]handshakeSeen
}

type handshakeSeen struct {
	count uint64
	at    time.Time
}

// repeated reports whether a handshake of subscription counting count
// events is a repeat of the last one (same count, within handshakeRepeat),
// and otherwise remembers it. A repeat delivered to another replica is
// taken there for a restart: it costs a catch-up search, nothing is lost.
func (h *handshakesSeen) repeated(subscription string, count uint64, now time.Time) bool {
	h.mu.Lock()
	defer h.mu.Unlock()
	if prev, ok := h.last[subscription]; ok && prev.count == count && now.Sub(prev.at) < handshakeRepeat {
		return true
	}
	if h.last == nil {
		h.last = make(map[string]handshakeSeen)
	}
	for s, seen := range h.last {
		if now.Sub(seen.at) >= handshakeRepeat {
			delete(h.last, s)
		}
	}
	h.last[subscription] = handshakeSeen{count: count, at: now}
	return false
}
