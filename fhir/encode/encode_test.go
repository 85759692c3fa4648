package encode_test

import (
	"bytes"
	"encoding/json"
	"errors"
	"math"
	"regexp"
	"strings"
	"testing"
	"time"

	"github.com/samply/golang-fhir-models/fhir-models/fhir"

	"github.com/deadspace-fhir/deadspace/derive"
	"github.com/deadspace-fhir/deadspace/fhir/encode"
)

func encodeFull(t *testing.T, d derive.Derivation) encode.Bundle {
	t.Helper()
	b, err := newEncoder(t).Derivation(subject, d)
	if err != nil {
		t.Fatalf("Derivation: %v", err)
	}
	return b
}

func byCode(t *testing.T, b encode.Bundle) map[derive.Code]fhir.Observation {
	t.Helper()
	out := map[derive.Code]fhir.Observation{}
	for _, o := range b.Observations {
		out[derive.Code(*o.Code.Coding[0].Code)] = o
	}
	return out
}

func key(o fhir.Observation) string    { return *o.Identifier[0].Value }
func series(o fhir.Observation) string { return *o.Identifier[1].Value }

func TestSameInputSameOutput(t *testing.T) {
	var a, b bytes.Buffer
	if err := encode.MarshalNDJSON(&a, encodeFull(t, fullDerivation()).Resources()...); err != nil {
		t.Fatal(err)
	}
	if err := encode.MarshalNDJSON(&b, encodeFull(t, fullDerivation()).Resources()...); err != nil {
		t.Fatal(err)
	}
	if !bytes.Equal(a.Bytes(), b.Bytes()) {
		t.Fatal("encoding the same derivation twice gave different bytes")
	}
}

// TestIdentityFollowsInputs checks the two identifier contracts: the key
// changes with any input version the value used and with nothing else; the
// series changes only with the blood gas's logical id.
func TestIdentityFollowsInputs(t *testing.T) {
	base := byCode(t, encodeFull(t, fullDerivation()))
	cases := []struct {
		name       string
		change     func(*derive.Derivation)
		keyChanged map[derive.Code]bool // codes whose key must change; all others must not
		newSeries  bool                 // every series changes
	}{
		{"etco2 reading corrected", func(d *derive.Derivation) {
			d.Used[0].Readings[1].Ref = "Observation/etco2-2/_history/2"
		}, map[derive.Code]bool{derive.CodeGradient: true, derive.CodeAlveolarFraction: true, derive.CodeAirwayFraction: true, derive.CodeEstimatedFraction: true}, false},
		{"blood gas corrected", func(d *derive.Derivation) {
			d.Gas.Ref = "Observation/abg-1/_history/3"
		}, allCodes(base), false},
		{"patient corrected", func(d *derive.Derivation) {
			d.Patient.Ref = "Patient/p1/_history/4"
		}, map[derive.Code]bool{derive.CodeVentilatoryRatio: true, derive.CodeEstimatedFraction: true}, false},
		{"value changed, inputs the same", func(d *derive.Derivation) {
			d.Values[0].Value = 11
		}, nil, false},
		{"another blood gas", func(d *derive.Derivation) {
			d.Gas.Ref = "Observation/abg-2/_history/2"
		}, allCodes(base), true},
	}
	for _, tc := range cases {
		t.Run(tc.name, func(t *testing.T) {
			d := fullDerivation()
			tc.change(&d)
			got := byCode(t, encodeFull(t, d))
			for code, o := range got {
				b := base[code]
				if changed := key(o) != key(b); changed != tc.keyChanged[code] {
					t.Errorf("%s: key changed = %v, want %v", code, changed, tc.keyChanged[code])
				}
				if changed := series(o) != series(b); changed != tc.newSeries {
					t.Errorf("%s: series changed = %v, want %v", code, changed, tc.newSeries)
				}
				if (*o.Id != *b.Id) != tc.newSeries {
					t.Errorf("%s: id %s vs %s; the id must follow the series", code, *o.Id, *b.Id)
				}
				id, err := encode.ValueIdentity(d, valueOf(d, code))
				if err != nil {
					t.Fatal(err)
				}
				if id.Key != key(o) || id.Series != series(o) || id.ID() != *o.Id {
					t.Errorf("%s: ValueIdentity = %+v, does not match the encoded Observation", code, id)
				}
				s, err := encode.GasSeries(code, "Observation/"+strings.Split(strings.TrimPrefix(d.Gas.Ref, "Observation/"), "/")[0])
				if err != nil || s != series(o) {
					t.Errorf("%s: GasSeries(unversioned) = %q, %v; want %q", code, s, err, series(o))
				}
				if oid, err := encode.ObservationID(s); err != nil || oid != *o.Id {
					t.Errorf("%s: ObservationID = %q, %v; want %q", code, oid, err, *o.Id)
				}
			}
		})
	}
}

func allCodes(m map[derive.Code]fhir.Observation) map[derive.Code]bool {
	out := map[derive.Code]bool{}
	for c := range m {
		out[c] = true
	}
	return out
}

func valueOf(d derive.Derivation, c derive.Code) derive.Value {
	for _, v := range d.Values {
		if v.Code == c {
			return v
		}
	}
	return derive.Value{}
}

func TestFallIdentity(t *testing.T) {
	e := newEncoder(t)
	b, err := e.Fall(subject, fall())
	if err != nil {
		t.Fatal(err)
	}
	o := b.Observations[0]
	id, err := encode.FallIdentity(subject, fall())
	if err != nil {
		t.Fatal(err)
	}
	if id.Key != key(o) || id.Series != series(o) || id.ID() != *o.Id {
		t.Errorf("FallIdentity = %+v, does not match the encoded Observation %s", id, *o.Id)
	}
	f := fall()
	f.EpisodeReadings[0].Ref = "Observation/et-e1/_history/2"
	id2, err := encode.FallIdentity(subject, f)
	if err != nil {
		t.Fatal(err)
	}
	if id2.Key == id.Key || id2.Series != id.Series {
		t.Errorf("corrected reading: key %v series %v; want a new key and the same series", id2.Key != id.Key, id2.Series == id.Series)
	}
	f = fall()
	f.Onset = f.Onset.Add(time.Minute)
	id3, err := encode.FallIdentity(subject, f)
	if err != nil {
		t.Fatal(err)
	}
	if id3.Series == id.Series {
		t.Error("another onset kept the series")
	}
	if _, err := encode.FallIdentity("Patient/p1/_history/1", fall()); err == nil {
		t.Error("versioned subject accepted")
	}
}

var versionedRef = regexp.MustCompile(`^[A-Z][A-Za-z]+/[A-Za-z0-9\-.]{1,64}/_history/[A-Za-z0-9\-.]{1,64}$`)

// TestObservationContent checks what every derived Observation must carry,
// whatever the value.
func TestObservationContent(t *testing.T) {
	e := newEncoder(t)
	d := encodeFull(t, fullDerivation())
	f, err := e.Fall(subject, fall())
	if err != nil {
		t.Fatal(err)
	}
	all := append(append([]fhir.Observation{}, d.Observations...), f.Observations...)
	for _, o := range all {
		code := *o.Code.Coding[0].Code
		t.Run(code, func(t *testing.T) {
			if len(o.Note) == 0 || o.Note[0].Text != e.Caution() {
				t.Errorf("first note is not the caution: %+v", o.Note)
			}
			if !strings.Contains(e.Caution(), "deadspace 1.0.0") {
				t.Errorf("caution does not name the version: %q", e.Caution())
			}
			if len(o.DerivedFrom) == 0 {
				t.Error("no derivedFrom")
			}
			for i, r := range o.DerivedFrom {
				if !versionedRef.MatchString(*r.Reference) || !strings.HasPrefix(*r.Reference, "Observation/") {
					t.Errorf("derivedFrom %q is not a versioned Observation reference", *r.Reference)
				}
				if i > 0 && *o.DerivedFrom[i-1].Reference >= *r.Reference {
					t.Errorf("derivedFrom not sorted and unique at %d", i)
				}
			}
			if o.Status != fhir.ObservationStatusFinal {
				t.Errorf("status %s", o.Status.Code())
			}
			// Category "procedure" (observation-category, FHIR R4).
			if c := o.Category[0].Coding[0]; *c.System != "http://terminology.hl7.org/CodeSystem/observation-category" || *c.Code != "procedure" {
				t.Errorf("category %s|%s", *c.System, *c.Code)
			}
			// Subject is the unversioned Patient.
			if *o.Subject.Reference != subject {
				t.Errorf("subject %q", *o.Subject.Reference)
			}
			// qty-3 (FHIR R4 datatypes): a unit code needs its system.
			q := o.ValueQuantity
			if q == nil || q.Code == nil || q.System == nil || *q.System != "http://unitsofmeasure.org" {
				t.Fatalf("valueQuantity %+v lacks UCUM system or code", q)
			}
			// obs-6 (FHIR R4 Observation): no dataAbsentReason beside a value.
			if o.DataAbsentReason != nil {
				t.Error("dataAbsentReason beside a value")
			}
			// Only one effective[x].
			if (o.EffectiveDateTime == nil) == (o.EffectivePeriod == nil) {
				t.Error("want exactly one of effectiveDateTime and effectivePeriod")
			}
			for _, rr := range o.ReferenceRange {
				for _, b := range []*fhir.Quantity{rr.Low, rr.High} {
					if b != nil && (b.Comparator != nil || *b.Code != *q.Code || b.System == nil) {
						t.Errorf("reference range bound %+v: want the value's unit and no comparator (sqty-1)", b)
					}
				}
			}
			if *o.Device.Reference != e.DeviceRef() {
				t.Errorf("device %q, want %q", *o.Device.Reference, e.DeviceRef())
			}
		})
	}
}

func TestUnitsAndRounding(t *testing.T) {
	got := byCode(t, encodeFull(t, fullDerivation()))
	// want values are the fixture values rounded by hand to the documented
	// decimals; UCUM codes are case-sensitive (UCUM specification,
	// unitsofmeasure.org, from memory) and each one below is accepted as
	// valid by ucum-lhc 7.1.10 (fhir/units/testdata/ucum-lhc-7.1.10.json);
	// "1" for a dimensionless ratio is UCUM's unity, from memory.
	cases := []struct {
		code              derive.Code
		value, ucum, unit string
	}{
		{derive.CodeGradient, "10.0", "mm[Hg]", "mmHg"},
		{derive.CodeAlveolarFraction, "0.250", "1", "1"},
		{derive.CodeMixedExpiredCO2, "28.8", "mm[Hg]", "mmHg"},
		{derive.CodePhysiologic, "0.281", "1", "1"},
		{derive.CodeAirwayFraction, "0.041", "1", "1"},
		{derive.CodeDeadSpaceVolume, "140", "mL", "mL"},
		{derive.CodeAlveolarVent, "4.32", "L/min", "L/min"},
		{derive.CodeVentilatoryRatio, "0.91", "1", "1"},
		{derive.CodeEstimatedFraction, "0.576", "1", "1"},
	}
	if len(cases) != len(got) {
		t.Fatalf("%d Observations, want %d", len(got), len(cases))
	}
	for _, tc := range cases {
		t.Run(string(tc.code), func(t *testing.T) {
			q := got[tc.code].ValueQuantity
			if q.Value.String() != tc.value || *q.Code != tc.ucum || *q.Unit != tc.unit {
				t.Errorf("quantity %s %s (%s), want %s %s (%s)", q.Value, *q.Code, *q.Unit, tc.value, tc.ucum, tc.unit)
			}
		})
	}
}

func TestEncounter(t *testing.T) {
	cases := []struct {
		name   string
		change func(*derive.Derivation)
		code   derive.Code
		want   string
	}{
		{"all readings in one encounter", nil, derive.CodeGradient, "Encounter/icu-1"},
		{"height from an earlier encounter", nil, derive.CodeVentilatoryRatio, ""},
		{"one reading without encounter", func(d *derive.Derivation) { d.Used[0].Readings[2].Encounter = "" }, derive.CodeGradient, ""},
		{"blood gas without encounter", func(d *derive.Derivation) { d.Gas.Encounter = "" }, derive.CodeGradient, ""},
		{"readings not used do not matter", func(d *derive.Derivation) { d.Used[0].Readings[2].Encounter = "" }, derive.CodePhysiologic, "Encounter/icu-1"},
	}
	for _, tc := range cases {
		t.Run(tc.name, func(t *testing.T) {
			d := fullDerivation()
			if tc.change != nil {
				tc.change(&d)
			}
			o := byCode(t, encodeFull(t, d))[tc.code]
			got := ""
			if o.Encounter != nil {
				got = *o.Encounter.Reference
			}
			if got != tc.want {
				t.Errorf("encounter %q, want %q", got, tc.want)
			}
		})
	}
}

func TestNotesAndFlags(t *testing.T) {
	got := byCode(t, encodeFull(t, fullDerivation()))
	est := got[derive.CodeEstimatedFraction]
	if n := est.Note[len(est.Note)-1].Text; n != "Estimate from a regression, not a measurement." {
		t.Errorf("estimate note %q", n)
	}
	vr := got[derive.CodeVentilatoryRatio]
	if len(vr.Note) != 2 || vr.Note[1].Text != "Predicted body weight from height and sex." {
		t.Errorf("VR notes %+v", vr.Note)
	}
	// Codes H and N of the HL7 v3-ObservationInterpretation code system, as
	// bound by FHIR R4 Observation.interpretation (an R4 core Observation
	// example uses H).
	for code, want := range map[derive.Code]string{derive.CodeGradient: "H", derive.CodePhysiologic: "N"} {
		c := got[code].Interpretation[0].Coding[0]
		if *c.Code != want || *c.System != "http://terminology.hl7.org/CodeSystem/v3-ObservationInterpretation" {
			t.Errorf("%s interpretation %s|%s, want %s", code, *c.System, *c.Code, want)
		}
	}
	if len(got[derive.CodeAlveolarFraction].Interpretation) != 0 || got[derive.CodeAlveolarFraction].ReferenceRange != nil {
		t.Error("interpretation or range without a flag or range")
	}
	rr := got[derive.CodeGradient].ReferenceRange[0]
	if rr.Low != nil || rr.High.Value.String() != "5" || *rr.Text != "normal below 5 mm[Hg] (common practice)" {
		t.Errorf("gradient range %+v", rr)
	}
	d := fullDerivation()
	d.Values = d.Values[:1]
	d.Values[0].Flag = derive.FlagLow
	d.Values[0].Range = &derive.Range{}
	o := encodeFull(t, d).Observations[0]
	if c := o.Interpretation[0].Coding[0]; *c.Code != "L" {
		t.Errorf("low flag wrote %s", *c.Code)
	}
	if o.ReferenceRange != nil {
		t.Error("an empty range was written (obs-3 needs low, high or text)")
	}
}

func TestProvenance(t *testing.T) {
	b := encodeFull(t, fullDerivation())
	p := b.Provenance
	if len(p.Target) != len(b.Observations) {
		t.Fatalf("%d targets for %d Observations", len(p.Target), len(b.Observations))
	}
	for i, tg := range p.Target {
		if *tg.Reference != "Observation/"+*b.Observations[i].Id {
			t.Errorf("target %d = %q", i, *tg.Reference)
		}
	}
	if p.Recorded != "2025-03-01T10:15:07Z" {
		t.Errorf("recorded %q", p.Recorded)
	}
	if c := p.Activity.Coding[0]; *c.Code != "CREATE" || *c.System != "http://terminology.hl7.org/CodeSystem/v3-DataOperation" {
		t.Errorf("activity %s|%s", *c.System, *c.Code)
	}
	if a := p.Agent[0]; *a.Type.Coding[0].Code != "assembler" || *a.Who.Reference != "Device/deadspace-1.0.0" {
		t.Errorf("agent %+v", a)
	}
	var refs []string
	for _, en := range p.Entity {
		if en.Role != fhir.ProvenanceEntityRoleDerivation {
			t.Errorf("entity role %s", en.Role.Code())
		}
		refs = append(refs, *en.What.Reference)
	}
	// Every cited input once, the Patient because VR and the estimate use it.
	want := "Observation/abg-1/_history/2 Observation/etco2-1/_history/1 Observation/etco2-2/_history/1 Observation/etco2-3/_history/1 " +
		"Observation/height-1/_history/1 Observation/rr-1/_history/4 Observation/vco2-1/_history/1 Observation/ve-1/_history/1 " +
		"Observation/vt-1/_history/1 Patient/p1/_history/3"
	if got := strings.Join(refs, " "); got != want {
		t.Errorf("entities\n got %s\nwant %s", got, want)
	}
	d := fullDerivation()
	d.Values = d.Values[:2] // neither uses the patient
	for _, en := range encodeFull(t, d).Provenance.Entity {
		if strings.HasPrefix(*en.What.Reference, "Patient/") {
			t.Error("Patient cited by a derivation that did not use it")
		}
	}
}

func TestRevision(t *testing.T) {
	e := newEncoder(t)
	b := encodeFull(t, fullDerivation())
	prev := "Observation/" + *b.Observations[1].Id + "/_history/1"
	r, err := e.Revision(b, []string{prev})
	if err != nil {
		t.Fatal(err)
	}
	for _, o := range r.Observations {
		if o.Status != fhir.ObservationStatusAmended {
			t.Errorf("status %s, want amended", o.Status.Code())
		}
	}
	if b.Observations[0].Status != fhir.ObservationStatusFinal {
		t.Error("Revision changed its argument")
	}
	if *r.Provenance.Activity.Coding[0].Code != "UPDATE" || *r.Provenance.Id == *b.Provenance.Id {
		t.Errorf("revision provenance %s activity %s", *r.Provenance.Id, *r.Provenance.Activity.Coding[0].Code)
	}
	last := r.Provenance.Entity[len(r.Provenance.Entity)-1]
	if last.Role != fhir.ProvenanceEntityRoleRevision || *last.What.Reference != prev {
		t.Errorf("last entity %s %s", last.Role.Code(), *last.What.Reference)
	}
	for _, bad := range [][]string{nil, {"Observation/other/_history/1"}, {"Observation/" + *b.Observations[1].Id}} {
		if _, err := e.Revision(b, bad); err == nil {
			t.Errorf("Revision(%q) accepted", bad)
		}
	}
}

func TestWithdrawal(t *testing.T) {
	e := newEncoder(t)
	o := encodeFull(t, fullDerivation()).Observations[0]
	w, err := e.Withdrawal(o, "input entered in error")
	if err != nil {
		t.Fatal(err)
	}
	got := w.Observations[0]
	if got.Status != fhir.ObservationStatusEnteredInError {
		t.Errorf("status %s", got.Status.Code())
	}
	if n := got.Note[len(got.Note)-1].Text; n != "Withdrawn by deadspace 1.0.0: input entered in error" {
		t.Errorf("note %q", n)
	}
	if o.Status != fhir.ObservationStatusFinal || len(o.Note) != 1 {
		t.Error("Withdrawal changed its argument")
	}
	if *w.Provenance.Activity.Coding[0].Code != "NULLIFY" || w.Provenance.Entity != nil {
		t.Errorf("provenance %+v", w.Provenance)
	}
	foreign := o
	foreign.Identifier = []fhir.Identifier{{System: ptr("https://lab.example/obs"), Value: ptr("1")}}
	if _, err := e.Withdrawal(foreign, "x"); err == nil {
		t.Error("withdrew an Observation deadspace did not write")
	}
	if _, err := e.Withdrawal(o, "  "); err == nil {
		t.Error("withdrew without a reason")
	}
}

func TestRejects(t *testing.T) {
	cases := []struct {
		name    string
		subject string
		change  func(*derive.Derivation)
		wantIs  error
	}{
		{"versioned subject", "Patient/p1/_history/3", nil, nil},
		{"subject not a patient", "Group/g1", nil, nil},
		{"patient facts for another patient", "Patient/p2", nil, nil},
		{"reading of another type", subject, func(d *derive.Derivation) { d.Used[0].Readings[0].Ref = "Device/x/_history/1" }, nil},
		{"unknown code", subject, func(d *derive.Derivation) { d.Values[0].Code = "tidal-volume" }, nil},
		{"wrong unit", subject, func(d *derive.Derivation) { d.Values[0].Unit = "kPa" }, nil},
		{"fraction in percent", subject, func(d *derive.Derivation) { d.Values[1].Unit = "%" }, nil},
		{"NaN", subject, func(d *derive.Derivation) { d.Values[0].Value = math.NaN() }, nil},
		{"infinite range bound", subject, func(d *derive.Derivation) { d.Values[0].Range.High = f64(math.Inf(1)) }, nil},
		{"same code twice", subject, func(d *derive.Derivation) { d.Values[1] = d.Values[0] }, nil},
		{"input kind without summary", subject, func(d *derive.Derivation) { d.Used = d.Used[1:] }, nil},
		{"uses patient, no patient", subject, func(d *derive.Derivation) { d.Patient.Ref = "" }, nil},
		{"unknown flag", subject, func(d *derive.Derivation) { d.Values[0].Flag = 9 }, nil},
		{"bad encounter", subject, func(d *derive.Derivation) {
			d.Gas.Encounter = "icu"
			for i := range d.Used {
				for j := range d.Used[i].Readings {
					d.Used[i].Readings[j].Encounter = "icu"
				}
			}
		}, nil},
		{"line break in a reference", subject, func(d *derive.Derivation) { d.Gas.Ref = "Observation/a/_history/1\n" }, nil},
		{"no values", subject, func(d *derive.Derivation) { d.Values = nil }, encode.ErrNoValues},
	}
	e := newEncoder(t)
	for _, tc := range cases {
		t.Run(tc.name, func(t *testing.T) {
			d := fullDerivation()
			if tc.change != nil {
				tc.change(&d)
			}
			_, err := e.Derivation(tc.subject, d)
			if err == nil {
				t.Fatal("accepted")
			}
			t.Logf("rejected: %v", err)
			if tc.wantIs != nil && !errors.Is(err, tc.wantIs) {
				t.Errorf("err = %v, want %v", err, tc.wantIs)
			}
		})
	}
}

func TestFallRejects(t *testing.T) {
	cases := []struct {
		name   string
		change func(*derive.Fall)
	}{
		{"confirmed before onset", func(f *derive.Fall) { f.Confirmed = f.Onset.Add(-time.Second) }},
		{"no onset", func(f *derive.Fall) { f.Onset = time.Time{} }},
		{"no episode readings", func(f *derive.Fall) { f.EpisodeReadings = nil }},
		{"NaN change", func(f *derive.Fall) { f.Change = math.NaN() }},
		{"NaN baseline", func(f *derive.Fall) { f.Baseline = math.NaN() }},
	}
	e := newEncoder(t)
	for _, tc := range cases {
		t.Run(tc.name, func(t *testing.T) {
			f := fall()
			tc.change(&f)
			_, err := e.Fall(subject, f)
			if err == nil {
				t.Fatal("accepted")
			}
			t.Logf("rejected: %v", err)
		})
	}
}

func TestNew(t *testing.T) {
	cases := []struct {
		name   string
		change func(*encode.Options)
		ok     bool
		device string
	}{
		{"defaults", func(*encode.Options) {}, true, "deadspace-dev"},
		{"empty systems take defaults", func(o *encode.Options) { o.CodeSystem, o.SeriesSystem = "", "" }, true, "deadspace-dev"},
		{"semver with build metadata", func(o *encode.Options) { o.SoftwareVersion = "1.2.3+g1a2b3c" }, true, "deadspace-1.2.3-g1a2b3c"},
		{"no version", func(o *encode.Options) { o.SoftwareVersion = "" }, false, ""},
		{"version with a space", func(o *encode.Options) { o.SoftwareVersion = "1.0 beta" }, false, ""},
		{"relative code system", func(o *encode.Options) { o.CodeSystem = "dead-space" }, false, ""},
		{"urn identifier system", func(o *encode.Options) { o.IdentifierSystem = "urn:oid:1.2.3" }, false, ""},
		{"system with fragment", func(o *encode.Options) { o.DeviceSystem = "https://x.example/a#b" }, false, ""},
		{"key and series share a system", func(o *encode.Options) { o.SeriesSystem = o.IdentifierSystem }, false, ""},
	}
	for _, tc := range cases {
		t.Run(tc.name, func(t *testing.T) {
			o := encode.DefaultOptions()
			tc.change(&o)
			e, err := encode.New(o)
			if (err == nil) != tc.ok {
				t.Fatalf("New() err = %v, want ok = %v", err, tc.ok)
			}
			if tc.ok && *e.Device().Id != tc.device {
				t.Errorf("device id %q, want %q", *e.Device().Id, tc.device)
			}
		})
	}
}

func TestIssuedDefaultsToNow(t *testing.T) {
	e, err := encode.New(encode.DefaultOptions())
	if err != nil {
		t.Fatal(err)
	}
	before := time.Now().Add(-time.Second)
	b, err := e.Derivation(subject, fullDerivation())
	if err != nil {
		t.Fatal(err)
	}
	got, err := time.Parse(time.RFC3339Nano, *b.Observations[0].Issued)
	if err != nil || got.Before(before) {
		t.Errorf("issued %q, want a time after %s", *b.Observations[0].Issued, before)
	}
}

func TestMarshalNDJSON(t *testing.T) {
	e := newEncoder(t)
	b := encodeFull(t, fullDerivation())
	var buf bytes.Buffer
	res := append(b.Resources(), e.Device())
	if err := encode.MarshalNDJSON(&buf, res...); err != nil {
		t.Fatal(err)
	}
	lines := strings.Split(strings.TrimSuffix(buf.String(), "\n"), "\n")
	if len(lines) != len(res) {
		t.Fatalf("%d lines for %d resources", len(lines), len(res))
	}
	ids := map[string]bool{}
	for i, l := range lines {
		var m map[string]any
		if err := json.Unmarshal([]byte(l), &m); err != nil {
			t.Fatalf("line %d: %v", i, err)
		}
		ids[m["resourceType"].(string)+"/"+m["id"].(string)] = true
	}
	// Every reference to a resource written here resolves inside the output.
	for _, tg := range b.Provenance.Target {
		if !ids[*tg.Reference] {
			t.Errorf("target %s not in the output", *tg.Reference)
		}
	}
	if !ids[*b.Observations[0].Device.Reference] {
		t.Error("device reference does not resolve")
	}
	if err := encode.MarshalNDJSON(&buf, []int{1}); err == nil {
		t.Error("a JSON array was written as a resource")
	}
}

// FHIR R4 makes meta.versionId optional (Resource.meta.versionId 0..1), so
// an input without a version is still used: it is cited by its logical
// reference and the value says so in a note (rule 11 of issue 8).
func TestUnversionedInputsAreCitedWithANote(t *testing.T) {
	e := newEncoder(t)
	cases := []struct {
		name   string
		change func(*derive.Derivation)
		want   string
	}{
		{"unversioned blood gas", func(d *derive.Derivation) { d.Gas.Ref = "Observation/abg-1" }, "Observation/abg-1"},
		{"unversioned reading", func(d *derive.Derivation) { d.Used[0].Readings[0].Ref = "Observation/etco2-1" }, "Observation/etco2-1"},
		{"unversioned patient", func(d *derive.Derivation) { d.Patient.Ref = "Patient/p1" }, "Patient/p1"},
	}
	for _, tc := range cases {
		t.Run(tc.name, func(t *testing.T) {
			d := fullDerivation()
			tc.change(&d)
			b, err := e.Derivation(subject, d)
			if err != nil {
				t.Fatal(err)
			}
			found := false
			for _, o := range b.Observations {
				cites := false
				for _, r := range o.DerivedFrom {
					cites = cites || *r.Reference == tc.want
				}
				code := *o.Code.Coding[0].Code
				cites = cites || (tc.want == "Patient/p1" && (code == string(derive.CodeVentilatoryRatio) || code == string(derive.CodeEstimatedFraction)))
				if !cites {
					continue
				}
				found = true
				noted := false
				for _, n := range o.Note {
					noted = noted || strings.Contains(n.Text, "no version")
				}
				if !noted {
					t.Errorf("%s cites %s without the unversioned note", *o.Code.Coding[0].Code, tc.want)
				}
			}
			if !found {
				t.Errorf("nothing cites %s", tc.want)
			}
		})
	}
	f := fall()
	f.BaselineReadings[0].Ref = "Observation/et-b1"
	b, err := e.Fall(subject, f)
	if err != nil {
		t.Fatalf("fall with an unversioned reading: %v", err)
	}
	if n := b.Observations[0].Note; !strings.Contains(n[len(n)-1].Text, "no version") {
		t.Errorf("fall notes %+v lack the unversioned note", n)
	}
}

// TestUnversionedInputIsCitedByWhatItSaid: an input without a version
// (no meta.versionId) is cited by its reference alone, so two versions of
// it cannot be told apart by reference: the key names what the value
// used of it instead (its kind, time and value; the Patient's facts), so
// a value derived from the version that replaced the other gets a key of
// its own. A versioned input is cited by its version alone, as before.
func TestUnversionedInputIsCitedByWhatItSaid(t *testing.T) {
	unversioned := func(d *derive.Derivation) {
		d.Used[0].Readings[1].Ref = "Observation/etco2-2"
		d.Patient.Ref = "Patient/p1"
	}
	etco2 := map[derive.Code]bool{derive.CodeGradient: true, derive.CodeAlveolarFraction: true, derive.CodeAirwayFraction: true, derive.CodeEstimatedFraction: true}
	patient := map[derive.Code]bool{derive.CodeVentilatoryRatio: true, derive.CodeEstimatedFraction: true}
	for _, tc := range []struct {
		name       string
		before     func(*derive.Derivation)
		change     func(*derive.Derivation)
		keyChanged map[derive.Code]bool
	}{
		{"unversioned reading, another value", unversioned, func(d *derive.Derivation) { d.Used[0].Readings[1].Value = 33 }, etco2},
		{"unversioned reading, another time", unversioned, func(d *derive.Derivation) { d.Used[0].Readings[1].AtMillis += 1000 }, etco2},
		{"unversioned reading, the same", unversioned, func(d *derive.Derivation) {}, nil},
		{"unversioned patient, another birth date", unversioned, func(d *derive.Derivation) { d.Patient.BirthDate = d.Patient.BirthDate.AddDate(-1, 0, 0) }, patient},
		{"unversioned patient, another sex", unversioned, func(d *derive.Derivation) { d.Patient.Sex = derive.SexFemale }, patient},
		{"versioned reading, another value", func(*derive.Derivation) {}, func(d *derive.Derivation) { d.Used[0].Readings[1].Value = 33 }, nil},
	} {
		t.Run(tc.name, func(t *testing.T) {
			a, b := fullDerivation(), fullDerivation()
			tc.before(&a)
			tc.before(&b)
			tc.change(&b)
			for _, v := range a.Values {
				ka, err := encode.ValueIdentity(a, v)
				if err != nil {
					t.Fatal(err)
				}
				kb, err := encode.ValueIdentity(b, valueOf(b, v.Code))
				if err != nil {
					t.Fatal(err)
				}
				if changed := ka.Key != kb.Key; changed != tc.keyChanged[v.Code] {
					t.Errorf("%s: key changed = %v, want %v", v.Code, changed, tc.keyChanged[v.Code])
				}
				if ka.Series != kb.Series {
					t.Errorf("%s: series changed", v.Code)
				}
			}
		})
	}
}
