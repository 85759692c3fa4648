package encode

import (
	"crypto/sha256"
	"encoding/hex"
	"fmt"
	"strings"
	"testing"
	"time"

	"github.com/deadspace-fhir/deadspace/derive"
)

// The identifiers as they were computed before hashInput, a string per
// field and a slice of readings per value (with each input cited as
// citation cites it): the identifiers are stored and written to the
// server, so the faster code must give the same ones and the same errors.

func oldDigest(scheme string, fields ...string) (string, error) {
	h := sha256.New()
	for _, f := range append([]string{scheme}, fields...) {
		if err := noNewline(f); err != nil {
			return "", fmt.Errorf("identity field: %w", err)
		}
		h.Write([]byte(f))
		h.Write([]byte{'\n'})
	}
	return hashPrefix + hex.EncodeToString(h.Sum(nil)), nil
}

func oldValueKey(code derive.Code, refs []string) (string, error) {
	if _, ok := precisions[code]; !ok {
		return "", fmt.Errorf("unknown code %q", code)
	}
	fields := []string{"algorithm=" + derive.AlgorithmVersion, "code=" + string(code)}
	for _, r := range sortedUnique(refs) {
		fields = append(fields, "input="+r)
	}
	return oldDigest("deadspace value key 1", fields...)
}

func oldValueReadings(d derive.Derivation, v derive.Value) ([]derive.Reading, error) {
	if _, err := cited(d.Gas.Ref, "Observation"); err != nil {
		return nil, fmt.Errorf("blood gas: %w", err)
	}
	out := []derive.Reading{d.Gas}
	for _, k := range v.Inputs {
		if k == derive.KindPaCO2 {
			continue
		}
		found := false
		for _, s := range d.Used {
			if s.Kind != k {
				continue
			}
			found = true
			for _, r := range s.Readings {
				if _, err := cited(r.Ref, "Observation"); err != nil {
					return nil, fmt.Errorf("%s input %s: %w", v.Code, k, err)
				}
				out = append(out, r)
			}
		}
		if !found {
			return nil, fmt.Errorf("%s cites input %s, but the derivation has no summary of it", v.Code, k)
		}
	}
	return out, nil
}

func oldValueIdentity(d derive.Derivation, v derive.Value) (Identity, error) {
	gas, err := cited(d.Gas.Ref, "Observation")
	if err != nil {
		return Identity{}, fmt.Errorf("blood gas: %w", err)
	}
	used, err := oldValueReadings(d, v)
	if err != nil {
		return Identity{}, err
	}
	refs := make([]string, 0, len(used)+1)
	for _, r := range used {
		refs = append(refs, citation(r))
	}
	if v.UsesPatient {
		p, err := cited(d.Patient.Ref, "Patient")
		if err != nil {
			return Identity{}, fmt.Errorf("%s uses the patient: %w", v.Code, err)
		}
		refs = append(refs, patientCitation(p, d.Patient))
	}
	key, err := oldValueKey(v.Code, refs)
	if err != nil {
		return Identity{}, err
	}
	if _, ok := precisions[v.Code]; !ok {
		return Identity{}, fmt.Errorf("unknown code %q", v.Code)
	}
	series, err := oldDigest("deadspace value series 1", "code="+string(v.Code), "gas="+gas.Logical())
	if err != nil {
		return Identity{}, err
	}
	return Identity{Key: key, Series: series}, nil
}

// logical parses s and requires an unversioned relative reference of type
// typ, as the encoder did before it took absolute subjects.
func logical(s, typ string) (ref, error) {
	r, err := parseRef(s)
	if err != nil {
		return ref{}, err
	}
	if r.Type != typ || r.Version != "" {
		return ref{}, fmt.Errorf("reference %q: want an unversioned %s/id", s, typ)
	}
	return r, nil
}

func oldFallIdentity(subject string, f derive.Fall) (Identity, error) {
	s, err := logical(subject, "Patient")
	if err != nil {
		return Identity{}, fmt.Errorf("subject: %w", err)
	}
	used, err := fallReadings(f)
	if err != nil {
		return Identity{}, err
	}
	refs := make([]string, 0, len(used))
	for _, r := range used {
		refs = append(refs, citation(r))
	}
	key, err := oldValueKey(EpisodeCode(f), refs)
	if err != nil {
		return Identity{}, err
	}
	if f.Onset.IsZero() {
		return Identity{}, fmt.Errorf("fall has no onset time")
	}
	series, err := oldDigest("deadspace fall series 1", "code="+string(EpisodeCode(f)),
		"subject="+s.String(), "onset="+f.Onset.UTC().Format(time.RFC3339Nano))
	if err != nil {
		return Identity{}, err
	}
	return Identity{Key: key, Series: series}, nil
}

func errText(err error) string {
	if err == nil {
		return ""
	}
	return err.Error()
}

// identityDerivation is a derivation whose references are refs: the gas,
// then readings of each kind in turn, then the patient.
func identityDerivation(refs []string) (derive.Derivation, []derive.Value) {
	kinds := []derive.Kind{derive.KindEtCO2, derive.KindVCO2, derive.KindMinuteVolume, derive.KindTidalVolume, derive.KindRespRate}
	d := derive.Derivation{Gas: derive.Reading{Ref: "Observation/abg/_history/1", Kind: derive.KindPaCO2}, Patient: derive.Patient{Ref: "Patient/p/_history/2"}}
	if len(refs) > 0 {
		d.Gas.Ref, refs = refs[0], refs[1:]
	}
	if len(refs) > 0 {
		d.Patient.Ref, refs = refs[len(refs)-1], refs[:len(refs)-1]
	}
	for i, k := range kinds {
		s := derive.Summary{Kind: k}
		for j, r := range refs {
			if j%len(kinds) == i {
				s.Readings = append(s.Readings, derive.Reading{Ref: r, Kind: k})
			}
		}
		d.Used = append(d.Used, s)
	}
	values := []derive.Value{
		{Code: derive.CodeGradient, Inputs: []derive.Kind{derive.KindPaCO2, derive.KindEtCO2}},
		{Code: derive.CodePhysiologic, Inputs: []derive.Kind{derive.KindPaCO2, derive.KindVCO2, derive.KindMinuteVolume}},
		{Code: derive.CodeVentilatoryRatio, Inputs: []derive.Kind{derive.KindPaCO2, derive.KindMinuteVolume, derive.KindTidalVolume}, UsesPatient: true},
		{Code: derive.CodeEstimatedFraction, Inputs: []derive.Kind{derive.KindPaCO2, derive.KindEtCO2, derive.KindRespRate}, UsesPatient: true},
		{Code: derive.CodeAirwayFraction, Inputs: []derive.Kind{derive.KindEtCO2, derive.KindHeight}},
		{Code: "no-such-code", Inputs: []derive.Kind{derive.KindPaCO2}},
	}
	return d, values
}

func compareIdentities(t *testing.T, refs []string) {
	t.Helper()
	d, values := identityDerivation(refs)
	for _, v := range values {
		got, gerr := ValueIdentity(d, v)
		want, werr := oldValueIdentity(d, v)
		if got != want || errText(gerr) != errText(werr) {
			t.Errorf("ValueIdentity(%q, %s) = %+v, %v; before %+v, %v", refs, v.Code, got, gerr, want, werr)
		}
	}
	var readings []derive.Reading
	for _, r := range refs {
		readings = append(readings, derive.Reading{Ref: r})
	}
	half := len(readings) / 2
	subject := "Patient/p"
	if len(refs) > 0 {
		subject = refs[0]
	}
	for _, f := range []derive.Fall{
		{Onset: time.Date(2025, 3, 1, 11, 0, 0, 0, time.UTC), BaselineReadings: readings[:half], EpisodeReadings: readings[half:]},
		{Onset: time.Date(2025, 3, 1, 11, 0, 0, 0, time.UTC), BaselineReadings: readings[:half], EpisodeReadings: readings[half:], Rise: true},
		{BaselineReadings: readings[:half], EpisodeReadings: readings[half:]},
	} {
		for _, s := range []string{"Patient/p", subject} {
			got, gerr := FallIdentity(s, f)
			want, werr := oldFallIdentity(s, f)
			if got != want || errText(gerr) != errText(werr) {
				t.Errorf("FallIdentity(%q, %q) = %+v, %v; before %+v, %v", s, refs, got, gerr, want, werr)
			}
		}
	}
}

// TestIdentityAsBefore: the identifiers and their errors are those of the
// string-per-field computation, for plain, repeated, unversioned and
// malformed references, and references holding a line break.
func TestIdentityAsBefore(t *testing.T) {
	for _, tc := range []struct {
		name string
		refs []string
	}{
		{"none", nil},
		{"plain", []string{"Observation/g/_history/1", "Observation/e1/_history/1", "Observation/v1/_history/2", "Observation/m1/_history/1",
			"Observation/t1/_history/1", "Observation/r1/_history/1", "Observation/e2/_history/1", "Patient/p/_history/3"}},
		{"repeated", []string{"Observation/g/_history/1", "Observation/e1/_history/1", "Observation/e1/_history/1", "Observation/e1/_history/1",
			"Observation/e1/_history/1", "Observation/e1/_history/1", "Observation/e1/_history/1", "Patient/p"}},
		{"unversioned", []string{"Observation/g", "Observation/e1", "Patient/p"}},
		{"malformed gas", []string{"Obs/g", "Observation/e1/_history/1", "Patient/p/_history/1"}},
		{"malformed reading", []string{"Observation/g/_history/1", "Observation/e 1", "Patient/p/_history/1"}},
		{"patient not a patient", []string{"Observation/g/_history/1", "Observation/e1/_history/1", "Observation/p/_history/1"}},
		{"line break", []string{"Observation/g/_history/1", "Observation/e1\n/_history/1", "Patient/p/_history/1"}},
		{"many", strings.Fields(strings.Repeat("Observation/x/_history/1 Observation/y/_history/2 Observation/z/_history/3 ", 30))},
	} {
		t.Run(tc.name, func(t *testing.T) { compareIdentities(t, tc.refs) })
	}
}

// FuzzIdentityAgainstOld holds ValueIdentity and FallIdentity to the
// string-per-field computation for any references.
func FuzzIdentityAgainstOld(f *testing.F) {
	f.Add("Observation/g/_history/1 Observation/e1/_history/1 Observation/v/_history/2 Patient/p/_history/3")
	f.Add("Observation/g Observation/e1 Patient/p")
	f.Add("Observation/g/_history/1 Observation/e\r1 Patient/p")
	f.Fuzz(func(t *testing.T, s string) {
		compareIdentities(t, strings.Split(s, " "))
	})
}

// BenchmarkValueIdentity computes the identifiers of a derivation's nine
// values, as every evaluation does, with the string-per-field computation
// as the baseline in the same run.
func BenchmarkValueIdentity(b *testing.B) {
	var refs []string
	refs = append(refs, "Observation/abg-123/_history/1")
	for i := range 12 {
		refs = append(refs, fmt.Sprintf("Observation/r-%d-%d/_history/1", i, i*7))
	}
	refs = append(refs, "Patient/bench-1/_history/1")
	d, values := identityDerivation(refs)
	values = values[:4]
	for _, bc := range []struct {
		name string
		f    func(derive.Derivation, derive.Value) (Identity, error)
	}{{"baseline=string-per-field", oldValueIdentity}, {"hash-input", ValueIdentity}} {
		b.Run(bc.name, func(b *testing.B) {
			b.ReportAllocs()
			for b.Loop() {
				for _, v := range values {
					if _, err := bc.f(d, v); err != nil {
						b.Fatal(err)
					}
				}
			}
		})
	}
}
