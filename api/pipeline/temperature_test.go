package pipeline_test

import (
	"math"
	"strings"
	"testing"

	"github.com/deadspace-fhir/deadspace/api/pipeline"
	"github.com/deadspace-fhir/deadspace/derive"
	"github.com/deadspace-fhir/deadspace/fhir/decode"
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
	rep := finish(t, col)
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

// Issue 8 leftover, end to end from FHIR JSON: an arterial blood gas panel
// (LOINC 24336-0) whose PaCO2 (2019-8) and the patient's temperature
// (8310-5) are components gives a blood gas like a lone PaCO2, and every
// value derived from it cites the panel's own version in derivedFrom.
func TestBloodGasPanelComponents(t *testing.T) {
	const gas = `{"resourceType":"Observation","id":"abg-panel-1","meta":{"versionId":"4"},"status":"final",
	"code":{"coding":[{"system":"http://loinc.org","code":"24336-0","display":"Gas panel - Arterial blood"}]},
	"subject":{"reference":"Patient/p1"},"effectiveDateTime":"2025-03-01T10:15:00Z",
	"component":[
	  {"code":{"coding":[{"system":"http://loinc.org","code":"2703-7"}]},"valueQuantity":{"value":85,"unit":"mmHg","system":"http://unitsofmeasure.org","code":"mm[Hg]"}},
	  {"code":{"coding":[{"system":"http://loinc.org","code":"2019-8"}]},"valueQuantity":{"value":40,"unit":"mmHg","system":"http://unitsofmeasure.org","code":"mm[Hg]"}},
	  {"code":{"coding":[{"system":"http://loinc.org","code":"8310-5"}]},"valueQuantity":{"value":33,"unit":"C","system":"http://unitsofmeasure.org","code":"Cel"}}]}`
	const etco2 = `{"resourceType":"Observation","id":"et-1","meta":{"versionId":"1"},"status":"final",
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
	rep := finish(t, col)
	if len(rep.Results) != 1 || rep.Results[0].Derivation == nil {
		t.Fatalf("results %+v, want one derivation", rep.Results)
	}
	const panelRef = "Observation/abg-panel-1/_history/4"
	d := rep.Results[0].Derivation
	// At 33 °C a PaCO2 of 40 at 37 °C is about 33.6 mm[Hg] (J Appl Physiol
	// 1965 coefficient 0.019 per °C, as in the test above).
	if d.Gas.Ref != panelRef || math.Abs(d.PaCO2-40*math.Pow(10, 0.019*(33-37))) > 1e-9 {
		t.Errorf("blood gas %s, PaCO2 used %v; want the panel %s adjusted to its 33 °C", d.Gas.Ref, d.PaCO2, panelRef)
	}
	obs := rep.Results[0].Bundle.Observations
	if len(obs) == 0 {
		t.Fatal("no derived Observations")
	}
	for _, o := range obs {
		cites := false
		for _, r := range o.DerivedFrom {
			cites = cites || (r.Reference != nil && *r.Reference == panelRef)
		}
		if !cites {
			t.Errorf("a derived Observation does not cite the panel %s in derivedFrom", panelRef)
		}
	}
}
