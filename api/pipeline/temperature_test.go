package pipeline_test

import (
	"math"
	"strings"
	"testing"

	"github.com/deadspace-fhir/deadspace/api/pipeline"
	"github.com/deadspace-fhir/deadspace/derive"
	"github.com/deadspace-fhir/deadspace/fhir/decode"
	"github.com/deadspace-fhir/deadspace/fhir/encode"
)

// Issue 8 rule 3, end to end from FHIR JSON: a blood gas that carries the
// patient's temperature as a component (LOINC 8310-5) has its 37 °C PaCO2
// brought to that temperature, with no separate temperature Observation.
func TestBloodGasCarriesThePatientsTemperatureAsAComponent(t *testing.T) {
	const gas = `{"resourceType":"Observation","id":"abg-1","meta":{"versionId":"2"},"status":"final",
	"code":{"coding":[{"system":"http://loinc.org","code":"2019-8"}]},"subject":{"reference":"Patient/p1"},
	"effectiveDateTime":"2025-03-01T10:15:00Z",
	"valueQuantity":{"value":40,"unit":"mmHg","system":"http://unitsofmeasure.org","code":"mm[Hg]"},
	"component":[{"code":{"coding":[{"system":"http://loinc.org","code":"8310-5","display":"Body temperature"}]},
	  "valueQuantity":{"value":33,"unit":"C","system":"http://unitsofmeasure.org","code":"Cel"}}]}`
	const etco2 = `{"resourceType":"Observation","id":"et-1","status":"final",
	"code":{"coding":[{"system":"http://loinc.org","code":"19891-1"}]},"subject":{"reference":"Patient/p1"},
	"effectiveDateTime":"2025-03-01T10:15:00Z",
	"valueQuantity":{"value":30,"unit":"mmHg","system":"http://unitsofmeasure.org","code":"mm[Hg]"}}`
	dec := decode.New(decode.Options{})
	col := pipeline.NewCollector()
	for _, line := range []string{gas, etco2} {
		it, err := dec.Decode([]byte(line))
		if err != nil || it.Type != decode.ItemReading {
			t.Fatalf("decode: %v, %+v", err, it)
		}
		col.Add(it)
	}
	enc, err := encode.New(encode.DefaultOptions())
	if err != nil {
		t.Fatal(err)
	}
	rep, err := col.Finish(derive.DefaultConfig(), enc)
	if err != nil {
		t.Fatal(err)
	}
	if len(rep.Results) != 1 || rep.Results[0].Derivation == nil {
		t.Fatalf("results %+v, want one derivation", rep.Results)
	}
	d := rep.Results[0].Derivation
	// J Appl Physiol 1965 temperature coefficient of blood PCO2 in vitro,
	// 0.019 per °C (as in derive's TestRuleTemperature): at 33 °C a PaCO2 of
	// 40 at 37 °C is 40 × 10^(0.019 × (33 − 37)), about 33.6 mm[Hg].
	want := 40 * math.Pow(10, 0.019*(33-37))
	if math.Abs(want-33.6) > 0.05 {
		t.Fatalf("own arithmetic %v, the 1965 coefficient gives about 33.6", want)
	}
	if math.Abs(d.PaCO2-want) > 1e-9 {
		t.Errorf("PaCO2 used %v, want %v (adjusted to the 33 °C on the blood gas)", d.PaCO2, want)
	}
	found := false
	for _, s := range d.Used {
		if s.Kind == derive.KindBodyTemperature {
			found = true
			if s.Median != 33 || len(s.Readings) != 1 || s.Readings[0].Ref != "Observation/abg-1/_history/2" ||
				!strings.Contains(s.Rule, "on the blood gas") {
				t.Errorf("temperature used %+v, want 33 °C citing Observation/abg-1/_history/2, from the blood gas", s)
			}
		}
	}
	if !found {
		t.Errorf("no body temperature among the inputs used: %+v", d.Used)
	}
}
