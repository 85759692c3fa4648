// Package decode turns one FHIR R4 JSON resource (a line of an NDJSON bulk
// export, a notification entry, a search result entry) into an [Item]: a
// [derive.Reading] in its kind's canonical unit, a [derive.Patient], a
// [derive.Omission] saying why a relevant resource cannot be used, or a note
// that the resource is unrelated to this service.
//
// # Rules for Observations, in the order they apply
//
//  1. Code: the first coding, in document order, whose system and code have
//     a row in the code table decides the kind; an Observation with none is
//     [ItemUnrelated], not an omission. A rejected row gives its reason
//     (venous PCO2: [derive.ReasonNotArterial]) after steps 2–4.
//  2. id: required ([derive.ReasonMalformed], "no id"). meta.versionId, when
//     present, makes the reference versioned: "Observation/{id}/_history/{vid}".
//  3. status entered-in-error: [derive.ReasonEnteredInError], with ID,
//     VersionID, Ref and Subject filled so the caller can withdraw what was
//     derived from the resource, and the Reading's time and value (both or
//     neither) when the version still carries them readably, so what was
//     withdrawn can be placed in time.
//  4. A member of the wrong JSON type: [derive.ReasonMalformed].
//  5. status other than final, amended or corrected: [derive.ReasonStatus].
//  6. subject must be a literal Patient reference ("Patient/{id}" or an
//     absolute URL ending so): [derive.ReasonNoSubject]. An absolute
//     reference under [Options.Base] becomes relative; one under another
//     base stays absolute, without its version, and is another patient.
//  7. Value: valueQuantity with a numeric value is required
//     ([derive.ReasonNoValue], with the dataAbsentReason or the value[x]
//     type in the detail); a comparator makes it [derive.ReasonCensored].
//  8. Unit: see package units ([derive.ReasonUnitUnknown],
//     [derive.ReasonUnitMismatch]). A CO2 percentage, under whatever code,
//     keeps at most [codes.ConvertedPercentPriority]: it is a substitute,
//     with [derive.SourceConvertedPercent]. Otherwise the reading's Source
//     is its row's (see package codes).
//  9. Time: effectiveDateTime, effectiveInstant or effectivePeriod.start,
//     which must carry a time of day and a timezone; `issued` (when the
//     result was reported) is never used, because pairing needs the sample
//     time. Otherwise [derive.ReasonNoTime].
//  10. [derive.CheckValue] for the kind: [derive.ReasonWrongUnit] for a value
//     only plausible in another unit (a PaCO2 of 5.3 labelled mm[Hg]),
//     else [derive.ReasonImplausible] with the range in the detail.
//
// A panel (a row marked Panel: the arterial blood gas panel, 24336-0) has
// no value of its own: its PaCO2 is the first component whose code has an
// accepted paco2 row (failing that, the first with a rejected row, which
// gives that row's reason), and the reading is the panel's: its id,
// version, subject, status and time, so values derived from it cite the
// panel's version (a component has no id of its own). A panel with no such
// component (one that lists its results by hasMember) is [ItemUnrelated]:
// its members are read on their own. Other components are not read, with
// two exceptions: a PaCO2 (alone or in a panel) that carries the patient's
// temperature as a component (a component whose code has a
// body-temperature row, 8310-5), or the PaCO2 adjusted to the patient's
// temperature (a paco2-temperature-adjusted row, 32771-8), gives that
// value too, in [Item.Also], at the blood gas's effective time and citing
// the blood gas's own reference: the temperature was entered on the
// sample, so it is the one the analyser would adjust to, and the adjusted
// value is the analyser's own for the same sample. A component that cannot
// be used (no Quantity, an unknown unit, an implausible value) is dropped;
// the PaCO2 itself stays usable.
//
// Patients give Sex from gender (male, female; anything else unknown) and
// BirthDate from birthDate. A partial birth date is taken at the middle of
// the period it names, YYYY as 1 July and YYYY-MM as the 15th, which halves
// the worst error of an age in years compared with taking the first day.
//
// A Bundle line (unusual in an NDJSON export, which holds one resource type
// per file) is [ItemUnrelated] with ResourceType "Bundle"; unpacking bundles
// is the caller's job.
//
// # Speed
//
// A bulk file is mostly Observations this service has no use for. Before
// decoding, a single pass over the bytes (the prefilter) validates the JSON,
// reads resourceType and checks whether any "code" member holds a code of
// the table; only Patients and Observations that pass are decoded. The
// prefilter is exact: it gives the same [Item] as decoding every line.
//
// Observations are decoded into small structs (checked against the samply
// R4 model in the tests) by encoding/json's rules, which match member names
// case-insensitively, unlike FHIR; resourceType itself is matched exactly.
// A single pass of package jsonscan fills them in the plain case and hands
// anything else (a name differing only in case, a duplicate member, a null
// or a member of the wrong type) to encoding/json, so the result, error
// details included, is always encoding/json's (fast.go).
// A decimal written as a JSON string is refused (samply accepts it).
package decode

import (
	"encoding/json"
	"errors"
	"fmt"
	"math"
	"slices"
	"strconv"
	"strings"
	"time"
	"unicode/utf8"
	"unique"

	"github.com/deadspace-fhir/deadspace/derive"
	"github.com/deadspace-fhir/deadspace/fhir/codes"
	"github.com/deadspace-fhir/deadspace/fhir/jsonscan"
	"github.com/deadspace-fhir/deadspace/fhir/ref"
	"github.com/deadspace-fhir/deadspace/fhir/units"
)

// Errors returned by [Decoder.Decode]. Both mean the line is
// [derive.ReasonMalformed] for the caller.
var (
	ErrNotJSON     = errors.New("not JSON")
	ErrNotResource = errors.New("not a FHIR resource")
)

// ItemType says what an [Item] holds.
type ItemType uint8

// The item types. The zero value is not a valid type.
const (
	ItemReading   ItemType = iota + 1 // Reading is usable
	ItemPatient                       // Patient is filled
	ItemOmitted                       // a relevant resource that cannot be used; see Omission
	ItemUnrelated                     // a resource this service has no use for
)

func (t ItemType) String() string {
	switch t {
	case ItemReading:
		return "reading"
	case ItemPatient:
		return "patient"
	case ItemOmitted:
		return "omitted"
	case ItemUnrelated:
		return "unrelated"
	}
	return fmt.Sprintf("ItemType(%d)", t)
}

// Item is the result of decoding one resource. For [ItemUnrelated] only
// Type and ResourceType are set, and for an Observation its ID when it is
// a FHIR id: a caller that holds an earlier version of the resource reads
// the rest with [Decoder.Recoded].
type Item struct {
	Type         ItemType
	ResourceType string
	ID           string
	VersionID    string
	// Ref is "Observation/{id}/_history/{vid}", or "Observation/{id}" when
	// meta.versionId is absent (likewise for Patients).
	Ref string
	// Subject is the unversioned patient reference, for grouping and for the
	// derived values' subject: "Patient/123", or an absolute URL when the
	// reference names a server other than [Options.Base]. For a Patient
	// item it is "Patient/{id}".
	Subject     string
	Status      string
	LastUpdated time.Time
	// Reading is complete for ItemReading. For an omitted Observation only
	// Ref and Kind are reliable (Kind is KindUnknown for a rejected row
	// without a kind).
	Reading derive.Reading
	// Priority is the code table row's priority; the pairing step prefers
	// the highest among readings of one kind (see package codes).
	Priority int
	// Also holds readings the resource carries besides Reading: the
	// patient's temperature and the temperature-adjusted PaCO2 on a blood
	// gas (see the package documentation),
	// with Ref and AtMillis of Reading and the row's priority in Priority.
	Also       []derive.Reading
	Original   Original
	Conversion units.Conversion
	Patient    derive.Patient
	// Omission is set for ItemOmitted.
	Omission derive.Omission
}

// Original is the value as the resource wrote it.
type Original struct {
	// Value is the JSON number's text, so 40.0 stays "40.0".
	Value              string
	Unit, System, Code string
}

// Options configure a [Decoder].
type Options struct {
	// Table is the code table; nil means [codes.Default].
	Table *codes.Table
	// Units are the site's unit settings; the zero value means the defaults.
	Units units.Options
	// Base is the FHIR server this service reads and writes (serve's and
	// backfill's --fhir-base, replay's --fhir-base for an export of it), or
	// "" when none is known. A subject or encounter written as an absolute
	// URL under it is the same resource as the relative reference, so it is
	// keyed and written relative; an absolute reference under any other
	// base keeps its base (fhir/ref's Key).
	Base string
}

// Decoder decodes resources. It is safe for concurrent use.
type Decoder struct {
	base    string
	table   *codes.Table
	units   units.Options
	codeSet map[string]struct{}
	// noPrefilter makes every Observation take the full decode, so tests
	// can compare the two paths.
	noPrefilter bool
	// noFastFill makes every Observation take encoding/json's fill, so
	// tests can compare it with the fast fill (fast.go).
	noFastFill bool
}

// New returns a Decoder. It panics if opts.Units fails [units.Options.Validate];
// validate configuration before calling it.
func New(opts Options) *Decoder {
	if err := opts.Units.Validate(); err != nil {
		panic(fmt.Sprintf("decode.New: %v", err))
	}
	t := opts.Table
	if t == nil {
		t = codes.Default()
	}
	set := make(map[string]struct{})
	for _, c := range t.Codes() {
		set[c] = struct{}{}
	}
	return &Decoder{base: opts.Base, table: t, units: opts.Units, codeSet: set}
}

// Decode decodes one resource. The error is non-nil only when line is not
// JSON ([ErrNotJSON]) or not a FHIR resource, that is not an object with a
// resourceType string ([ErrNotResource]).
func (d *Decoder) Decode(line []byte) (Item, error) {
	sr, err := scan(line, d.codeSet)
	switch {
	case err != nil:
		return Item{}, fmt.Errorf("decode: %w: %w", ErrNotJSON, err)
	case !sr.object:
		return Item{}, fmt.Errorf("decode: %w: not a JSON object", ErrNotResource)
	case sr.rtBad:
		return Item{}, fmt.Errorf("decode: %w: resourceType is not a string", ErrNotResource)
	case !sr.hasRT || len(sr.rt) == 0:
		return Item{}, fmt.Errorf("decode: %w: no resourceType", ErrNotResource)
	}
	switch string(sr.rt) {
	case "Observation":
		if !sr.candidate && !d.noPrefilter {
			if !sr.idSeen {
				return Item{Type: ItemUnrelated, ResourceType: "Observation"}, nil
			}
			if sr.idPlain {
				return Item{Type: ItemUnrelated, ResourceType: "Observation", ID: fhirID(jsonscan.Unquote(sr.id, sr.idRaw))}, nil
			}
			// An id encoding/json might read otherwise: as it reads it.
			var o struct {
				ID string `json:"id"`
			}
			_ = json.Unmarshal(line, &o)
			return Item{Type: ItemUnrelated, ResourceType: "Observation", ID: fhirID(o.ID)}, nil
		}
		return d.observation(line), nil
	case "Patient":
		return d.patient(line), nil
	}
	return Item{Type: ItemUnrelated, ResourceType: resourceTypeName(sr.rt)}, nil
}

// resourceTypeName avoids an allocation for the usual neighbours of
// Observations in a bulk export.
func resourceTypeName(rt []byte) string {
	for _, n := range [...]string{"Bundle", "Encounter", "Device", "Condition", "MedicationAdministration", "Procedure", "Provenance"} {
		if string(rt) == n {
			return n
		}
	}
	return string(rt)
}

// The JSON shapes read. Only the members this service uses are declared.

type metaJSON struct {
	VersionID   string `json:"versionId"`
	LastUpdated string `json:"lastUpdated"`
}

type codingJSON struct {
	System string `json:"system"`
	Code   string `json:"code"`
}

type conceptJSON struct {
	Coding []codingJSON `json:"coding"`
	Text   string       `json:"text"`
}

type referenceJSON struct {
	Reference  string          `json:"reference"`
	Identifier json.RawMessage `json:"identifier"`
}

type quantityJSON struct {
	Value      json.RawMessage `json:"value"`
	Comparator string          `json:"comparator"`
	Unit       string          `json:"unit"`
	System     string          `json:"system"`
	Code       string          `json:"code"`
}

type periodJSON struct {
	Start string `json:"start"`
	End   string `json:"end"`
}

type observationJSON struct {
	ID                string          `json:"id"`
	Meta              *metaJSON       `json:"meta"`
	Status            string          `json:"status"`
	Code              conceptJSON     `json:"code"`
	Subject           *referenceJSON  `json:"subject"`
	Encounter         *referenceJSON  `json:"encounter"`
	EffectiveDateTime *string         `json:"effectiveDateTime"`
	EffectiveInstant  *string         `json:"effectiveInstant"`
	EffectivePeriod   *periodJSON     `json:"effectivePeriod"`
	EffectiveTiming   json.RawMessage `json:"effectiveTiming"`
	ValueQuantity     *quantityJSON   `json:"valueQuantity"`
	DataAbsentReason  *conceptJSON    `json:"dataAbsentReason"`
	Component         []componentJSON `json:"component"`
	// The other value[x] types, only to say which one was sent.
	ValueCodeableConcept json.RawMessage `json:"valueCodeableConcept"`
	ValueString          json.RawMessage `json:"valueString"`
	ValueBoolean         json.RawMessage `json:"valueBoolean"`
	ValueInteger         json.RawMessage `json:"valueInteger"`
	ValueRange           json.RawMessage `json:"valueRange"`
	ValueRatio           json.RawMessage `json:"valueRatio"`
	ValueSampledData     json.RawMessage `json:"valueSampledData"`
	ValueTime            json.RawMessage `json:"valueTime"`
	ValueDateTime        json.RawMessage `json:"valueDateTime"`
	ValuePeriod          json.RawMessage `json:"valuePeriod"`
}

type componentJSON struct {
	Code             conceptJSON   `json:"code"`
	ValueQuantity    *quantityJSON `json:"valueQuantity"`
	DataAbsentReason *conceptJSON  `json:"dataAbsentReason"`
}

func present(raw json.RawMessage) bool { return len(raw) > 0 && string(raw) != "null" }

func (o *observationJSON) otherValues() []string {
	var out []string
	for _, v := range []struct {
		name string
		raw  json.RawMessage
	}{
		{"valueCodeableConcept", o.ValueCodeableConcept}, {"valueString", o.ValueString},
		{"valueBoolean", o.ValueBoolean}, {"valueInteger", o.ValueInteger}, {"valueRange", o.ValueRange},
		{"valueRatio", o.ValueRatio}, {"valueSampledData", o.ValueSampledData}, {"valueTime", o.ValueTime},
		{"valueDateTime", o.ValueDateTime}, {"valuePeriod", o.ValuePeriod},
	} {
		if present(v.raw) {
			out = append(out, v.name)
		}
	}
	return out
}

type patientJSON struct {
	ID        string    `json:"id"`
	Meta      *metaJSON `json:"meta"`
	Gender    string    `json:"gender"`
	BirthDate string    `json:"birthDate"`
}

// lookup finds the row that decides what an Observation's code is. The
// codings of one concept are meant to translate each other, so when one is
// accepted and another rejected they contradict each other (an arterial
// and a venous PCO2): the rejection decides, whatever their order, unless
// the rejected code is a broader concept the accepted one narrows
// (codes.Row.Broader). Otherwise the first accepted coding decides, and
// without one the first rejected.
func (d *Decoder) lookup(c conceptJSON) (codes.Row, bool) {
	var accepted, rejected, broader *codes.Row
	for _, cd := range c.Coding {
		r, ok := d.table.Lookup(cd.System, cd.Code)
		if !ok {
			continue
		}
		switch {
		case r.Action == codes.ActionAccept && accepted == nil:
			accepted = &r
		case r.Action == codes.ActionReject && !r.Broader && rejected == nil:
			rejected = &r
		case r.Action == codes.ActionReject && r.Broader && broader == nil:
			broader = &r
		}
	}
	for _, r := range []*codes.Row{rejected, accepted, broader} {
		if r != nil {
			return *r, true
		}
	}
	return codes.Row{}, false
}

func (d *Decoder) observation(line []byte) Item {
	var o observationJSON
	var typeErr error
	if d.noFastFill || !fillObservation(line, &o) {
		// Not the plain case the fast fill handles (see fast.go). The line
		// is valid JSON, so the only possible errors are members of the
		// wrong type; encoding/json still fills the rest.
		o = observationJSON{}
		typeErr = json.Unmarshal(line, &o)
	}
	row, ok := d.lookup(o.Code)
	if !ok {
		return Item{Type: ItemUnrelated, ResourceType: "Observation", ID: fhirID(o.ID)}
	}
	// A panel's value is one of its components, recognised by its own row;
	// a panel without one groups its results some other way (hasMember),
	// and those are read on their own.
	var comp *componentJSON
	if row.Panel {
		if comp, row, ok = d.panelComponent(&o, row.Kind); !ok {
			return Item{Type: ItemUnrelated, ResourceType: "Observation", ID: fhirID(o.ID)}
		}
	}
	it := Item{Type: ItemOmitted, ResourceType: "Observation", Status: o.Status, Priority: row.Priority}
	it.Reading.Kind = row.Kind
	it.Reading.Source = row.Source
	omit := func(reason derive.Reason, detail string) Item {
		it.Type = ItemOmitted
		it.Reading.Ref = it.Ref
		it.Omission = derive.Omission{Ref: it.Ref, Reason: reason, Detail: detail}
		return it
	}
	if problem := d.identify(&it, "Observation", o.ID, o.Meta); problem != "" {
		return omit(derive.ReasonMalformed, problem)
	}
	subject, subjectProblem := d.patientSubject(o.Subject)
	it.Subject = subject
	if o.Status == "entered-in-error" {
		if typeErr == nil {
			d.withdrawnAt(&it, &o, comp, row)
		}
		return omit(derive.ReasonEnteredInError, "status entered-in-error")
	}
	if typeErr != nil {
		return omit(derive.ReasonMalformed, describeTypeError(typeErr))
	}
	if row.Action == codes.ActionReject {
		what := "code"
		if comp != nil {
			what = "component code"
		}
		return omit(row.Reason, fmt.Sprintf("%s %s|%s (%s)", what, row.System, row.Code, row.Display))
	}
	switch o.Status {
	case "final", "amended", "corrected":
	case "":
		return omit(derive.ReasonStatus, "no status")
	default:
		return omit(derive.ReasonStatus, fmt.Sprintf("status %q", clip(o.Status)))
	}
	if subjectProblem != "" {
		return omit(derive.ReasonNoSubject, subjectProblem)
	}
	if o.Encounter != nil && o.Encounter.Reference != "" {
		enc := o.Encounter.Reference
		if r, key, err := ref.Key(enc, d.base); err == nil && r.Type == "Encounter" {
			enc = key
		}
		it.Reading.Encounter = intern(enc)
	}

	// Value: the Observation's own, or a panel's component's.
	others, q, absent := o.otherValues(), o.ValueQuantity, o.DataAbsentReason
	if comp != nil {
		others, q, absent = nil, comp.ValueQuantity, comp.DataAbsentReason
		if q == nil && absent == nil {
			return omit(derive.ReasonNoValue, "the panel's PaCO2 component has no valueQuantity")
		}
	}
	switch {
	case len(others)+btoi(q != nil) > 1:
		return omit(derive.ReasonMalformed, "more than one value[x]")
	case absent != nil && (q != nil || len(others) > 0):
		return omit(derive.ReasonMalformed, "both a value and a dataAbsentReason (obs-6)")
	case absent != nil:
		return omit(derive.ReasonNoValue, "dataAbsentReason "+conceptText(*absent))
	case q == nil && len(others) > 0:
		return omit(derive.ReasonNoValue, others[0]+" is not a Quantity")
	case q == nil:
		return omit(derive.ReasonNoValue, "no value")
	case !present(q.Value):
		return omit(derive.ReasonNoValue, "valueQuantity has no value")
	}
	it.Original = Original{Value: string(q.Value), Unit: q.Unit, System: q.System, Code: q.Code}
	if c := q.Value[0]; c != '-' && (c < '0' || c > '9') {
		return omit(derive.ReasonMalformed, "valueQuantity.value is not a JSON number")
	}
	v, err := strconv.ParseFloat(string(q.Value), 64)
	if err != nil {
		return omit(derive.ReasonMalformed, "valueQuantity.value is out of range")
	}
	if q.Comparator != "" {
		return omit(derive.ReasonCensored, fmt.Sprintf("comparator %q", clip(q.Comparator)))
	}

	// Unit.
	conv, err := units.FromQuantity(row.Kind, v, units.Quantity{System: q.System, Code: q.Code, Unit: q.Unit}, d.unitOptions(row))
	if err != nil {
		var ue *units.Error
		if errors.As(err, &ue) {
			return omit(ue.Reason, fmt.Sprintf("unit %q: %s", clip(ue.Unit), ue.Detail))
		}
		return omit(derive.ReasonUnitUnknown, clip(err.Error()))
	}
	it.Conversion = conv
	if conv.Percent {
		// A percentage under any code, a partial-pressure one included, is
		// converted with an assumed pressure: a substitute.
		it.Priority = min(it.Priority, codes.ConvertedPercentPriority)
		it.Reading.Source = derive.SourceConvertedPercent
	}

	// Time.
	at, reason, problem := effectiveTime(&o)
	if problem != "" {
		return omit(reason, problem)
	}

	if reason, detail := derive.CheckValue(row.Kind, conv.ToValue); reason == derive.ReasonWrongUnit {
		return omit(reason, detail)
	} else if reason != "" {
		_, lo, hi := derive.Plausible(row.Kind, conv.ToValue)
		return omit(reason, fmt.Sprintf("%s %s is outside the plausible range %s–%s %s for %s",
			fmtNum(conv.ToValue), conv.ToUnit, fmtNum(lo), fmtNum(hi), conv.ToUnit, row.Kind))
	}
	it.Type = ItemReading
	it.Reading.Ref = it.Ref
	it.Reading.AtMillis = at.UnixMilli()
	it.Reading.Value = conv.ToValue
	if row.Kind == derive.KindPaCO2 {
		it.Also = d.componentsAlso(&o, it.Reading)
	}
	return it
}

// unitOptions are the conversion options for a value of row: the
// decoder's, with the row's CO2 basis when it names one.
func (d *Decoder) unitOptions(row codes.Row) units.Options {
	uopts := d.units
	if row.CO2Basis != "" {
		if b, err := units.ParseBasis(row.CO2Basis); err == nil {
			uopts.PercentBasis = b
		}
	}
	return uopts
}

// withdrawnAt keeps where a reading withdrawn at its source (status
// entered-in-error) stood: its effective time and its value in its kind's
// unit, both or neither, when the withdrawing version still carries them
// readably. The item stays an omission; the time lets an auditor's page
// place what was withdrawn among the readings near a blood gas.
func (d *Decoder) withdrawnAt(it *Item, o *observationJSON, comp *componentJSON, row codes.Row) {
	q := o.ValueQuantity
	if comp != nil {
		q = comp.ValueQuantity
	}
	if q == nil || !present(q.Value) || q.Comparator != "" {
		return
	}
	v, err := strconv.ParseFloat(string(q.Value), 64)
	if err != nil {
		return
	}
	at, _, problem := effectiveTime(o)
	if problem != "" {
		return
	}
	conv, err := units.FromQuantity(row.Kind, v, units.Quantity{System: q.System, Code: q.Code, Unit: q.Unit}, d.unitOptions(row))
	if err != nil {
		return
	}
	it.Reading.AtMillis, it.Reading.Value = at.UnixMilli(), conv.ToValue
}

// panelComponent returns the component of a panel that carries its value
// of kind, with that component's row: the first, in document order, whose
// code has an accepted row of kind; failing that, the first whose code has
// a rejected row (a venous PCO2 in the panel), so the panel is reported
// with that row's reason. ok is false when no component has either.
func (d *Decoder) panelComponent(o *observationJSON, kind derive.Kind) (*componentJSON, codes.Row, bool) {
	var rejected *componentJSON
	var rejectedRow codes.Row
	for i := range o.Component {
		c := &o.Component[i]
		row, ok := d.lookup(c.Code)
		switch {
		case !ok || row.Panel:
		case row.Action == codes.ActionAccept && row.Kind == kind:
			return c, row, true
		case row.Action == codes.ActionReject && rejected == nil:
			rejected, rejectedRow = c, row
		}
	}
	return rejected, rejectedRow, rejected != nil
}

// componentsAlso returns what blood gas gas carries besides its PaCO2 as
// components: the patient's temperature (a body-temperature row, 8310-5)
// and the PaCO2 adjusted to it (a paco2-temperature-adjusted row,
// 32771-8), the first usable component of each kind, at the gas's time and
// citing the gas's own reference; see the package documentation.
func (d *Decoder) componentsAlso(o *observationJSON, gas derive.Reading) []derive.Reading {
	var out []derive.Reading
	for _, c := range o.Component {
		row, ok := d.lookup(c.Code)
		if !ok || row.Action != codes.ActionAccept || (row.Kind != derive.KindBodyTemperature && row.Kind != derive.KindPaCO2Adjusted) ||
			slices.ContainsFunc(out, func(r derive.Reading) bool { return r.Kind == row.Kind }) {
			continue
		}
		q := c.ValueQuantity
		if q == nil || !present(q.Value) || q.Comparator != "" || c.DataAbsentReason != nil {
			continue
		}
		v, err := strconv.ParseFloat(string(q.Value), 64)
		if err != nil {
			continue
		}
		conv, err := units.FromQuantity(row.Kind, v, units.Quantity{System: q.System, Code: q.Code, Unit: q.Unit}, d.units)
		if err != nil {
			continue
		}
		if reason, _ := derive.CheckValue(row.Kind, conv.ToValue); reason != "" {
			continue
		}
		out = append(out, derive.Reading{Ref: gas.Ref, Encounter: gas.Encounter, AtMillis: gas.AtMillis, Value: conv.ToValue,
			Kind: row.Kind, Priority: int16(row.Priority)})
	}
	return out
}

// fhirID is id when it is a FHIR id, else "".
func fhirID(id string) string {
	if !ref.IsID(id) {
		return ""
	}
	return id
}

// Recoded reads an Observation that [Decoder.Decode] found unrelated (no
// code this service uses) as the version of a resource that may have
// been one this service uses: an [ItemOmitted] with its id, version,
// last-updated time and subject and the reason [derive.ReasonRecoded]. A
// caller that holds an earlier version of the same resource stores it,
// so that what was derived from that version is withdrawn. ok is false
// when it has no FHIR id or no Patient subject to file it under.
func (d *Decoder) Recoded(line []byte) (Item, bool) {
	var o observationJSON
	if !fillObservation(line, &o) {
		o = observationJSON{}
		if err := json.Unmarshal(line, &o); err != nil && o.ID == "" {
			return Item{}, false
		}
	}
	it := Item{Type: ItemOmitted, ResourceType: "Observation", Status: o.Status}
	if problem := d.identify(&it, "Observation", o.ID, o.Meta); problem != "" {
		return Item{}, false
	}
	subject, problem := d.patientSubject(o.Subject)
	if problem != "" {
		return Item{}, false
	}
	it.Subject = subject
	code := "no coding"
	if len(o.Code.Coding) > 0 {
		c := o.Code.Coding[0]
		code = "code " + clip(c.System) + "|" + clip(c.Code)
	}
	it.Reading.Ref = it.Ref
	it.Omission = derive.Omission{Ref: it.Ref, Reason: derive.ReasonRecoded,
		Detail: code + " is not one this service uses; an earlier version of the resource was"}
	return it, true
}

// identify fills ID, VersionID, Ref and LastUpdated, or says what is wrong.
func (d *Decoder) identify(it *Item, resourceType, id string, meta *metaJSON) string {
	switch {
	case id == "":
		return "no id"
	case !ref.IsID(id):
		return "id is not a FHIR id"
	}
	it.ID = id
	it.Ref = resourceType + "/" + id
	if meta == nil {
		return ""
	}
	if t, err := time.Parse(time.RFC3339Nano, meta.LastUpdated); err == nil {
		it.LastUpdated = t
	}
	if meta.VersionID != "" {
		if !ref.IsID(meta.VersionID) {
			it.Ref = ""
			return "meta.versionId is not a FHIR id"
		}
		it.VersionID = meta.VersionID
		it.Ref = ref.Versioned(it.Ref, meta.VersionID)
	}
	return ""
}

// patientSubject returns the unversioned Patient reference the patient is
// keyed by, or a problem: relative when written so or under the service's
// own server base, else absolute with its base (fhir/ref's Key, which
// parses it).
func (d *Decoder) patientSubject(r *referenceJSON) (string, string) {
	if r == nil {
		return "", "no subject"
	}
	if r.Reference == "" {
		if present(r.Identifier) {
			return "", "subject has an identifier but no literal reference"
		}
		return "", "subject has no reference"
	}
	p, key, err := ref.Key(r.Reference, d.base)
	switch {
	case err != nil:
		return "", "subject is not a Patient/{id} reference"
	case p.Type != "Patient":
		return "", fmt.Sprintf("subject is a %q reference, not a Patient", clip(p.Type))
	}
	return intern(key), ""
}

// effectiveTime applies rule 9 of the package documentation. Two
// effective[x] members break FHIR's choice-type rule and are malformed.
func effectiveTime(o *observationJSON) (time.Time, derive.Reason, string) {
	n := btoi(o.EffectiveDateTime != nil) + btoi(o.EffectiveInstant != nil) + btoi(o.EffectivePeriod != nil) + btoi(present(o.EffectiveTiming))
	var t time.Time
	var problem string
	switch {
	case n > 1:
		return time.Time{}, derive.ReasonMalformed, "more than one effective[x]"
	case o.EffectiveDateTime != nil:
		t, problem = parseTime("effectiveDateTime", *o.EffectiveDateTime)
	case o.EffectiveInstant != nil:
		t, problem = parseTime("effectiveInstant", *o.EffectiveInstant)
	case o.EffectivePeriod != nil && o.EffectivePeriod.Start == "":
		problem = "effectivePeriod has no start"
	case o.EffectivePeriod != nil:
		t, problem = parseTime("effectivePeriod.start", o.EffectivePeriod.Start)
	case n == 1:
		problem = "effectiveTiming cannot place a reading in time"
	default:
		problem = "no effective time (issued is not used: it is when the result was reported)"
	}
	return t, derive.ReasonNoTime, problem
}

// parseTime needs a time of day and a timezone: without them a reading
// cannot be placed within minutes of a blood gas.
func parseTime(field, s string) (time.Time, string) {
	if t, err := time.Parse(time.RFC3339Nano, s); err == nil {
		return t, ""
	}
	tpos := strings.IndexByte(s, 'T')
	switch {
	case tpos < 0 && len(s) <= 10:
		return time.Time{}, field + " is a date without a time of day"
	case tpos >= 0 && !strings.ContainsAny(s[tpos:], "Z+-"):
		return time.Time{}, field + " has no timezone"
	}
	return time.Time{}, field + " is not a FHIR dateTime with seconds and timezone"
}

func (d *Decoder) patient(line []byte) Item {
	var p patientJSON
	typeErr := json.Unmarshal(line, &p)
	it := Item{Type: ItemPatient, ResourceType: "Patient"}
	omit := func(reason derive.Reason, detail string) Item {
		it.Type = ItemOmitted
		it.Omission = derive.Omission{Ref: it.Ref, Reason: reason, Detail: detail}
		return it
	}
	if problem := d.identify(&it, "Patient", p.ID, p.Meta); problem != "" {
		return omit(derive.ReasonMalformed, problem)
	}
	it.Subject = intern("Patient/" + p.ID)
	if typeErr != nil {
		return omit(derive.ReasonMalformed, describeTypeError(typeErr))
	}
	it.Patient.Ref = it.Ref
	switch p.Gender {
	case "male":
		it.Patient.Sex = derive.SexMale
	case "female":
		it.Patient.Sex = derive.SexFemale
	}
	it.Patient.BirthDate = birthDate(p.BirthDate)
	return it
}

// birthDate reads a FHIR date, taking a partial date at the middle of the
// period it names; see the package documentation.
func birthDate(s string) time.Time {
	switch len(s) {
	case 4:
		if t, err := time.Parse("2006", s); err == nil {
			return t.AddDate(0, 6, 0) // 1 July
		}
	case 7:
		if t, err := time.Parse("2006-01", s); err == nil {
			return t.AddDate(0, 0, 14) // the 15th
		}
	case 10:
		if t, err := time.Parse(time.DateOnly, s); err == nil {
			return t
		}
	}
	return time.Time{}
}

func describeTypeError(err error) string {
	var te *json.UnmarshalTypeError
	if errors.As(err, &te) {
		field := te.Field
		if field == "" {
			field = "the resource"
		}
		return fmt.Sprintf("%s is a JSON %s, not the type FHIR defines", clip(field), te.Value)
	}
	return clip(err.Error())
}

func conceptText(c conceptJSON) string {
	for _, cd := range c.Coding {
		if cd.Code != "" {
			return clip(cd.Code)
		}
	}
	if c.Text != "" {
		return clip(c.Text)
	}
	return "(no code)"
}

// clip bounds strings copied from a resource into a detail.
func clip(s string) string {
	const n = 64
	if len(s) <= n {
		return s
	}
	cut := n
	for cut > 0 && !utf8.RuneStart(s[cut]) {
		cut--
	}
	return s[:cut] + "…"
}

func intern(s string) string { return unique.Make(s).Value() }

func btoi(b bool) int {
	if b {
		return 1
	}
	return 0
}

func fmtNum(v float64) string {
	if math.IsInf(v, 0) || math.IsNaN(v) {
		return fmt.Sprint(v)
	}
	return strconv.FormatFloat(v, 'g', 6, 64)
}
