package engine

// The read side, for the APIs: a derivation that stores nothing, lookups in
// the ledger, explanations of stored results, and the derivation feed.
// Nothing here changes the store.

import (
	"context"
	"crypto/sha256"
	"encoding/hex"
	"encoding/json"
	"errors"
	"fmt"
	"slices"
	"strings"
	"time"

	"github.com/deadspace-fhir/deadspace/api/pipeline"
	"github.com/deadspace-fhir/deadspace/api/store"
	"github.com/deadspace-fhir/deadspace/derive"
	"github.com/deadspace-fhir/deadspace/fhir/decode"
	"github.com/deadspace-fhir/deadspace/fhir/encode"
	fhirref "github.com/deadspace-fhir/deadspace/fhir/ref"
	"github.com/deadspace-fhir/deadspace/fhir/units"
)

// ResourceError is a request resource that is not JSON or not a FHIR
// resource. It matches [ErrInvalid].
type ResourceError struct {
	// Index is the resource's position in the slice given.
	Index int
	Err   error
}

func (e *ResourceError) Error() string { return fmt.Sprintf("resource %d: %v", e.Index, e.Err) }

// Unwrap makes the error match both ErrInvalid and the decoder's error.
func (e *ResourceError) Unwrap() []error { return []error{ErrInvalid, e.Err} }

// CheckResources returns a *[ResourceError] for the first resource that is
// not a FHIR resource. It lets an API refuse a request whole, with nothing
// stored, where [Engine.Ingest] would reject that resource alone.
func (e *Engine) CheckResources(resources []json.RawMessage) error {
	if len(resources) == 0 {
		return fmt.Errorf("%w: no resources", ErrInvalid)
	}
	for i, raw := range resources {
		if _, err := e.cfg.Decoder.Decode(raw); err != nil {
			return &ResourceError{Index: i, Err: err}
		}
	}
	return nil
}

// IngestChecked is [Engine.Ingest] for a request that must be taken whole
// or not at all: when any resource is not a FHIR resource it stores nothing
// and returns a *[ResourceError]. Usable and unusable FHIR resources are
// still accepted or rejected one by one, as Ingest does. Each resource is
// decoded twice; the check is a fraction of the cost of the store write.
func (e *Engine) IngestChecked(ctx context.Context, mode string, resources []json.RawMessage) (Receipt, error) {
	if err := e.CheckResources(resources); err != nil {
		return Receipt{}, err
	}
	return e.Ingest(ctx, mode, resources)
}

// Compute derives every result the resources support, exactly as a replay
// of them would, and stores nothing. A resource that is not a FHIR resource
// fails the whole call with a *[ResourceError].
func (e *Engine) Compute(ctx context.Context, resources []json.RawMessage) (pipeline.Report, error) {
	if len(resources) == 0 {
		return pipeline.Report{}, fmt.Errorf("%w: no resources", ErrInvalid)
	}
	col := pipeline.NewCollector()
	for i, raw := range resources {
		if i%4096 == 0 && ctx.Err() != nil {
			return pipeline.Report{}, fmt.Errorf("engine: compute: %w", ctx.Err())
		}
		if _, err := col.AddLine(e.cfg.Decoder, raw); err != nil {
			return pipeline.Report{}, &ResourceError{Index: i, Err: err}
		}
	}
	rep, err := col.Finish(e.cfg.Derive, e.cfg.Encoder)
	if err != nil {
		return pipeline.Report{}, fmt.Errorf("engine: compute: %w", err)
	}
	return rep, nil
}

// Device returns the software Device every derived resource cites, as
// FHIR JSON.
func (e *Engine) Device() (json.RawMessage, error) { return e.cfg.Encoder.DeviceJSON() }

// Record is one ledger entry with its payload read.
type Record struct {
	store.Entry
	Payload EntryPayload
	// Code is the code of the derived Observation ("" when it has none).
	Code derive.Code
	// Superseded is set when the record is an earlier version of its
	// series, found by the key it had then.
	Superseded *Supersession
}

// Supersession says what replaced an earlier version of a value, and why.
type Supersession struct {
	// Key and Status are the series' entry as it stands now.
	Key, Status string
	Because     string
}

// ObservationID returns the id this service gave the Observation.
func (r Record) ObservationID() string {
	id, err := encode.ObservationID(r.Series)
	if err != nil {
		return ""
	}
	return id
}

// readRecord reads a ledger entry, its result, and encodes its Observation
// as it stands.
func (e *Engine) readRecord(ctx context.Context, en store.Entry) (Record, error) {
	rec := Record{Entry: en}
	if err := json.Unmarshal(en.Payload, &rec.Payload); err != nil {
		return Record{}, fmt.Errorf("engine: ledger entry payload: %w", err)
	}
	if err := e.loadResult(ctx, &rec.Payload); err != nil {
		return Record{}, err
	}
	rec.Code = rec.Payload.Code
	if rec.Code == "" {
		// An entry written before entries named their code.
		rec.Code = legacyCode(rec.Payload, en.Series)
		rec.Payload.Code = rec.Code
	}
	p := rec.Payload
	obs, err := e.cfg.Encoder.ValueJSON(encode.Write{Subject: en.Subject, Derivation: p.Derivation, Fall: p.Fall, Why: p.Why}, en.Series, en.Status)
	if err != nil {
		return Record{}, fmt.Errorf("engine: ledger entry: %w", err)
	}
	rec.Payload.Observation = obs
	return rec, nil
}

// legacyCode finds the code of the value of series in the result.
func legacyCode(p EntryPayload, series string) derive.Code {
	if p.Fall != nil {
		return derive.CodeEtCO2Drop
	}
	if p.Derivation == nil {
		return ""
	}
	for _, v := range p.Derivation.Values {
		if id, err := encode.ValueIdentity(*p.Derivation, v); err == nil && id.Series == series {
			return v.Code
		}
	}
	return ""
}

// validIdentifier reports whether s has the form of a key or series value.
func validIdentifier(s string) bool {
	h, ok := strings.CutPrefix(s, "sha256:")
	if !ok || len(h) != 2*sha256.Size {
		return false
	}
	_, err := hex.DecodeString(h)
	return err == nil
}

// Derivation finds a ledger entry by a derivation identifier value: its
// current key, an earlier key, or its series. It returns an error matching
// [ErrInvalid] for a value of the wrong form and [store.ErrNotFound] when
// no entry has it.
func (e *Engine) Derivation(ctx context.Context, identifier string) (Record, error) {
	if !validIdentifier(identifier) {
		return Record{}, fmt.Errorf("%w: identifier %q: want sha256: and 64 hex digits", ErrInvalid, identifier)
	}
	en, err := e.cfg.Store.EntryByKey(ctx, identifier)
	if errors.Is(err, store.ErrNotFound) {
		en, err = e.cfg.Store.Entry(ctx, identifier)
	}
	if err != nil {
		return Record{}, fmt.Errorf("engine: derivation: %w", err)
	}
	if en.Key == identifier || en.Series == identifier {
		return e.readRecord(ctx, en)
	}
	// An earlier key: explain the value as it was, and say what replaced it.
	old, err := e.cfg.Store.EntryVersion(ctx, identifier)
	if err != nil {
		return Record{}, fmt.Errorf("engine: derivation: earlier version (kept for the retention only): %w", err)
	}
	return e.superseded(ctx, en, old)
}

// superseded reads old, an earlier version of cur's series, as it was,
// marked superseded by cur with the reason.
func (e *Engine) superseded(ctx context.Context, cur, old store.Entry) (Record, error) {
	rec, err := e.readRecord(ctx, old)
	if err != nil {
		return Record{}, err
	}
	now, err := e.readRecord(ctx, cur)
	if err != nil {
		return Record{}, err
	}
	because := "re-derived: an input it was derived from was corrected, or the readings in its window changed; the value with the newer key replaced it"
	if cur.Status == statusWithdrawn {
		because = "re-derived, then withdrawn: " + now.Payload.Why
	}
	rec.Superseded = &Supersession{Key: cur.Key, Status: cur.Status, Because: because}
	return rec, nil
}

// Version names one version of a derived value's series. Revision counts
// the keys the series has had: 1 is the first recorded, the current one is
// the last (a withdrawal keeps its key, so it is the same revision).
// ServerVersion is the versionId the FHIR server gave the derived
// Observation when that version was written. Exactly one is set.
type Version struct {
	Revision      int
	ServerVersion string
}

// DerivationVersion finds one version of a series: the current one as
// [Engine.Derivation] reads it, an earlier one as it was, marked superseded
// with what replaced it and why. It returns an error matching [ErrInvalid]
// for a series of the wrong form or a version named neither or both ways,
// and [store.ErrNotFound] when the series has no such version or no longer
// keeps it (earlier versions are kept for the history retention).
func (e *Engine) DerivationVersion(ctx context.Context, series string, v Version) (Record, error) {
	if !validIdentifier(series) {
		return Record{}, fmt.Errorf("%w: series %q: want sha256: and 64 hex digits", ErrInvalid, series)
	}
	if v.Revision < 0 || (v.Revision > 0) == (v.ServerVersion != "") {
		return Record{}, fmt.Errorf("%w: name the version by its revision (from 1) or by the server's versionId, one of the two", ErrInvalid)
	}
	cur, err := e.cfg.Store.Entry(ctx, series)
	if err != nil {
		return Record{}, fmt.Errorf("engine: derivation version: %w", err)
	}
	if n := len(cur.Revisions) + 1; v.Revision > n {
		return Record{}, fmt.Errorf("engine: derivation version: revision %d of a series with %d: %w", v.Revision, n, store.ErrNotFound)
	}
	switch {
	case v.Revision == len(cur.Revisions)+1:
		return e.readRecord(ctx, cur)
	case v.Revision > 0:
		old, err := e.cfg.Store.EntryVersion(ctx, cur.Revisions[v.Revision-1])
		if err != nil {
			return Record{}, fmt.Errorf("engine: derivation version: revision %d (kept for the retention only): %w", v.Revision, err)
		}
		return e.superseded(ctx, cur, old)
	}
	// A new version keeps the server's ids of the one it replaces until its
	// own write is acknowledged, so the oldest version that carries the
	// server's version is the one written as it.
	for _, k := range cur.Revisions {
		old, err := e.cfg.Store.EntryVersion(ctx, k)
		if errors.Is(err, store.ErrNotFound) {
			continue // pruned with the history
		}
		if err != nil {
			return Record{}, fmt.Errorf("engine: derivation version: %w", err)
		}
		if old.ServerVersion == v.ServerVersion {
			return e.superseded(ctx, cur, old)
		}
	}
	if cur.ServerVersion == v.ServerVersion {
		return e.readRecord(ctx, cur)
	}
	return Record{}, fmt.Errorf("engine: derivation version: no version kept was written as the server's version %q: %w", v.ServerVersion, store.ErrNotFound)
}

// DerivationByObservation finds a patient's ledger entry by the id of its
// Observation: the id the FHIR server assigned or the one this service
// gave it ("ds-…"). The store indexes entries by series and key only, so
// this reads the patient's ledger.
func (e *Engine) DerivationByObservation(ctx context.Context, subject, id string) (Record, error) {
	ledger, err := e.cfg.Store.Ledger(ctx, subject)
	if err != nil {
		return Record{}, fmt.Errorf("engine: derivation by observation: %w", err)
	}
	for _, en := range ledger {
		rec := Record{Entry: en}
		if en.ServerID == id || rec.ObservationID() == id {
			return e.readRecord(ctx, en)
		}
	}
	return Record{}, fmt.Errorf("engine: no derivation with that observation id: %w", store.ErrNotFound)
}

// Derivations lists a patient's ledger entries with physiological time in
// [from, to), oldest first, after the entry with series after (for
// paging), at most limit.
func (e *Engine) Derivations(ctx context.Context, subject string, from, to time.Time, after string, limit int) ([]Record, error) {
	ens, err := e.cfg.Store.EntriesBetween(ctx, subject, from, to, after, limit)
	if err != nil {
		return nil, fmt.Errorf("engine: derivations: %w", err)
	}
	out := make([]Record, 0, len(ens))
	for _, en := range ens {
		rec, err := e.readRecord(ctx, en)
		if err != nil {
			return nil, err
		}
		out = append(out, rec)
	}
	return out, nil
}

// Entry returns the ledger entry of a series as it is now.
func (e *Engine) Entry(ctx context.Context, series string) (Record, error) {
	en, err := e.cfg.Store.Entry(ctx, series)
	if err != nil {
		return Record{}, fmt.Errorf("engine: entry: %w", err)
	}
	return e.readRecord(ctx, en)
}

// Events returns feed events after the sequence number after, in order.
func (e *Engine) Events(ctx context.Context, after uint64, limit int) ([]store.Event, error) {
	evs, err := e.cfg.Store.Events(ctx, after, limit)
	if err != nil {
		return nil, fmt.Errorf("engine: events: %w", err)
	}
	return evs, nil
}

// LastEvent returns the sequence number of the newest feed event.
func (e *Engine) LastEvent(ctx context.Context) (uint64, error) {
	seq, err := e.cfg.Store.LastEvent(ctx)
	if err != nil {
		return 0, fmt.Errorf("engine: last event: %w", err)
	}
	return seq, nil
}

// Roles of an input in an explanation.
const (
	RoleBloodGas     = "blood-gas"
	RolePaired       = "paired"
	RoleFallBaseline = "fall-baseline"
	RoleFallEpisode  = "fall-episode"
)

// Explanation is how one derivation was made.
type Explanation struct {
	// Record is the ledger entry explained; nil when recomputed.
	Record     *Record
	Recomputed bool
	Subject    string
	// One of Derivation and Fall is set, or neither when a blood gas
	// produced no value or is itself unusable.
	Derivation *derive.Derivation
	Fall       *derive.Fall
	Values     []ExplainedValue
	// Inputs are what the values cite, the blood gas first.
	Inputs []ExplainedInput
	// Pairings are the summaries the values cite: the other reports of the
	// blood gas's sample, then the kinds the values use
	// ([derive.Derivation.CitedSummaries], the encoder's rule).
	Pairings []derive.Summary
	// ValuesNotEmitted are the blood gas's omitted values, Ref set to it.
	ValuesNotEmitted []derive.Omission
	// Patient is set when a value used the patient's sex or age.
	Patient *derive.Patient
	// AlgorithmVersion is the rules version that computed the values: the
	// current one when the stored key matches a key computed now, else "".
	AlgorithmVersion string
	// BloodGasOmission is why the blood gas itself cannot be used.
	BloodGasOmission *derive.Omission
	Notes            []string
}

// ExplainedValue is one derived value.
type ExplainedValue struct {
	Observation json.RawMessage
	// Value is nil for a fall, whose number is the Fall's Change.
	Value *derive.Value
}

// ExplainedInput is one cited input, as used and as its source wrote it.
type ExplainedInput struct {
	Reading   derive.Reading
	Role      string
	VersionID string
	// Available is true when the store holds the cited version, so
	// Original and Conversion are filled.
	Available  bool
	Original   decode.Original
	Conversion units.Conversion
}

// Explain explains a ledger entry from what was recorded when it was
// decided and the inputs the store holds now.
func (e *Engine) Explain(ctx context.Context, rec Record) (Explanation, error) {
	ex := Explanation{Record: &rec, Subject: rec.Subject}
	p := rec.Payload
	switch {
	case p.Derivation != nil:
		d := p.Derivation
		ex.Derivation = d
		i := slices.IndexFunc(d.Values, func(v derive.Value) bool { return v.Code == rec.Code })
		if i < 0 {
			ex.Notes = append(ex.Notes, fmt.Sprintf("the recorded derivation has no value %q; its inputs are listed whole", rec.Code))
			ex.Values = []ExplainedValue{{Observation: p.Observation}}
			ex.Pairings = d.Used
		} else {
			v := d.Values[i]
			ex.Values = []ExplainedValue{{Observation: p.Observation, Value: &v}}
			ex.Pairings = citedSummaries(&ex, *d, v)
			if v.UsesPatient {
				ex.Patient = &d.Patient
			}
			if id, err := encode.ValueIdentity(*d, v); err == nil && id.Key == rec.Key {
				ex.AlgorithmVersion = derive.AlgorithmVersion
			}
		}
		ex.Inputs = e.explainReadings(ctx, &ex, rec.Subject, d.Gas, ex.Pairings)
		ex.ValuesNotEmitted = valueOmissions(*d)
	case p.Fall != nil:
		f := p.Fall
		ex.Fall = f
		ex.Values = []ExplainedValue{{Observation: p.Observation}}
		if id, err := encode.FallIdentity(rec.Subject, *f); err == nil && id.Key == rec.Key {
			ex.AlgorithmVersion = derive.AlgorithmVersion
		}
		for _, set := range []struct {
			role string
			rs   []derive.Reading
		}{{RoleFallBaseline, f.BaselineReadings}, {RoleFallEpisode, f.EpisodeReadings}} {
			for _, r := range set.rs {
				ex.Inputs = append(ex.Inputs, e.explainInput(ctx, &ex, rec.Subject, r, set.role))
			}
		}
	default:
		return Explanation{}, fmt.Errorf("engine: ledger entry holds neither a derivation nor a fall")
	}
	if ex.AlgorithmVersion == "" && len(ex.Values) == 1 && (ex.Fall != nil || ex.Values[0].Value != nil) {
		ex.Notes = append(ex.Notes, "the stored key differs from one computed under algorithm "+derive.AlgorithmVersion+
			": an earlier version of the rules computed this value")
	}
	return ex, nil
}

// ExplainBloodGas recomputes what a stored blood gas gives now from the
// patient's stored inputs, and explains it: every value with its inputs,
// or, when it gives none, why. ref may be versioned; the stored version
// is the one explained.
func (e *Engine) ExplainBloodGas(ctx context.Context, subject, ref string) (Explanation, error) {
	logical, vid := splitVersion(ref)
	in, err := e.cfg.Store.Input(ctx, subject, logical)
	if err != nil {
		return Explanation{}, fmt.Errorf("engine: explain blood gas: %w", err)
	}
	si, err := decodeStored(in.Payload, in.Logical, in.VersionID)
	if err != nil {
		return Explanation{}, fmt.Errorf("engine: explain blood gas: stored input: %w", err)
	}
	ex := Explanation{Recomputed: true, Subject: subject, AlgorithmVersion: derive.AlgorithmVersion}
	if vid != "" && vid != in.VersionID {
		ex.Notes = append(ex.Notes, fmt.Sprintf("version %s was asked for; the store holds version %s, which is explained", vid, in.VersionID))
	}
	if si.Item.Type != decode.ItemReading {
		om := si.Item.Omission
		ex.BloodGasOmission = &om
		return ex, nil
	}
	if si.Item.Reading.Kind != derive.KindPaCO2 {
		return Explanation{}, fmt.Errorf("%w: %s is a %s reading, not an arterial blood gas", ErrInvalid, logical, si.Item.Reading.Kind)
	}
	gas := si.Item.Reading
	results, omitted, facts, err := e.recompute(ctx, subject)
	if err != nil {
		return Explanation{}, err
	}
	if facts.Ref == "" {
		ex.Notes = append(ex.Notes, "no Patient resource is stored for this patient; values that need sex or age are computed without them")
	}
	for _, o := range omitted {
		if o.Ref != gas.Ref {
			continue
		}
		if o.Code == "" {
			om := o
			ex.BloodGasOmission = &om
		} else {
			ex.ValuesNotEmitted = append(ex.ValuesNotEmitted, o)
		}
	}
	for _, r := range results {
		if r.Derivation == nil || r.Derivation.Gas.Ref != gas.Ref {
			continue
		}
		d := r.Derivation
		ex.Derivation = d
		ex.Pairings = d.Used
		for _, v := range d.Values {
			id, err := encode.ValueIdentity(*d, v)
			if err != nil {
				return Explanation{}, fmt.Errorf("engine: explain blood gas: %w", err)
			}
			raw, err := e.cfg.Encoder.ValueJSON(encode.Write{Subject: subject, Derivation: d}, id.Series, statusFinal)
			if err != nil {
				return Explanation{}, fmt.Errorf("engine: explain blood gas: %w", err)
			}
			v := v
			if v.UsesPatient {
				ex.Patient = &d.Patient
			}
			ex.Values = append(ex.Values, ExplainedValue{Observation: raw, Value: &v})
		}
	}
	ex.Inputs = e.explainReadings(ctx, &ex, subject, gas, ex.Pairings)
	return ex, nil
}

// recompute evaluates a patient's stored inputs as the evaluation loop
// does, without committing anything. Unlike the loop it never reads the
// Patient from the FHIR server: a read call must not have side effects.
func (e *Engine) recompute(ctx context.Context, subject string) ([]pipeline.Result, []derive.Omission, derive.Patient, error) {
	inputs, err := e.loadInputs(ctx, subject)
	if err != nil {
		return nil, nil, derive.Patient{}, fmt.Errorf("engine: recompute: %w", err)
	}
	var facts derive.Patient
	p, err := e.cfg.Store.Patient(ctx, subject)
	switch {
	case err == nil:
		if err := json.Unmarshal(p.Payload, &facts); err != nil {
			return nil, nil, derive.Patient{}, fmt.Errorf("engine: recompute: stored patient: %w", err)
		}
	case !errors.Is(err, store.ErrNotFound):
		return nil, nil, derive.Patient{}, fmt.Errorf("engine: recompute: %w", err)
	}
	results, omitted, err := pipeline.Evaluate(e.cfg.Derive, e.cfg.Encoder, subject, facts, inputs)
	if err != nil {
		return nil, nil, derive.Patient{}, fmt.Errorf("engine: recompute: %w", err)
	}
	return results, omitted, facts, nil
}

// citedSummaries returns the summaries whose readings the value's
// Observation cites in derivedFrom, by the encoder's own rule
// ([derive.Derivation.CitedSummaries]), so Explain lists exactly the inputs
// the written record cites. A derivation the rule refuses (which the encoder
// would not have written) is noted, and what it found is listed.
func citedSummaries(ex *Explanation, d derive.Derivation, v derive.Value) []derive.Summary {
	sums, err := d.CitedSummaries(v)
	if err != nil {
		ex.Notes = append(ex.Notes, "the recorded derivation is incomplete: "+err.Error())
	}
	return sums
}

func valueOmissions(d derive.Derivation) []derive.Omission {
	out := make([]derive.Omission, 0, len(d.Omitted))
	for _, o := range d.Omitted {
		o.Ref = d.Gas.Ref
		out = append(out, o)
	}
	return out
}

// explainReadings explains the blood gas and every reading of the
// summaries, each once.
func (e *Engine) explainReadings(ctx context.Context, ex *Explanation, subject string, gas derive.Reading, sums []derive.Summary) []ExplainedInput {
	out := []ExplainedInput{e.explainInput(ctx, ex, subject, gas, RoleBloodGas)}
	seen := map[string]bool{gas.Ref: true}
	for _, s := range sums {
		for _, r := range s.Readings {
			if seen[r.Ref] {
				continue
			}
			seen[r.Ref] = true
			out = append(out, e.explainInput(ctx, ex, subject, r, RolePaired))
		}
	}
	return out
}

// explainInput looks up the stored version of one cited reading for the
// value and unit its source wrote. A missing or different version is
// noted, not an error: the explanation of what was used still stands.
func (e *Engine) explainInput(ctx context.Context, ex *Explanation, subject string, r derive.Reading, role string) ExplainedInput {
	logical, vid := splitVersion(r.Ref)
	out := ExplainedInput{Reading: r, Role: role, VersionID: vid}
	in, err := e.cfg.Store.Input(ctx, subject, logical)
	switch {
	case errors.Is(err, store.ErrNotFound):
		ex.Notes = append(ex.Notes, r.Ref+": no longer stored (pruned past retention); its original value and unit are not known")
		return out
	case err != nil:
		e.log.WarnContext(ctx, "reading a stored input for an explanation failed", "err", err)
		ex.Notes = append(ex.Notes, r.Ref+": the stored input could not be read")
		return out
	case in.VersionID != vid:
		ex.Notes = append(ex.Notes, fmt.Sprintf("%s: the store holds version %s now; the original of the cited version is not kept", r.Ref, in.VersionID))
		return out
	}
	si, err := decodeStored(in.Payload, in.Logical, in.VersionID)
	if err != nil {
		e.log.WarnContext(ctx, "a stored input could not be decoded for an explanation", "err", err)
		ex.Notes = append(ex.Notes, r.Ref+": the stored input could not be read")
		return out
	}
	out.Available = true
	out.Original = si.Item.Original
	out.Conversion = si.Item.Conversion
	return out
}

// splitVersion turns "Observation/x/_history/2" into ("Observation/x", "2").
func splitVersion(r string) (logical, versionID string) { return fhirref.Split(r) }
