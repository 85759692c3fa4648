package ui

// The adapter over the live engine, for `deadspace serve --ui-listen`. It
// reads only through the engine's public query methods and the store's
// outbox statistics, so the pages do not depend on how the engine
// evaluates.

import (
	"context"
	"errors"
	"fmt"
	"slices"
	"sync"
	"time"

	"github.com/deadspace-fhir/deadspace/api/engine"
	"github.com/deadspace-fhir/deadspace/api/logredact"
	"github.com/deadspace-fhir/deadspace/api/store"
	"github.com/deadspace-fhir/deadspace/derive"
)

// Outbox is the part of the store the operations page reads.
type Outbox interface {
	Stats(ctx context.Context) (store.Stats, error)
	DeadLetters(ctx context.Context, limit int) ([]store.DeadLetter, error)
	DueWrites(ctx context.Context, now time.Time, limit int) ([]store.Write, error)
}

// LiveConfig configures a [Live] source.
type LiveConfig struct {
	Engine *engine.Engine
	Outbox Outbox
	// Window is the pairing window, for the readings left out near a gas.
	Window time.Duration
	// Fall is the fall detector's configuration, for the end of each
	// episode.
	Fall derive.FallConfig
	// Server reports the FHIR server's state: when it last answered and
	// since when it has been failing (zero when it is not).
	Server func() (lastOK, failedSince time.Time)
	Events *OpEvents
	// Omissions counts what the derivations as they stand leave out, as
	// the metrics deadspace_inputs_left_out and
	// deadspace_values_not_emitted do (api/metrics fits); the overview's
	// counts by reason come from it, so the pages and the metrics cannot
	// disagree. Nil leaves the counts empty.
	Omissions Omissions
}

// Omissions is what the engine's Evaluated and LeftOut hooks add up to,
// by reason: per patient, the latest complete evaluation's omissions; in
// total, those plus the inputs left out as they arrived.
type Omissions interface {
	Omissions(subject string) (inputs, values map[string]int)
	OmissionTotals() (inputs, values map[string]int)
}

// Live reads the running service.
type Live struct {
	cfg LiveConfig

	mu       sync.Mutex
	lastSeq  uint64
	subjects map[string]bool
}

// NewLive returns the live source.
func NewLive(cfg LiveConfig) *Live {
	if cfg.Events == nil {
		cfg.Events = NewOpEvents(0)
	}
	return &Live{cfg: cfg, subjects: make(map[string]bool)}
}

// maxLedger bounds how many of a patient's ledger entries one page reads.
const maxLedger = 5000

// knownSubjects follows the derivation feed for patients seen since the
// last call, so the overview does not rescan the feed.
func (l *Live) knownSubjects(ctx context.Context) ([]string, error) {
	l.mu.Lock()
	defer l.mu.Unlock()
	for {
		evs, err := l.cfg.Engine.Events(ctx, l.lastSeq, 1000)
		if err != nil {
			return nil, err
		}
		for _, ev := range evs {
			l.subjects[ev.Subject] = true
			l.lastSeq = ev.Seq
		}
		if len(evs) < 1000 {
			break
		}
	}
	out := make([]string, 0, len(l.subjects))
	for s := range l.subjects {
		out = append(out, s)
	}
	slices.Sort(out)
	return out, nil
}

// patient is what the pages read of one patient.
type patient struct {
	records  []engine.Record
	readings []engine.StoredReading
	// leftOut is what the derivations leave out, by versioned reference
	// (the engine's re-derivation, [engine.Engine.LeftOutInputs]); nil
	// when not read (the overview, which plots nothing).
	leftOut map[string]engine.LeftOutInput
}

// readLeftOut reads what the derivations of the patient's stored data
// leave out, by versioned reference, and in the store's order.
func (l *Live) readLeftOut(ctx context.Context, subject string) (map[string]engine.LeftOutInput, []engine.LeftOutInput, error) {
	los, err := l.cfg.Engine.LeftOutInputs(ctx, subject)
	if err != nil && !errors.Is(err, store.ErrNotFound) {
		return nil, nil, err
	}
	byRef := make(map[string]engine.LeftOutInput, len(los))
	for _, o := range los {
		if _, ok := byRef[o.Reading.Ref]; !ok {
			byRef[o.Reading.Ref] = o
		}
	}
	return byRef, los, nil
}

// omissionOf is the left-out input as derive's omission.
func omissionOf(o engine.LeftOutInput) derive.Omission {
	return derive.Omission{Ref: o.Reading.Ref, Reason: o.Reason, Detail: o.Detail}
}

func (l *Live) read(ctx context.Context, subject string) (patient, error) {
	recs, err := l.cfg.Engine.Derivations(ctx, subject, time.Time{}, time.Unix(1<<40, 0), "", maxLedger)
	if err != nil {
		return patient{}, err
	}
	rs, err := l.cfg.Engine.StoredReadings(ctx, subject)
	if err != nil && !errors.Is(err, store.ErrNotFound) {
		return patient{}, err
	}
	return patient{records: recs, readings: rs}, nil
}

func statusOf(s string) string {
	switch s {
	case "entered-in-error":
		return StatusWithdrawn
	case "amended":
		return StatusAmended
	}
	return StatusFinal
}

// timeline builds a patient's timeline from the ledger and the stored
// readings.
func (l *Live) timeline(ctx context.Context, id string, p patient) Timeline {
	tl := Timeline{ID: id}
	etco2Median := make(map[time.Time]float64)
	gasExplain := make(map[string]string)
	adjusted := make(map[string]float64)
	type fallRecord struct {
		fall        derive.Fall
		status, key string
	}
	var falls []fallRecord // their episodes' ends need the end-tidal series
	for _, rec := range p.records {
		status := statusOf(rec.Status)
		switch {
		case rec.Payload.Fall != nil:
			falls = append(falls, fallRecord{*rec.Payload.Fall, status, rec.Key})
		case rec.Payload.Derivation != nil:
			d := rec.Payload.Derivation
			i := slices.IndexFunc(d.Values, func(v derive.Value) bool { return v.Code == rec.Code })
			if i < 0 {
				continue
			}
			v := valueOf(d.Gas.At(), d.Values[i], status, rec.Key)
			v.Why = rec.Payload.Why
			if d.PaCO2 != 0 && d.PaCO2 != d.Gas.Value {
				adjusted[d.Gas.Ref] = d.PaCO2
			}
			tl.Values = append(tl.Values, v)
			for _, u := range d.Used {
				if u.Kind == derive.KindEtCO2 {
					etco2Median[d.Gas.At()] = u.Median
				}
			}
			if _, ok := gasExplain[d.Gas.Ref]; !ok || rec.Code == derive.CodeGradient {
				gasExplain[d.Gas.Ref] = rec.Key
			}
			tl.Values = append(tl.Values, l.earlier(ctx, rec)...)
		}
	}
	for _, sr := range p.readings {
		r := sr.Reading
		if r.Ref == "" || r.AtMillis == 0 {
			continue
		}
		pt := Point{At: r.At(), Value: r.Value, Ref: r.Ref, Status: StatusFinal}
		if !sr.Usable {
			pt.Status, pt.Why = StatusWithdrawn, "withdrawn or not usable at its source"
			if o, ok := p.leftOut[r.Ref]; ok {
				pt.Why = leftOutText(o.Reason, o.Detail)
			}
		}
		switch r.Kind {
		case derive.KindEtCO2:
			tl.EtCO2 = append(tl.EtCO2, pt)
		case derive.KindPaCO2:
			pt.ExplainID = gasExplain[r.Ref]
			pt.Adjusted = adjusted[r.Ref]
			tl.PaCO2 = append(tl.PaCO2, pt)
		}
	}
	markLeftOut(tl.PaCO2, func(ref string) (derive.Omission, bool) {
		o, ok := p.leftOut[ref]
		return omissionOf(o), ok
	})
	sortValues(tl.Values)
	sortPoints(tl.EtCO2)
	sortPoints(tl.PaCO2)
	series := etco2Series(tl.EtCO2)
	for _, f := range falls {
		tl.Findings = append(tl.Findings, findingOf(f.fall, f.status, f.key, l.cfg.Fall, series))
	}
	span(&tl)
	rowsOf(&tl, etco2Median)
	return tl
}

// earlier returns the superseded versions of a value that the engine
// still keeps (for the retention), so the plot shows what was written
// before a correction. A version no longer kept is left out of the plot;
// the explanation's history still lists its key.
func (l *Live) earlier(ctx context.Context, rec engine.Record) []Value {
	var out []Value
	for _, key := range rec.Revisions {
		old, err := l.cfg.Engine.Derivation(ctx, key)
		if err != nil || old.Key != key || old.Payload.Derivation == nil {
			continue
		}
		d := old.Payload.Derivation
		i := slices.IndexFunc(d.Values, func(v derive.Value) bool { return v.Code == old.Code })
		if i < 0 {
			continue
		}
		v := valueOf(d.Gas.At(), d.Values[i], StatusSuperseded, key)
		v.ReplacedBy = rec.Key
		v.Why = "an input it was derived from was corrected"
		if old.Superseded != nil {
			v.Why = old.Superseded.Because
		}
		out = append(out, v)
	}
	return out
}

// Timeline implements Source.
func (l *Live) Timeline(ctx context.Context, id string) (Timeline, error) {
	subject := "Patient/" + id
	p, err := l.read(ctx, subject)
	if err != nil {
		return Timeline{}, fmt.Errorf("ui: timeline: %w", err)
	}
	if len(p.records) == 0 && len(p.readings) == 0 {
		return Timeline{}, ErrNotFound
	}
	if p.leftOut, _, err = l.readLeftOut(ctx, subject); err != nil {
		return Timeline{}, fmt.Errorf("ui: timeline: %w", err)
	}
	tl := l.timeline(ctx, id, p)
	if len(p.records) >= maxLedger {
		tl.Notes = append(tl.Notes, fmt.Sprintf("only the first %d derived values are shown", maxLedger))
	}
	return tl, nil
}

// Overview implements Source.
func (l *Live) Overview(ctx context.Context) (Overview, error) {
	subjects, err := l.knownSubjects(ctx)
	if err != nil {
		return Overview{}, fmt.Errorf("ui: overview: %w", err)
	}
	pending := map[string]int{}
	standalone := l.cfg.Engine.Standalone()
	if !standalone && l.cfg.Outbox != nil {
		ws, err := l.cfg.Outbox.DueWrites(ctx, time.Unix(1<<40, 0), 100000)
		if err != nil {
			return Overview{}, fmt.Errorf("ui: overview: %w", err)
		}
		for _, w := range ws {
			pending[w.Subject]++
		}
	}
	o := Overview{Source: "the live store"}
	for _, s := range subjects {
		p, err := l.read(ctx, s)
		if err != nil {
			return Overview{}, fmt.Errorf("ui: overview: %w", err)
		}
		id := PatientID(s)
		tl := l.timeline(ctx, id, p)
		row := PatientRow{ID: id, PendingWrites: -1}
		if !standalone {
			row.PendingWrites = pending[s]
		}
		var latest []Value
		for _, v := range tl.Values {
			if v.Status == StatusSuperseded || v.Status == StatusWithdrawn || v.Code == derive.CodeEtCO2Drop || v.Code == derive.CodeEtCO2Rise {
				continue
			}
			if v.At.After(row.LatestGas) {
				row.LatestGas, latest = v.At, nil
			}
			if v.At.Equal(row.LatestGas) {
				latest = append(latest, v)
			}
		}
		row.Latest = overviewValues(latest)
		row.Findings = activeFindings(tl.Findings, latestTime(&tl))
		if l.cfg.Omissions != nil {
			inputs, _ := l.cfg.Omissions.Omissions(s)
			row.LeftOut = countsOf(inputs)
		}
		o.Patients = append(o.Patients, row)
	}
	if l.cfg.Omissions != nil {
		inputs, values := l.cfg.Omissions.OmissionTotals()
		o.LeftOut, o.NotEmitted = countsOf(inputs), countsOf(values)
	}
	return o, nil
}

// Explain implements Source.
func (l *Live) Explain(ctx context.Context, id string) (Explanation, error) {
	rec, err := l.cfg.Engine.Derivation(ctx, id)
	if errors.Is(err, store.ErrNotFound) {
		return Explanation{}, ErrNotFound
	}
	if err != nil {
		return Explanation{}, fmt.Errorf("ui: explain: %w", err)
	}
	return l.explain(ctx, id, rec)
}

// ExplainVersion implements [VersionExplainer]: one version of a series,
// by its revision or the server's versionId; an earlier one is explained
// as it was, marked superseded with what replaced it and why.
func (l *Live) ExplainVersion(ctx context.Context, series string, revision int, serverVersion string) (Explanation, error) {
	rec, err := l.cfg.Engine.DerivationVersion(ctx, series, engine.Version{Revision: revision, ServerVersion: serverVersion})
	if errors.Is(err, store.ErrNotFound) || errors.Is(err, engine.ErrInvalid) {
		return Explanation{}, ErrNotFound
	}
	if err != nil {
		return Explanation{}, fmt.Errorf("ui: explain a version: %w", err)
	}
	return l.explain(ctx, rec.Key, rec)
}

// explain explains rec, found by id (a key or a series).
func (l *Live) explain(ctx context.Context, id string, rec engine.Record) (Explanation, error) {
	if rec.Key != id && rec.Series != id {
		// An engine that no longer keeps the earlier version answers its
		// key with the value that replaced it.
		return Explanation{
			ID: id, PatientID: PatientID(rec.Subject), Title: "An earlier version of a value",
			Status: StatusSuperseded, ReplacedBy: rec.Key, Why: "an input it was derived from was corrected",
			Notes:   []string{"this earlier version is no longer kept (past the retention); the value that replaced it is linked"},
			History: history(rec),
		}, nil
	}
	ex, err := l.cfg.Engine.Explain(ctx, rec)
	if err != nil {
		return Explanation{}, fmt.Errorf("ui: explain: %w", err)
	}
	details := make(map[string]InputDetail, len(ex.Inputs))
	for _, in := range ex.Inputs {
		details[in.Reading.Ref] = InputDetail{Available: in.Available, Original: in.Original, Conversion: in.Conversion}
	}
	lookup := func(ref string) InputDetail { return details[ref] }
	status := statusOf(rec.Status)
	var out Explanation
	id = rec.Key
	switch {
	case ex.Fall != nil:
		rs, rerr := l.cfg.Engine.StoredReadings(ctx, rec.Subject)
		if rerr != nil && !errors.Is(rerr, store.ErrNotFound) {
			return Explanation{}, fmt.Errorf("ui: explain: the end-tidal series: %w", rerr)
		}
		var etco2 []Point
		for _, sr := range rs {
			if sr.Usable && sr.Reading.Kind == derive.KindEtCO2 && sr.Reading.AtMillis != 0 {
				etco2 = append(etco2, Point{At: sr.Reading.At(), Value: sr.Reading.Value, Ref: sr.Reading.Ref, Status: StatusFinal})
			}
		}
		out = explainFall(PatientID(rec.Subject), *ex.Fall, id, status, lookup, l.cfg.Fall, etco2Series(etco2))
	case ex.Derivation != nil:
		// The readings left out, each with its own reason and time: the
		// engine's re-derivation of the patient's stored data, as the
		// report lists what the replay left out.
		_, los, err := l.readLeftOut(ctx, rec.Subject)
		if err != nil {
			return Explanation{}, fmt.Errorf("ui: explain: the readings left out: %w", err)
		}
		nearby := make([]OmittedInput, 0, len(los))
		for _, o := range los {
			nearby = append(nearby, OmittedInput{Ref: o.Reading.Ref, Kind: o.Reading.Kind.String(), At: atOf(o.Reading), Reason: o.Reason, Detail: o.Detail})
		}
		out = explainValue(PatientID(rec.Subject), ex.Derivation, rec.Code, id, status, lookup, l.cfg.Window, nearby)
	default:
		return Explanation{}, ErrNotFound
	}
	out.Series = rec.Series
	out.AlgorithmVersion = ex.AlgorithmVersion
	out.Notes = append(out.Notes, ex.Notes...)
	out.History = history(rec)
	if status == StatusWithdrawn {
		out.Why = rec.Payload.Why
	}
	if sup := rec.Superseded; sup != nil {
		// An earlier version, explained as it was: say what replaced it.
		out.Status, out.ReplacedBy, out.Why = StatusSuperseded, sup.Key, sup.Because
		if out.Value != nil {
			out.Value.Status, out.Value.ReplacedBy, out.Value.Why = StatusSuperseded, sup.Key, sup.Because
		}
		out.History = append(out.History[:len(out.History)-1], Revision{ID: rec.Key}, Revision{ID: sup.Key, Current: true})
	}
	return out, nil
}

// countsOf orders counts by reason as [countReasons] does.
func countsOf(byReason map[string]int) []ReasonCount {
	var rs []derive.Reason
	for r, n := range byReason {
		for range n {
			rs = append(rs, derive.Reason(r))
		}
	}
	return countReasons(rs)
}

func history(rec engine.Record) []Revision {
	out := make([]Revision, 0, len(rec.Revisions)+1)
	for _, k := range rec.Revisions {
		out = append(out, Revision{ID: k})
	}
	return append(out, Revision{ID: rec.Key, Current: true})
}

// Operations implements Source.
func (l *Live) Operations(ctx context.Context) (Operations, error) {
	op := Operations{Standalone: l.cfg.Engine.Standalone(), Events: l.cfg.Events.List()}
	h, err := l.cfg.Engine.Health(ctx)
	if err != nil {
		return Operations{}, fmt.Errorf("ui: operations: %w", err)
	}
	t := now()
	op.OutboxDepth, op.OldestWrite, op.DeadCount, op.Pending = h.Stats.OutboxDepth, h.Stats.OldestWrite, h.Stats.DeadLetters, h.Stats.DirtyPatients
	if !op.OldestWrite.IsZero() {
		op.OutboxAge = t.Sub(op.OldestWrite).Round(time.Second)
	}
	switch {
	case op.Standalone:
		op.ServerState = "standalone: no FHIR server is configured; results stay in the store"
	case l.cfg.Server != nil:
		lastOK, failing := l.cfg.Server()
		op.ServerOK = lastOK
		switch {
		case !failing.IsZero():
			op.ServerState = "failing"
			op.FailingFor = t.Sub(failing).Round(time.Second)
		case lastOK.IsZero():
			op.ServerState = "not answered yet"
		default:
			op.ServerState = "answering"
		}
	}
	if l.cfg.Outbox != nil {
		dls, err := l.cfg.Outbox.DeadLetters(ctx, 200)
		if err != nil {
			return Operations{}, fmt.Errorf("ui: operations: %w", err)
		}
		for _, d := range dls {
			op.DeadLetters = append(op.DeadLetters, DeadLetter{
				At: d.At, Attempts: d.Attempts, Reason: logredact.Text(d.Reason), Answer: logredact.Text(d.LastError), Values: len(d.Series),
			})
		}
	}
	return op, nil
}

// OpEvents keeps the latest gaps and catch-ups, for the operations page.
type OpEvents struct {
	mu  sync.Mutex
	max int
	evs []OpEvent
}

// NewOpEvents keeps at most max events (100 when max <= 0).
func NewOpEvents(max int) *OpEvents {
	if max <= 0 {
		max = 100
	}
	return &OpEvents{max: max}
}

// Add records an event now.
func (o *OpEvents) Add(what string) {
	o.mu.Lock()
	defer o.mu.Unlock()
	o.evs = append(o.evs, OpEvent{At: now().UTC(), What: what})
	if len(o.evs) > o.max {
		o.evs = o.evs[len(o.evs)-o.max:]
	}
}

// List returns the events, newest first.
func (o *OpEvents) List() []OpEvent {
	o.mu.Lock()
	defer o.mu.Unlock()
	out := make([]OpEvent, len(o.evs))
	for i, e := range o.evs {
		out[len(o.evs)-1-i] = e
	}
	return out
}
