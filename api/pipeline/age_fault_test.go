package pipeline_test

import (
	"fmt"
	"testing"

	"github.com/deadspace-fhir/deadspace/api/pipeline"
	"github.com/deadspace-fhir/deadspace/derive"
	"github.com/deadspace-fhir/deadspace/fhir/decode"
)

// A birth date is a calendar date where the patient lives; a person turns
// 18 on that date in local time (common practice: age in completed years on
// the local calendar). Here a blood gas is drawn at 22:00 on 9 March 2026
// in a unit at UTC−5, the evening before the patient's 18th birthday
// (born 2008-03-10): the patient is 17. The sample time is 03:00 UTC on
// 10 March, and the age is counted on the UTC calendar, so the patient is
// taken as 18: the ventilatory ratio (Sinha et al. studied "adult
// mechanically ventilated ICU patients", Br J Anaesth 2009;102:692, with the
// ARDS Network predicted body weight, an adult formula) and the regression
// estimate (derived in adults, from memory) are written for a minor, and
// the gradient is flagged against the adult range (Malley 2005). The same
// happens for any sample drawn in the evening before a birthday west of
// Greenwich (or the morning after one east of it). A clinician expects both
// adult indices withheld with patient-not-adult for a patient who is 17 at
// the bedside.
func TestAgeIsCountedOnTheLocalCalendarOfTheSample(t *testing.T) {
	t.Parallel()
	obs := func(id, code, at string, v float64, unit string) string {
		return fmt.Sprintf(`{"resourceType":"Observation","id":%q,"meta":{"versionId":"1"},"status":"final",
		"code":{"coding":[{"system":"http://loinc.org","code":%q}]},"subject":{"reference":"Patient/teen"},
		"effectiveDateTime":%q,"valueQuantity":{"value":%v,"unit":%q,"system":"http://unitsofmeasure.org","code":%q}}`,
			id, code, at, v, unit, unit)
	}
	lines := []string{
		`{"resourceType":"Patient","id":"teen","meta":{"versionId":"1"},"gender":"male","birthDate":"2008-03-10"}`,
		obs("height", "8302-2", "2026-01-05T10:00:00-05:00", 178, "cm"),
		obs("abg", "2019-8", "2026-03-09T22:00:00-05:00", 40, "mm[Hg]"),
	}
	for i, clock := range []string{"21:57:00", "21:59:00", "22:01:00", "22:03:00"} {
		at := "2026-03-09T" + clock + "-05:00"
		lines = append(lines,
			obs(fmt.Sprintf("et%d", i), "19891-1", at, 35, "mm[Hg]"),
			obs(fmt.Sprintf("rr%d", i), "9279-1", at, 18, "/min"),
			obs(fmt.Sprintf("ve%d", i), "76008-2", at, 8, "L/min"))
	}
	dec := decode.New(decode.Options{})
	col := pipeline.NewCollector()
	for _, line := range lines {
		if _, err := col.AddLine(dec, []byte(line)); err != nil {
			t.Fatalf("decode: %v", err)
		}
	}
	rep := finish(t, col)
	var d *derive.Derivation
	for _, r := range rep.Results {
		if r.Derivation != nil {
			d = r.Derivation
		}
	}
	if d == nil {
		t.Fatalf("no derivation: %+v", rep)
	}
	for _, c := range []derive.Code{derive.CodeVentilatoryRatio, derive.CodeEstimatedFraction} {
		for _, v := range d.Values {
			if v.Code == c {
				t.Errorf("%s %.3f written for a patient who is 17 at the bedside (born 2008-03-10, sampled 2026-03-09 22:00 at UTC−5)", c, v.Value)
			}
		}
		found := false
		for _, o := range rep.Values {
			if o.Code == c && o.Reason == derive.ReasonNotAdult {
				found = true
			}
		}
		if !found {
			t.Errorf("%s not withheld with %s", c, derive.ReasonNotAdult)
		}
	}
}
