package encode

import (
	"errors"
	"fmt"
	"net/url"
	"regexp"
	"strings"
	"time"

	"github.com/samply/golang-fhir-models/fhir-models/fhir"

	"github.com/deadspace-fhir/deadspace/derive"
	fhirref "github.com/deadspace-fhir/deadspace/fhir/ref"
)

// Options configures an [Encoder]. Start from [DefaultOptions]; an empty
// system falls back to its default.
type Options struct {
	// CodeSystem is the canonical URL of the project's CodeSystem, the
	// system of every derived code.
	CodeSystem string
	// IdentifierSystem is the system of identifier[0], the idempotency key.
	IdentifierSystem string
	// SeriesSystem is the system of identifier[1], the series.
	SeriesSystem string
	// DeviceSystem is the system of the software Device's identifier.
	DeviceSystem string
	// SoftwareVersion is the build version of deadspace, "1.0.0" or "dev".
	// It is required: a derived value must say what computed it.
	SoftwareVersion string
	// Issued is written as Observation.issued and Provenance.recorded. Tests
	// and replay set it so output is reproducible; when zero, each call uses
	// the current time.
	Issued time.Time
}

// DefaultOptions returns the project's systems and version "dev".
func DefaultOptions() Options {
	return Options{
		CodeSystem:       DefaultCodeSystem,
		IdentifierSystem: DefaultIdentifierSystem,
		SeriesSystem:     DefaultSeriesSystem,
		DeviceSystem:     DefaultDeviceSystem,
		SoftwareVersion:  "dev",
	}
}

// versionPattern keeps the version usable in an id and an identifier value;
// semantic versions and "dev" fit.
var versionPattern = regexp.MustCompile(`^[A-Za-z0-9][A-Za-z0-9.+_~-]{0,49}$`)

// Encoder turns derivations into resources. It holds no state between calls
// and is safe for concurrent use.
type Encoder struct {
	o        Options
	deviceID string
}

// New validates o and returns an Encoder. It reports every problem at once.
func New(o Options) (*Encoder, error) {
	def := DefaultOptions()
	for _, f := range []struct {
		v   *string
		def string
	}{
		{&o.CodeSystem, def.CodeSystem},
		{&o.IdentifierSystem, def.IdentifierSystem},
		{&o.SeriesSystem, def.SeriesSystem},
		{&o.DeviceSystem, def.DeviceSystem},
	} {
		if *f.v == "" {
			*f.v = f.def
		}
	}
	var errs []error
	for _, f := range []struct{ name, v string }{
		{"CodeSystem", o.CodeSystem},
		{"IdentifierSystem", o.IdentifierSystem},
		{"SeriesSystem", o.SeriesSystem},
		{"DeviceSystem", o.DeviceSystem},
	} {
		if err := checkSystem(f.v); err != nil {
			errs = append(errs, fmt.Errorf("encode: %s: %w", f.name, err))
		}
	}
	if o.IdentifierSystem == o.SeriesSystem {
		errs = append(errs, fmt.Errorf("encode: IdentifierSystem and SeriesSystem must differ, both are %q", o.IdentifierSystem))
	}
	if !versionPattern.MatchString(o.SoftwareVersion) {
		errs = append(errs, fmt.Errorf("encode: SoftwareVersion %q: want letters, digits and . + _ ~ - (at most 50), e.g. \"1.0.0\" or \"dev\"", o.SoftwareVersion))
	}
	if err := errors.Join(errs...); err != nil {
		return nil, err
	}
	id := "deadspace-" + strings.Map(func(r rune) rune {
		if r == '+' || r == '_' || r == '~' {
			return '-'
		}
		return r
	}, o.SoftwareVersion)
	return &Encoder{o: o, deviceID: id}, nil
}

// checkSystem requires an absolute URL with a host and no fragment, the
// shape of a FHIR canonical or identifier system we mint.
func checkSystem(s string) error {
	u, err := url.Parse(s)
	if err != nil {
		return fmt.Errorf("%q: %w", s, err)
	}
	if (u.Scheme != "https" && u.Scheme != "http") || u.Host == "" || u.Fragment != "" || u.RawQuery != "" {
		return fmt.Errorf("%q: want an absolute http(s) URL without query or fragment", s)
	}
	return nil
}

// Options returns the effective options, defaults filled in.
func (e *Encoder) Options() Options { return e.o }

// DeviceRef returns the reference to the software Device, "Device/<id>".
func (e *Encoder) DeviceRef() string { return "Device/" + e.deviceID }

// Bundle is what one derivation or one fall encodes to. It is not a FHIR
// Bundle: the caller chooses how to write it (transaction, NDJSON).
type Bundle struct {
	Observations []fhir.Observation
	Provenance   fhir.Provenance
}

// Resources returns the Observations and then the Provenance, the order in
// which they are written.
func (b Bundle) Resources() []any {
	out := make([]any, 0, len(b.Observations)+1)
	for _, o := range b.Observations {
		out = append(out, o)
	}
	return append(out, b.Provenance)
}

// ErrNoValues is returned for a derivation with no values: there is nothing
// to write and a Provenance needs a target.
var ErrNoValues = errors.New("derivation has no values")

// Caution is the first note of every derived Observation.
func (e *Encoder) Caution() string {
	return "Calculated by deadspace " + e.o.SoftwareVersion + " from the cited inputs. " +
		"A calculated value: read it with the clinical picture and act under local policy and licensed practice; " +
		"it supports and never replaces clinical judgement."
}

// estimateNote is added to values from a regression.
const estimateNote = "Estimate from a regression, not a measurement."

func (e *Encoder) issued() string {
	t := e.o.Issued
	if t.IsZero() {
		t = time.Now()
	}
	return instant(t)
}

// instant writes an R4 instant: seconds always, fractions only when set.
func instant(t time.Time) string { return t.UTC().Format(time.RFC3339Nano) }

// Derivation encodes every value of d for the patient subject
// ("Patient/id", or the absolute URL of a patient of another server: the
// blood gas's subject as the decoder keyed it) as one Observation each, in the
// order of d.Values, and one Provenance for them all.
//
// The Provenance targets are unversioned ("Observation/<id>"): the version
// does not exist before the write. A server that assigns versions resolves
// them; a caller that needs versioned targets rewrites them after the
// write.
func (e *Encoder) Derivation(subject string, d derive.Derivation) (Bundle, error) {
	subj, err := subjectRef(subject, "Patient")
	if err != nil {
		return Bundle{}, fmt.Errorf("encode derivation: subject: %w", err)
	}
	if d.Patient.Ref != "" {
		p, err := cited(d.Patient.Ref, "Patient")
		if err != nil {
			return Bundle{}, fmt.Errorf("encode derivation: patient: %w", err)
		}
		if p.Logical() != subj {
			return Bundle{}, fmt.Errorf("encode derivation: patient facts are for %s, not the subject %s", p.Logical(), subj)
		}
	}
	if len(d.Values) == 0 {
		return Bundle{}, fmt.Errorf("encode derivation: %w", ErrNoValues)
	}
	issued := e.issued()
	var b Bundle
	var inputs []string
	seen := map[derive.Code]bool{}
	for _, v := range d.Values {
		if seen[v.Code] {
			return Bundle{}, fmt.Errorf("encode derivation: %s appears twice", v.Code)
		}
		seen[v.Code] = true
		obs, used, err := e.value(subj, d, v, issued)
		if err != nil {
			return Bundle{}, fmt.Errorf("encode derivation: %w", err)
		}
		b.Observations = append(b.Observations, obs)
		inputs = append(inputs, used...)
	}
	b.Provenance, err = e.provenance(b.Observations, activityCreate, inputs, nil, issued)
	if err != nil {
		return Bundle{}, fmt.Errorf("encode derivation: %w", err)
	}
	return b, nil
}

// value encodes one derived value and returns it with the references of every input it used (for the Provenance).
func (e *Encoder) value(subject string, d derive.Derivation, v derive.Value, issued string) (fhir.Observation, []string, error) {
	id, err := ValueIdentity(d, v)
	if err != nil {
		return fhir.Observation{}, nil, err
	}
	readings, err := valueReadings(d, v)
	if err != nil {
		return fhir.Observation{}, nil, err
	}
	obs, err := e.observation(id, v.Code, v.Unit, v.Value, subject, readings, issued)
	if err != nil {
		return fhir.Observation{}, nil, err
	}
	obs.EffectiveDateTime = ptr(instant(d.Gas.At()))
	if text := methodText(v.Equation); text != "" {
		obs.Method = &fhir.CodeableConcept{Text: ptr(text)}
	}
	if v.Flag != derive.FlagNone {
		cc, err := interpretation(v.Flag)
		if err != nil {
			return fhir.Observation{}, nil, fmt.Errorf("%s: %w", v.Code, err)
		}
		obs.Interpretation = []fhir.CodeableConcept{cc}
	}
	if v.Range != nil {
		rr, ok, err := referenceRange(*v.Range, obs.ValueQuantity)
		if err != nil {
			return fhir.Observation{}, nil, fmt.Errorf("%s: %w", v.Code, err)
		}
		if ok {
			obs.ReferenceRange = []fhir.ObservationReferenceRange{rr}
		}
	}
	for _, n := range v.Notes {
		obs.Note = appendNote(obs.Note, n)
	}
	if v.Estimate {
		obs.Note = appendNote(obs.Note, estimateNote)
	}
	used := make([]string, 0, len(readings)+1)
	for _, r := range readings {
		used = append(used, r.Ref)
	}
	if v.UsesPatient {
		used = append(used, d.Patient.Ref)
	}
	obs.Note = unversionedNote(obs.Note, used)
	return obs, used, nil
}

// unversionedNote adds [UnversionedNote] when any cited reference has no
// version.
func unversionedNote(notes []fhir.Annotation, refs []string) []fhir.Annotation {
	n := 0
	for _, r := range sortedUnique(refs) {
		if _, version := fhirref.Split(r); version == "" {
			n++
		}
	}
	if n == 0 {
		return notes
	}
	return appendNote(notes, fmt.Sprintf(UnversionedNote, n))
}

// observation builds what every derived Observation shares.
func (e *Encoder) observation(id Identity, code derive.Code, unit string, value float64, subject string, cited []derive.Reading, issued string) (fhir.Observation, error) {
	p, ok := precisions[code]
	if !ok {
		return fhir.Observation{}, fmt.Errorf("unknown code %q", code)
	}
	if unit != p.Unit {
		return fhir.Observation{}, fmt.Errorf("%s: unit %q, want %q", code, unit, p.Unit)
	}
	num, err := formatDecimal(value, p.Decimals)
	if err != nil {
		return fhir.Observation{}, fmt.Errorf("%s: %w", code, err)
	}
	enc, err := encounterOf(cited)
	if err != nil {
		return fhir.Observation{}, fmt.Errorf("%s: %w", code, err)
	}
	refs := make([]string, 0, len(cited))
	for _, r := range cited {
		refs = append(refs, r.Ref)
	}
	var derived []fhir.Reference
	for _, r := range sortedUnique(refs) {
		derived = append(derived, fhir.Reference{Reference: ptr(r)})
	}
	obs := fhir.Observation{
		Id: ptr(id.ID()),
		Identifier: []fhir.Identifier{
			{System: ptr(e.o.IdentifierSystem), Value: ptr(id.Key)},
			{System: ptr(e.o.SeriesSystem), Value: ptr(id.Series)},
		},
		Status: fhir.ObservationStatusFinal,
		Category: []fhir.CodeableConcept{{Coding: []fhir.Coding{{
			System: ptr(systemObsCategory), Code: ptr("procedure"), Display: ptr("Procedure"),
		}}}},
		Code: fhir.CodeableConcept{
			Coding: []fhir.Coding{{System: ptr(e.o.CodeSystem), Code: ptr(string(code)), Display: ptr(p.Text)}},
			Text:   ptr(p.Text),
		},
		Subject: &fhir.Reference{Reference: ptr(subject)},
		Issued:  ptr(issued),
		ValueQuantity: &fhir.Quantity{
			Value:  numberPtr(num),
			Unit:   ptr(p.Display),
			System: ptr(systemUCUM),
			Code:   ptr(p.Unit),
		},
		Note:        []fhir.Annotation{{Text: e.Caution()}},
		Device:      &fhir.Reference{Reference: ptr(e.DeviceRef())},
		DerivedFrom: derived,
	}
	if enc != "" {
		obs.Encounter = &fhir.Reference{Reference: ptr(enc)}
	}
	return obs, nil
}

// encounterOf returns the encounter every cited reading shares, or "" when
// any reading has none or they differ: a value that spans two encounters
// belongs to neither.
func encounterOf(cited []derive.Reading) (string, error) {
	if len(cited) == 0 {
		return "", nil
	}
	first := cited[0].Encounter
	for _, r := range cited {
		if r.Encounter == "" || r.Encounter != first {
			return "", nil
		}
	}
	r, base, err := fhirref.ParseAny(first)
	if err != nil || r.Type != "Encounter" {
		return "", fmt.Errorf("encounter %q: want Encounter/id", first)
	}
	return base + r.Logical(), nil
}

func methodText(equation string) string {
	alg := "deadspace algorithm " + derive.AlgorithmVersion
	if strings.TrimSpace(equation) == "" {
		return alg
	}
	return strings.TrimSpace(equation) + "; " + alg
}

func interpretation(f derive.Flag) (fhir.CodeableConcept, error) {
	var code, display string
	switch f {
	case derive.FlagHigh:
		code, display = "H", "High"
	case derive.FlagLow:
		code, display = "L", "Low"
	case derive.FlagNormal:
		code, display = "N", "Normal"
	default:
		return fhir.CodeableConcept{}, fmt.Errorf("unknown flag %d", f)
	}
	return fhir.CodeableConcept{Coding: []fhir.Coding{{
		System: ptr(systemInterpretation), Code: ptr(code), Display: ptr(display),
	}}}, nil
}

// referenceRange writes r in the value's unit. A range with neither bound
// nor text says nothing (obs-3 forbids it) and is left out.
func referenceRange(r derive.Range, q *fhir.Quantity) (fhir.ObservationReferenceRange, bool, error) {
	var out fhir.ObservationReferenceRange
	bound := func(v *float64) (*fhir.Quantity, error) {
		if v == nil {
			return nil, nil
		}
		s, err := formatBound(*v)
		if err != nil {
			return nil, err
		}
		// SimpleQuantity: same unit, never a comparator (sqty-1).
		return &fhir.Quantity{Value: numberPtr(s), Unit: q.Unit, System: q.System, Code: q.Code}, nil
	}
	var err error
	if out.Low, err = bound(r.Low); err != nil {
		return out, false, err
	}
	if out.High, err = bound(r.High); err != nil {
		return out, false, err
	}
	text := strings.TrimSpace(r.Text)
	if src := strings.TrimSpace(r.Source); src != "" {
		if text == "" {
			text = src
		} else {
			text += " (" + src + ")"
		}
	}
	if text != "" {
		out.Text = ptr(text)
	}
	return out, out.Low != nil || out.High != nil || out.Text != nil, nil
}

// appendNote adds a note, skipping empty ones: FHIR forbids empty strings.
func appendNote(notes []fhir.Annotation, text string) []fhir.Annotation {
	text = strings.TrimSpace(text)
	if text == "" {
		return notes
	}
	return append(notes, fhir.Annotation{Text: text})
}

func ptr[T any](v T) *T { return &v }
