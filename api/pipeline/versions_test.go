package pipeline_test

import (
	"fmt"
	"slices"
	"strings"
	"testing"

	"github.com/deadspace-fhir/deadspace/api/pipeline"
	"github.com/deadspace-fhir/deadspace/derive"
	"github.com/deadspace-fhir/deadspace/fhir/decode"
	"github.com/deadspace-fhir/deadspace/fhir/encode"
)

// versionLine is an Observation; meta is left out when both version and
// updated are empty.
func versionLine(id, version, updated, subject, status, code string, v float64, at string) string {
	var meta []string
	if version != "" {
		meta = append(meta, fmt.Sprintf(`"versionId":%q`, version))
	}
	if updated != "" {
		meta = append(meta, fmt.Sprintf(`"lastUpdated":%q`, updated))
	}
	m := ""
	if len(meta) > 0 {
		m = `"meta":{` + strings.Join(meta, ",") + `},`
	}
	return fmt.Sprintf(`{"resourceType":"Observation","id":%q,%s"status":%q,"code":{"coding":[{"system":"http://loinc.org","code":%q}]},`+
		`"subject":{"reference":%q},"effectiveDateTime":%q,"valueQuantity":{"value":%g,"unit":"mm[Hg]","system":"http://unitsofmeasure.org","code":"mm[Hg]"}}`,
		id, m, status, code, subject, at, v)
}

// replayed runs lines through a Collector in the given order and says,
// for each patient, which blood gases it derived and from what value,
// and the omissions of inputs.
func replayed(t *testing.T, lines []string) (derived []string, omitted []string) {
	t.Helper()
	dec := decode.New(decode.Options{})
	col := pipeline.NewCollector()
	for _, l := range lines {
		it, err := dec.Decode([]byte(l))
		if err != nil {
			t.Fatal(err)
		}
		col.Add(it)
	}
	rep := finish(t, col)
	for _, r := range rep.Results {
		if r.Derivation != nil {
			derived = append(derived, fmt.Sprintf("%s %s %g", r.Subject, r.Derivation.Gas.Ref, r.Derivation.Gas.Value))
		}
	}
	for _, o := range rep.Inputs {
		omitted = append(omitted, fmt.Sprintf("%s %s", o.Ref, o.Reason))
	}
	slices.Sort(derived)
	return derived, omitted
}

// TestTiedVersionsGiveOneAnswerInAnyOrder: versions of one resource with
// the same meta.lastUpdated and versionId (copies without meta) are
// ordered by the one version order's tie-break (fhir/ref Compare): an
// unusable version wins, then the content decides, across patients too,
// so the answer is the same in every order the versions are read in, and
// a gas tied under two patients is derived under one.
func TestTiedVersionsGiveOneAnswerInAnyOrder(t *testing.T) {
	const at, et = "2026-03-01T01:00:00Z", "2026-03-01T01:01:00Z"
	etco2 := func(subject string) string {
		return versionLine("et-"+strings.TrimPrefix(subject, "Patient/"), "1", "2026-03-01T01:02:00Z", subject, "final", "19891-1", 35, et)
	}
	for _, tc := range []struct {
		name     string
		versions []string
		want     []string // the blood gases derived, "subject ref value"
	}{
		{"withdrawal without meta wins", []string{
			versionLine("gas", "", "", "Patient/a", "final", "2019-8", 45, at),
			versionLine("gas", "", "", "Patient/a", "entered-in-error", "2019-8", 45, at),
		}, nil},
		{"cancelled with the same meta wins", []string{
			versionLine("gas", "2", "2026-03-01T01:30:00Z", "Patient/a", "final", "2019-8", 45, at),
			versionLine("gas", "2", "2026-03-01T01:30:00Z", "Patient/a", "cancelled", "2019-8", 45, at),
		}, nil},
		{"two values without meta: one of them", []string{
			versionLine("gas", "", "", "Patient/a", "final", "2019-8", 45, at),
			versionLine("gas", "", "", "Patient/a", "amended", "2019-8", 50, at),
		}, []string{"Patient/a Observation/gas 50"}},
		{"one gas under two patients: one of them", []string{
			versionLine("gas", "", "", "Patient/a", "final", "2019-8", 45, at),
			versionLine("gas", "", "", "Patient/b", "final", "2019-8", 45, at),
		}, []string{"Patient/b Observation/gas 45"}},
		{"one gas under three patients: one of them", []string{
			versionLine("gas", "7", "2026-03-01T01:30:00Z", "Patient/c", "final", "2019-8", 45, at),
			versionLine("gas", "7", "2026-03-01T01:30:00Z", "Patient/a", "final", "2019-8", 45, at),
			versionLine("gas", "7", "2026-03-01T01:30:00Z", "Patient/b", "final", "2019-8", 45, at),
		}, []string{"Patient/c Observation/gas/_history/7 45"}},
		{"withdrawn under one of two patients", []string{
			versionLine("gas", "", "", "Patient/b", "final", "2019-8", 45, at),
			versionLine("gas", "", "", "Patient/a", "entered-in-error", "2019-8", 45, at),
		}, nil},
	} {
		t.Run(tc.name, func(t *testing.T) {
			var first []string
			orders := permutations(len(tc.versions))
			for i, ord := range orders {
				lines := []string{etco2("Patient/a"), etco2("Patient/b"), etco2("Patient/c")}
				for _, k := range ord {
					lines = append(lines, tc.versions[k])
				}
				derived, omitted := replayed(t, lines)
				if i == 0 {
					first = omitted
					if fmt.Sprint(derived) != fmt.Sprint(tc.want) {
						t.Errorf("derived %q, want %q", derived, tc.want)
					}
					continue
				}
				if fmt.Sprint(derived) != fmt.Sprint(tc.want) || fmt.Sprint(omitted) != fmt.Sprint(first) {
					t.Errorf("order %v: derived %q, omitted %q; order %v: derived %q, omitted %q", ord, derived, omitted, orders[0], tc.want, first)
				}
			}
		})
	}
}

func permutations(n int) [][]int {
	if n == 0 {
		return [][]int{nil}
	}
	var out [][]int
	for _, p := range permutations(n - 1) {
		for i := 0; i <= len(p); i++ {
			q := append(append(append([]int(nil), p[:i]...), n-1), p[i:]...)
			out = append(out, q)
		}
	}
	return out
}

// TestTiedPatientsOrderedByTheirFacts: two versions of a Patient with the
// same meta (none) are ordered by their facts as the live store keeps
// them, the same way round whichever is read first.
func TestTiedPatientsOrderedByTheirFacts(t *testing.T) {
	dec := decode.New(decode.Options{})
	a, err := dec.Decode([]byte(`{"resourceType":"Patient","id":"p","gender":"male","birthDate":"1960-05-01"}`))
	if err != nil {
		t.Fatal(err)
	}
	b, err := dec.Decode([]byte(`{"resourceType":"Patient","id":"p","gender":"female","birthDate":"1990-01-01"}`))
	if err != nil {
		t.Fatal(err)
	}
	ab, ba := pipeline.ComparePatients(a, b), pipeline.ComparePatients(b, a)
	if ab == 0 || ab != -ba {
		t.Errorf("ComparePatients = %d one way, %d the other; want one newer", ab, ba)
	}
	if pipeline.ComparePatients(a, a) != 0 {
		t.Error("a Patient is not the same version as itself")
	}
}

// TestRecodedVersionSupersedesWhatWasReadBefore: a blood gas corrected to
// a code this service has no use for (glucose) is a version of its own
// once an earlier version of the resource was read, as the live engine
// stores it once it holds an earlier one: nothing is derived from the
// gas, and the re-coded version is listed with its reason. Read before
// any version of its resource, it is only an unrelated Observation, as
// in the live engine, which holds nothing to replace.
func TestRecodedVersionSupersedesWhatWasReadBefore(t *testing.T) {
	const at = "2026-03-01T01:00:00Z"
	gas := versionLine("z", "1", "2026-03-01T01:20:00Z", "Patient/a", "final", "2019-8", 45, at)
	glucose := strings.Replace(versionLine("z", "2", "2026-03-01T01:21:00Z", "Patient/a", "amended", "2345-7", 100, at), `"unit":"mm[Hg]"`, `"unit":"mg/dL"`, 1)
	et := versionLine("et", "1", "2026-03-01T01:02:00Z", "Patient/a", "final", "19891-1", 35, "2026-03-01T01:01:00Z")
	for _, tc := range []struct {
		name             string
		lines            []string
		wantDerived      int
		wantRecoded      bool
		wantUnrecognised int
	}{
		{"gas, then re-coded", []string{et, gas, glucose}, 0, true, 0},
		{"re-coded, then gas", []string{et, glucose, gas}, 1, false, 1},
		{"re-coded alone", []string{et, glucose}, 0, false, 1},
	} {
		t.Run(tc.name, func(t *testing.T) {
			dec := decode.New(decode.Options{})
			col := pipeline.NewCollector()
			for _, l := range tc.lines {
				if _, err := col.AddLine(dec, []byte(l)); err != nil {
					t.Fatal(err)
				}
			}
			rep := finish(t, col)
			derived := 0
			for _, r := range rep.Results {
				if r.Derivation != nil {
					derived++
				}
			}
			recoded := false
			for _, o := range rep.Inputs {
				if o.Reason == derive.ReasonRecoded && o.Ref == "Observation/z/_history/2" {
					recoded = true
				}
			}
			if derived != tc.wantDerived || recoded != tc.wantRecoded || rep.Unrecognised != tc.wantUnrecognised {
				t.Errorf("derived %d, re-coded listed %v, unrecognised %d; want %d, %v, %d (inputs left out: %+v)",
					derived, recoded, rep.Unrecognised, tc.wantDerived, tc.wantRecoded, tc.wantUnrecognised, rep.Inputs)
			}
		})
	}
}

// finish is col.Finish with the default derivation settings and encoder.
func finish(t *testing.T, col *pipeline.Collector) pipeline.Report {
	t.Helper()
	enc, err := encode.New(encode.DefaultOptions())
	if err != nil {
		t.Fatal(err)
	}
	rep, err := col.Finish(derive.DefaultConfig(), enc)
	if err != nil {
		t.Fatal(err)
	}
	return rep
}
