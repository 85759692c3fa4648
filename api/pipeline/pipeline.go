// Package pipeline turns decoded FHIR inputs into derived results: it keeps
// the latest version of each input, groups inputs by patient, hands each
// blood gas to derive (which pairs it with the readings around its sample
// time and prefers the better of two sources per window), finds end-tidal
// CO2 falls and rises, and encodes
// every result as FHIR resources. It also accounts for every input that did
// not become part of a result, with a reason.
//
// The replay command feeds it a whole export at once through [Collector]; the
// live engine calls [Evaluate] for one patient whenever that patient's inputs
// change. Both produce the same results for the same inputs, which is what
// lets a replay audit the live service.
package pipeline

import (
	"encoding/binary"
	"encoding/json"
	"fmt"
	"math"
	"slices"
	"sort"
	"strings"
	"time"

	"github.com/deadspace-fhir/deadspace/derive"
	"github.com/deadspace-fhir/deadspace/fhir/bulk"
	"github.com/deadspace-fhir/deadspace/fhir/decode"
	"github.com/deadspace-fhir/deadspace/fhir/encode"
	"github.com/deadspace-fhir/deadspace/fhir/ref"
)

// Result is one derivation (for a blood gas) or one fall finding, with the
// resources that represent it.
type Result struct {
	// Subject is the patient reference, "Patient/x".
	Subject    string
	Derivation *derive.Derivation
	Fall       *derive.Fall
	Bundle     encode.Bundle
}

// Time is the physiological time of the result: the blood gas's sample time
// or the fall's onset.
func (r Result) Time() time.Time {
	if r.Derivation != nil {
		return r.Derivation.Gas.At()
	}
	return r.Fall.Onset
}

// Input is one accepted reading with what the pipeline needs to rank it.
type Input struct {
	Reading  derive.Reading
	Priority int
}

// Evaluate derives every result for one patient. readings are the patient's
// accepted inputs of every kind (blood gases included), in any order. It
// returns the results in time order, the omissions of inputs that became no
// part of any result, and the omissions of values that were not emitted.
func Evaluate(cfg derive.Config, enc *encode.Encoder, subject string, facts derive.Patient, inputs []Input) ([]Result, []derive.Omission, error) {
	return EvaluateFrom(cfg, enc, subject, facts, inputs, time.Time{})
}

// EvaluateFrom is Evaluate for the blood gases sampled at gasesFrom or
// later only (every one when it is zero); falls and rises are always all
// found. The live engine uses it when new data can change only later
// results. The omissions are then incomplete.
func EvaluateFrom(cfg derive.Config, enc *encode.Encoder, subject string, facts derive.Patient, inputs []Input, gasesFrom time.Time) ([]Result, []derive.Omission, error) {
	results, omitted, _, err := EvaluateIncremental(cfg, enc, subject, facts, inputs, Incremental{GasesFrom: gasesFrom})
	return results, omitted, err
}

// FallState is where one patient's fall and rise detection stands: the
// detector after every end-tidal reading before At. The live engine keeps
// it between evaluations, so that an evaluation runs the detector over the
// readings from At on only, and finds what a run over the whole series
// finds.
type FallState struct {
	At   time.Time
	scan *derive.FallScan
}

// Incremental says what an evaluation may leave out, and what to keep for
// the next one.
type Incremental struct {
	// GasesFrom: only the blood gases sampled then or later are derived
	// (all of them when zero).
	GasesFrom time.Time
	// GasesUntil: only the blood gases sampled then or earlier are derived
	// (no bound when zero; read only with GasesFrom set).
	GasesUntil time.Time
	// Falls resumes the fall and rise detector; nil runs it over every
	// end-tidal reading. The inputs must then hold every reading from
	// Falls.At less the pairing window on (a source is preferred per
	// window), and the detector's findings are still all returned: those
	// confirmed before Falls.At come from the state.
	Falls *FallState
	// SaveAt asks for the detector's state at each of these times, in
	// ascending order (none earlier than Falls.At), for later evaluations
	// to resume from.
	SaveAt []time.Time
	// Recorded, when set, reports whether every value of a derivation is
	// already recorded exactly as derived (same identifiers, so the same
	// inputs). Such a result is returned without its Bundle: it was
	// encoded when first recorded, and the live engine, which writes typed
	// records and encodes at send time, would throw the encoding away.
	Recorded func(derive.Derivation) bool
	// NoOmissions: the caller does not use what the inputs leave out (the
	// live engine reports only a complete evaluation's), so it is not
	// worked out, and nil is returned for it.
	NoOmissions bool
}

// DetectorKind is the kind of reading the fall and rise detector reads.
// When no input is a blood gas the evaluation derives ([Incremental.Derives]),
// its results are the detector's findings alone, which depend on the
// readings of this kind only: a caller may then give it only those (the
// omissions are then incomplete, as they are for any evaluation from a
// GasesFrom).
const DetectorKind = derive.KindEtCO2

// Derives reports whether an evaluation derives r: a blood gas sampled in
// [GasesFrom, GasesUntil] (any one when GasesFrom is zero).
func (inc Incremental) Derives(r derive.Reading) bool {
	return r.Kind == derive.KindPaCO2 && inc.DerivesAt(r.At())
}

// DerivesAt reports whether the blood gases sampled at t are derived.
func (inc Incremental) DerivesAt(t time.Time) bool {
	if inc.GasesFrom.IsZero() {
		return true
	}
	return !t.Before(inc.GasesFrom) && (inc.GasesUntil.IsZero() || !t.After(inc.GasesUntil))
}

// EvaluateIncremental is [EvaluateFrom] that can resume the fall detector
// from a saved state and save it again; see [Incremental]. The omissions
// are incomplete unless it derives every blood gas and runs the detector
// over the whole series.
func EvaluateIncremental(cfg derive.Config, enc *encode.Encoder, subject string, facts derive.Patient, inputs []Input, inc Incremental) ([]Result, []derive.Omission, []*FallState, error) {
	gases := make([]derive.Reading, 0, 4)
	readings := make([]derive.Reading, 0, len(inputs))
	etco2 := make([]derive.Reading, 0, len(inputs)/2)
	for _, in := range inputs {
		r := in.Reading
		// Source priority is decided per pairing window inside derive.
		r.Priority = int16(max(min(in.Priority, 1<<15-1), -1<<15))
		switch r.Kind {
		case derive.KindPaCO2:
			// Derive reads the other gases too: a temperature-adjusted
			// PaCO2 reported on one belongs to that sample only.
			gases = append(gases, r)
			readings = append(readings, r)
		case DetectorKind:
			etco2 = append(etco2, r)
			readings = append(readings, r)
		default:
			readings = append(readings, r)
		}
	}
	byTime := func(a, b derive.Reading) int {
		if c := cmpInt(a.AtMillis, b.AtMillis); c != 0 {
			return c
		}
		return strings.Compare(a.Ref, b.Ref)
	}
	slices.SortFunc(gases, byTime)
	slices.SortFunc(readings, byTime)
	slices.SortFunc(etco2, byTime)

	// left accounts for what the results leave out, unless the caller
	// does not want it.
	var left *leftOut
	if !inc.NoOmissions {
		left = &leftOut{used: make(map[string]bool), why: make(map[string]derive.Omission)}
	}
	var results []Result
	for _, gas := range gases {
		if !inc.Derives(gas) {
			continue
		}
		d := derive.Derive(cfg, gas, facts, readings)
		left.derived(gas, d)
		if len(d.Values) == 0 {
			continue
		}
		var b encode.Bundle
		var err error
		if inc.Recorded == nil || !inc.Recorded(d) {
			b, err = enc.Derivation(subject, d)
		}
		if err != nil {
			// One bad blood gas (a malformed reference, say) must not stop
			// the patient's other results, nor other patients.
			left.omit(derive.Omission{Ref: gas.Ref, Reason: derive.ReasonMalformed,
				Detail: fmt.Sprintf("its derived values could not be written: %v", err)})
			continue
		}
		for _, s := range d.Used {
			left.use(s.Readings)
		}
		results = append(results, Result{Subject: subject, Derivation: &d, Bundle: b})
	}
	series, lower := derive.PreferredSeries(cfg.Window, etco2)
	falls, sparse, saved := detect(cfg.Fall, series, inc)
	left.explain(sparse)
	left.explain(lower)
	for _, f := range falls {
		b, err := enc.Fall(subject, f)
		if err != nil {
			left.omit(derive.Omission{Ref: f.EpisodeReadings[0].Ref, Reason: derive.ReasonMalformed,
				Detail: fmt.Sprintf("the end-tidal CO2 finding starting here could not be written: %v", err)})
			continue
		}
		left.use(f.BaselineReadings)
		left.use(f.EpisodeReadings)
		results = append(results, Result{Subject: subject, Fall: &f, Bundle: b})
	}
	var omitted []derive.Omission
	if left != nil {
		omitted = left.finish(readings)
	}
	slices.SortStableFunc(results, func(a, b Result) int { return a.Time().Compare(b.Time()) })
	return results, omitted, saved, nil
}

// leftOut accounts for the readings no result used: an omission for
// each, with the first reason a derivation or the fall detector gave for
// leaving it out (an artefact, a lower-priority source in its window, a
// wrong unit, a sparse series); without one it is unpaired. A nil
// leftOut accounts for nothing.
type leftOut struct {
	omitted []derive.Omission
	used    map[string]bool
	why     map[string]derive.Omission
}

// derived takes a blood gas's derivation: the gas is used, and what the
// derivation left out is an omission of the gas or of its value, or a
// reason a reading may be left out.
func (l *leftOut) derived(gas derive.Reading, d derive.Derivation) {
	if l == nil {
		return
	}
	l.used[gas.Ref] = true
	for _, o := range d.Omitted {
		switch {
		case o.Code != "":
			l.omitted = append(l.omitted, derive.Omission{Code: o.Code, Ref: gas.Ref, Reason: o.Reason, Detail: o.Detail})
		case o.Ref == gas.Ref:
			l.omitted = append(l.omitted, o)
		default:
			l.explain([]derive.Omission{o})
		}
	}
}

// explain keeps the first reason given for each reading.
func (l *leftOut) explain(os []derive.Omission) {
	if l == nil {
		return
	}
	for _, o := range os {
		if _, ok := l.why[o.Ref]; !ok {
			l.why[o.Ref] = o
		}
	}
}

func (l *leftOut) omit(o derive.Omission) {
	if l != nil {
		l.omitted = append(l.omitted, o)
	}
}

func (l *leftOut) use(rs []derive.Reading) {
	if l == nil {
		return
	}
	for _, r := range rs {
		l.used[r.Ref] = true
	}
}

// finish returns the omissions, with one for each of readings no result
// used.
func (l *leftOut) finish(readings []derive.Reading) []derive.Omission {
	for _, r := range readings {
		if r.Kind == derive.KindPaCO2 || l.used[r.Ref] {
			// A blood gas is accounted for by its own derivation.
			continue
		}
		if o, ok := l.why[r.Ref]; ok {
			l.omitted = append(l.omitted, o)
			continue
		}
		l.omitted = append(l.omitted, derive.Omission{Ref: r.Ref, Reason: derive.ReasonUnpaired, Detail: r.Kind.String()})
	}
	return l.omitted
}

// detect runs the fall and rise detector over series, from inc.Falls when
// set, saving its state at each of inc.SaveAt.
func detect(cfg derive.FallConfig, series []derive.Reading, inc Incremental) ([]derive.Fall, []derive.Omission, []*FallState) {
	if inc.Falls == nil && len(inc.SaveAt) == 0 {
		falls, sparse := derive.DetectEpisodes(cfg, series)
		return falls, sparse, nil
	}
	scan, start := derive.NewFallScan(cfg), int64(math.MinInt64)
	if inc.Falls != nil {
		start = inc.Falls.At.UnixMilli()
		// The copy takes the readings from the state on without growing.
		scan = inc.Falls.scan.CloneWithRoom(len(series) - sort.Search(len(series), func(i int) bool { return series[i].AtMillis >= start }))
	}
	saves := make([]int64, 0, len(inc.SaveAt))
	for _, at := range inc.SaveAt {
		ms := max(at.UnixMilli(), start)
		if len(saves) == 0 || ms > saves[len(saves)-1] {
			saves = append(saves, ms)
		}
	}
	saved := make([]*FallState, 0, len(saves))
	next := 0
	for _, r := range series {
		if r.AtMillis < start {
			continue // judged before the state was saved
		}
		for next < len(saves) && r.AtMillis >= saves[next] {
			saved = append(saved, &FallState{At: time.UnixMilli(saves[next]).UTC(), scan: scan.Clone()})
			next++
		}
		scan.Add(r)
	}
	for ; next < len(saves); next++ {
		saved = append(saved, &FallState{At: time.UnixMilli(saves[next]).UTC(), scan: scan.Clone()})
	}
	return scan.Falls(), scan.Sparse(), saved
}

// Collector gathers decoded items from a whole export, in any order. It
// keeps every version it is given and picks the latest of each resource in
// [Collector.Finish], so it needs no index while reading: an export holds
// millions of readings, and each one costs only a compact record.
type Collector struct {
	bySubject map[string][]record
	// omitted are relevant resources that cannot be used. Those with a
	// subject still take part in version selection: an entered-in-error
	// version must hide the reading it withdraws.
	omitted  []omittedRecord
	patients map[string]decode.Item // Patient resources by logical reference
	// unrecognised counts Observations with no code this service uses. They
	// are only counted: a bulk export is mostly such lines, and keeping a
	// record of each would cost memory for no audit value.
	unrecognised int
	// seen holds a 32-bit hash of the logical reference of every resource
	// read so far that the live store would hold a version of (a reading,
	// or an unusable version with a subject): an Observation with no code
	// this service uses whose id is among them was re-coded, and is kept as
	// a version of its own (AddLine), as the live engine keeps it. A hash
	// costs a few bytes a reading where a string key would cost tens; a
	// collision only makes AddLine read a line in full, and Finish sets
	// aside a re-coded version of a resource read nowhere else.
	seen map[uint32]struct{}
	// deleted are the deletions the lines list (Bundles of DELETE
	// entries), applied in Finish (deleted.go); nil until one is read.
	deleted *bulk.Listed
}

// record is one buffered reading, flattened so that it packs into 64 bytes
// plus its reference's text (derive.Reading embedded would pad to 72).
type record struct {
	ref, encounter string
	atMillis       int64
	value          float64
	lastUpdated    int64 // Unix nanoseconds, as the live store orders them
	kind           derive.Kind
	priority       int16
	source         derive.Source
	// also are the readings the same resource version carries besides this
	// one (a temperature on a blood gas); they stand or fall with it.
	also []derive.Reading
}

type omittedRecord struct {
	subject     string
	ref         string
	lastUpdated int64
	omission    derive.Omission
}

// NewCollector returns an empty collector.
func NewCollector() *Collector {
	return &Collector{bySubject: make(map[string][]record), patients: make(map[string]decode.Item), seen: make(map[uint32]struct{})}
}

// AddLine decodes one line and adds it, and returns what it added. An
// Observation with no code this service uses, whose logical id was read
// before (a version of it was a reading, or an unusable version filed
// under a patient), is added as a re-coded version of that resource
// (decode.Decoder.Recoded), which supersedes the earlier versions, as the
// live engine stores it when it holds one of them.
//
// A line that is a transaction or batch Bundle of DELETE entries lists
// deletions (AddDeletions); it returns an unrelated Bundle item then, and
// a *[DeletionsError] for the entries that cannot be applied (the others
// are still added).
func (c *Collector) AddLine(dec *decode.Decoder, line []byte) (decode.Item, error) {
	if it, ok, err := c.addDeletionLine(line); ok {
		return it, err
	}
	it, err := dec.Decode(line)
	if err != nil {
		return it, err
	}
	if it.Type == decode.ItemUnrelated && it.ResourceType == "Observation" && it.ID != "" {
		if _, ok := c.seen[logicalHash("Observation/", it.ID)]; ok {
			if rc, ok := dec.Recoded(line); ok {
				it = rc
			}
		}
	}
	c.Add(it)
	return it, nil
}

// logicalHash is 64-bit FNV-1a of prefix+id, computed without joining
// them, folded to 32 bits.
func logicalHash(prefix, id string) uint32 {
	h := uint64(14695981039346656037)
	for _, s := range [2]string{prefix, id} {
		for i := range len(s) {
			h ^= uint64(s[i])
			h *= 1099511628211
		}
	}
	return uint32(h>>32) ^ uint32(h)
}

// Add takes one decoded item. Unrelated items are only counted.
func (c *Collector) Add(it decode.Item) {
	switch it.Type {
	case decode.ItemUnrelated:
		if it.ResourceType == "Observation" {
			c.unrecognised++
		}
	case decode.ItemPatient:
		key := "Patient/" + it.ID
		if prev, ok := c.patients[key]; !ok || ComparePatients(it, prev) > 0 {
			c.patients[key] = it
		}
	case decode.ItemReading:
		r := it.Reading
		l, _ := splitRef(r.Ref)
		c.seen[logicalHash(l, "")] = struct{}{}
		c.bySubject[it.Subject] = append(c.bySubject[it.Subject], record{
			ref: r.Ref, encounter: r.Encounter, atMillis: r.AtMillis, value: r.Value,
			lastUpdated: nanos(it.LastUpdated), kind: r.Kind, priority: int16(it.Priority), source: r.Source, also: it.Also,
		})
	default:
		ref := it.Ref
		if ref == "" {
			ref = it.Omission.Ref
		}
		if l := splitRefOK(ref); it.Subject != "" && l != "" {
			c.seen[logicalHash(l, "")] = struct{}{}
		}
		c.omitted = append(c.omitted, omittedRecord{subject: it.Subject, ref: ref, lastUpdated: nanos(it.LastUpdated), omission: it.Omission})
	}
}

// ComparePatients orders two versions of one Patient by ref.Compare, a
// tie broken by the facts as the live store keeps them (PatientFacts):
// +1 when a is newer.
func ComparePatients(a, b decode.Item) int {
	va := ref.Version{LastUpdated: a.LastUpdated, ID: a.VersionID}
	vb := ref.Version{LastUpdated: b.LastUpdated, ID: b.VersionID}
	if c := ref.Compare(va, vb); c != 0 {
		return c
	}
	fa, _ := PatientFacts(a.Patient)
	fb, _ := PatientFacts(b.Patient)
	va.Content, vb.Content = string(fa), string(fb)
	return ref.Compare(va, vb)
}

// PatientFacts is the encoding of a Patient's facts the live store keeps
// (store.Patient.Payload), whose bytes break a tie of two versions.
func PatientFacts(p derive.Patient) ([]byte, error) { return json.Marshal(p) }

// version is one version of one resource during selection.
type version struct {
	logical, versionID string
	subject            string
	lastUpdated        int64
	rec                *record        // nil for an omitted version
	omitted            *omittedRecord // nil for a reading
}

func (v version) ref() string {
	if v.rec != nil {
		return v.rec.ref
	}
	return v.omitted.ref
}

// order is the version as the one version order (ref.Compare) takes it,
// without its content, which compare adds only at a tie.
func (v version) order() ref.Version {
	return ref.Version{LastUpdated: fromNanos(v.lastUpdated), ID: v.versionID, Unusable: v.rec == nil}
}

// content is ref.Version.Content of the version.
func (v version) content() string {
	if r := v.rec; r != nil {
		return VersionContent(v.subject, true,
			derive.Reading{Encounter: r.encounter, AtMillis: r.atMillis, Value: r.value, Kind: r.kind}, int(r.priority), r.also, derive.Omission{})
	}
	return VersionContent(v.subject, false, derive.Reading{}, 0, nil, v.omitted.omission)
}

// compare orders two versions of one resource by ref.Compare, as the live
// store does: +1 when a is newer.
func compare(a, b version) int {
	va, vb := a.order(), b.order()
	if c := ref.Compare(va, vb); c != 0 {
		return c
	}
	va.Content, vb.Content = a.content(), b.content()
	return ref.Compare(va, vb)
}

// VersionContent is ref.Version.Content of one version of an input filed
// under subject, which breaks a tie of meta.lastUpdated and versionId:
// for a usable version (a reading) what it gives, the readings it carries
// besides included; for an unusable one why it cannot be used (the
// omission's reason and detail). Replay builds it from what it keeps of
// each version and the live engine from the stored payload, from the same
// decoded fields, so both order tied versions alike.
func VersionContent(subject string, usable bool, r derive.Reading, priority int, also []derive.Reading, om derive.Omission) string {
	b := make([]byte, 0, len(subject)+64)
	b = append(b, subject...)
	b = append(b, 0)
	if !usable {
		b = append(b, om.Reason...)
		b = append(b, 0)
		return string(append(b, om.Detail...))
	}
	// Each reading's source kind follows its value: two versions that
	// differ only in what their code-table row says of the source (a site
	// table corrected between deliveries) are not the same version. For
	// versions of the same source the bytes compare as they did before
	// the source was kept.
	reading := func(k derive.Kind, priority int16, v float64, src derive.Source) {
		b = append(b, byte(k))
		b = binary.BigEndian.AppendUint16(b, uint16(priority))
		b = binary.BigEndian.AppendUint64(b, math.Float64bits(v))
		b = append(b, byte(src))
	}
	p16 := int16(max(min(priority, 1<<15-1), -1<<15))
	reading(r.Kind, p16, r.Value, derive.Reading{Kind: r.Kind, Priority: p16, Source: r.Source}.SourceKind())
	b = binary.BigEndian.AppendUint64(b, uint64(r.AtMillis))
	b = append(b, r.Encounter...)
	b = append(b, 0)
	for _, a := range also {
		reading(a.Kind, a.Priority, a.Value, a.SourceKind())
	}
	return string(b)
}

// splitRef turns "Observation/x/_history/2" into ("Observation/x", "2").
func splitRef(r string) (logical, versionID string) { return ref.Split(r) }

// noTime stands for a missing meta.lastUpdated, which sorts before any
// time, as the zero time.Time does in the live store.
const noTime = math.MinInt64

func nanos(t time.Time) int64 {
	if t.IsZero() {
		return noTime
	}
	return t.UnixNano()
}

func fromNanos(n int64) time.Time {
	if n == noTime {
		return time.Time{}
	}
	return time.Unix(0, n)
}

// latest keeps the newest version of each resource among a subject's
// readings and omitted versions. It returns the readings kept and an
// omission for every version set aside: superseded ones, and the newest
// version when it is itself an omission.
//
// elsewhere, when set, reports whether the newest version of a logical
// reference is filed under another patient: the input was re-filed, and
// this patient keeps nothing of it, as in the live store, which orders
// versions across patients.
func latest(subject string, recs []record, omitted []*omittedRecord, elsewhere func(logical string) bool) ([]Input, []derive.Omission) {
	vs := make([]version, 0, len(recs)+len(omitted))
	for i := range recs {
		l, vid := splitRef(recs[i].ref)
		vs = append(vs, version{logical: l, versionID: vid, subject: subject, lastUpdated: recs[i].lastUpdated, rec: &recs[i]})
	}
	for _, o := range omitted {
		l, vid := splitRef(o.ref)
		vs = append(vs, version{logical: l, versionID: vid, subject: subject, lastUpdated: o.lastUpdated, omitted: o})
	}
	slices.SortStableFunc(vs, func(a, b version) int {
		if c := strings.Compare(a.logical, b.logical); c != 0 {
			return c
		}
		return compare(b, a) // newest first
	})
	var inputs []Input
	var om []derive.Omission
	for i, v := range vs {
		if i > 0 && vs[i-1].logical == v.logical {
			if compare(vs[i-1], v) == 0 {
				continue // the same version twice, from overlapping files
			}
			om = append(om, derive.Omission{Ref: v.ref(), Reason: derive.ReasonSuperseded, Detail: supersededBy(vs[i-1])})
			continue
		}
		if elsewhere != nil && elsewhere(v.logical) {
			om = append(om, derive.Omission{Ref: v.ref(), Reason: derive.ReasonRefiled, Detail: "a newer version names another patient"})
			continue
		}
		if v.omitted != nil {
			om = append(om, v.omitted.omission)
			continue
		}
		r := v.rec
		inputs = append(inputs, Input{
			Reading:  derive.Reading{Ref: r.ref, Encounter: r.encounter, AtMillis: r.atMillis, Value: r.value, Kind: r.kind, Source: r.source},
			Priority: int(r.priority),
		})
		for _, a := range r.also {
			p := a.Priority
			a.Priority = 0
			inputs = append(inputs, Input{Reading: a, Priority: int(p)})
		}
	}
	return inputs, om
}

// supersededBy says what replaced a version: the newer version by its
// versionId, and when that version withdraws the resource (entered in
// error, deleted on the server, re-coded, not usable), that it does and
// why. A deletion has no versionId, nor has a version whose source gave
// none; neither is named by an empty number.
func supersededBy(newer version) string {
	var d string
	switch {
	case newer.omitted != nil && newer.omitted.omission.Reason == derive.ReasonDeleted && newer.versionID == "":
		return "superseded by its deletion on the server, which withdraws it"
	case newer.versionID == "":
		d = "superseded by a later version (without a versionId)"
	default:
		d = "superseded by version " + newer.versionID
	}
	if newer.omitted != nil {
		d += ", which withdraws it (" + string(newer.omitted.omission.Reason) + ")"
	}
	return d
}

// Report is what a whole export produced.
type Report struct {
	Results []Result
	// Inputs are the inputs left out, and Values the values not emitted.
	Inputs []derive.Omission
	Values []derive.Omission
	// Unrecognised counts Observations with no code this service uses
	// (reason code-not-recognised); they are not listed one by one.
	Unrecognised int
	// Deletions counts the deletions the input listed and what became of
	// them. A deletion applied is also among Inputs (reason deleted), and
	// the versions it replaced, or it when a version is newer, are
	// superseded.
	Deletions Deletions
}

// Finish derives every patient's results. Patients are processed in order
// of their reference, so the output is deterministic.
func (c *Collector) Finish(cfg derive.Config, enc *encode.Encoder) (Report, error) {
	rep := Report{Unrecognised: c.unrecognised}
	alone := c.recodedAlone()
	rep.Deletions = c.applyDeletions(alone)
	omittedBySubject := make(map[string][]*omittedRecord)
	for i := range c.omitted {
		o := &c.omitted[i]
		if alone[splitRefOK(o.ref)] && o.omission.Reason == derive.ReasonRecoded {
			rep.Unrecognised++ // no other version of it was read: only unrelated
			continue
		}
		if o.subject == "" || splitRefOK(o.ref) == "" {
			rep.Inputs = append(rep.Inputs, o.omission)
			continue
		}
		omittedBySubject[o.subject] = append(omittedBySubject[o.subject], o)
	}
	subjects := make([]string, 0, len(c.bySubject))
	for s := range c.bySubject {
		subjects = append(subjects, s)
	}
	for s := range omittedBySubject {
		if _, ok := c.bySubject[s]; !ok {
			subjects = append(subjects, s)
		}
	}
	sort.Strings(subjects)
	newest := c.newestAcrossSubjects(omittedBySubject)
	for _, s := range subjects {
		// The newest version across patients is newer than every version
		// under another patient: the order is total (ref.Compare with the
		// content, which names the patient).
		elsewhere := func(logical string) bool {
			n, ok := newest[logical]
			return ok && n.subject != s
		}
		inputs, om := latest(s, c.bySubject[s], omittedBySubject[s], elsewhere)
		rep.Inputs = append(rep.Inputs, om...)
		if len(inputs) == 0 {
			continue
		}
		facts := derive.Patient{}
		if p, ok := c.patients[s]; ok {
			facts = p.Patient
		}
		results, omitted, err := Evaluate(cfg, enc, s, facts, inputs)
		if err != nil {
			return Report{}, err
		}
		rep.Results = append(rep.Results, results...)
		for _, o := range omitted {
			if o.Code != "" {
				rep.Values = append(rep.Values, o)
			} else {
				rep.Inputs = append(rep.Inputs, o)
			}
		}
	}
	slices.SortFunc(rep.Inputs, func(a, b derive.Omission) int {
		if c := strings.Compare(a.Ref, b.Ref); c != 0 {
			return c
		}
		return strings.Compare(string(a.Reason), string(b.Reason))
	})
	return rep, nil
}

// recodedAlone returns the logical references of re-coded versions of
// which no other version was read (AddLine took one for re-coded because
// of a hash collision): they are only unrelated Observations.
func (c *Collector) recodedAlone() map[string]bool {
	alone := make(map[string]bool)
	for _, o := range c.omitted {
		if o.omission.Reason == derive.ReasonRecoded {
			alone[splitRefOK(o.ref)] = true
		}
	}
	if len(alone) == 0 {
		return nil
	}
	for _, recs := range c.bySubject {
		for _, r := range recs {
			if l := splitRefOK(r.ref); alone[l] {
				alone[l] = false
			}
		}
	}
	for _, o := range c.omitted {
		if l := splitRefOK(o.ref); o.omission.Reason != derive.ReasonRecoded && o.subject != "" && alone[l] {
			alone[l] = false
		}
	}
	return alone
}

// newestAcrossSubjects returns, for every logical reference seen under
// more than one patient, its newest version, which names the patient it
// is filed under. The order is the live store's (ref.Compare, a tie
// broken by the content), so the answer depends neither on the order the
// versions were read in nor on the order maps are walked in.
func (c *Collector) newestAcrossSubjects(omittedBySubject map[string][]*omittedRecord) map[string]version {
	first := make(map[string]string)
	moved := make(map[string]bool)
	out := make(map[string]version)
	for pass := range 2 {
		see := func(v version) {
			if pass == 0 {
				if f, ok := first[v.logical]; !ok {
					first[v.logical] = v.subject
				} else if f != v.subject {
					moved[v.logical] = true
				}
				return
			}
			if !moved[v.logical] {
				return
			}
			if n, ok := out[v.logical]; !ok || compare(v, n) > 0 {
				out[v.logical] = v
			}
		}
		for s, recs := range c.bySubject {
			for i := range recs {
				l, vid := splitRef(recs[i].ref)
				see(version{logical: l, versionID: vid, subject: s, lastUpdated: recs[i].lastUpdated, rec: &recs[i]})
			}
		}
		for s, oms := range omittedBySubject {
			for _, o := range oms {
				l, vid := splitRef(o.ref)
				see(version{logical: l, versionID: vid, subject: s, lastUpdated: o.lastUpdated, omitted: o})
			}
		}
		if len(moved) == 0 {
			break
		}
	}
	return out
}

// splitRefOK returns the logical part of ref, or "" when ref is empty.
func splitRefOK(ref string) string {
	l, _ := splitRef(ref)
	return l
}

func cmpInt(a, b int64) int {
	switch {
	case a < b:
		return -1
	case a > b:
		return 1
	}
	return 0
}
