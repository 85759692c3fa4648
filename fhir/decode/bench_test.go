package decode

import (
	"encoding/json"
	"fmt"
	"math/rand/v2"
	"testing"
)

// Benchmark lines imitate a bulk Observation export: an ICU's vital signs
// and laboratory values, with the ventilator, capnograph and blood-gas
// values this service reads mixed in. Codes of the unrelated lines are
// common LOINC codes (heart rate 8867-4, SpO2 59408-5, temperature 8310-5,
// potassium 2823-3, sodium 2951-2, haemoglobin 718-7, lactate 2524-7,
// glucose 2345-7, PaO2 2703-7; from memory), units UCUM.

type benchCode struct {
	system, code, display, category, unit string
	lo, hi                                float64
}

var unrelatedCodes = []benchCode{
	{"http://loinc.org", "8867-4", "Heart rate", "vital-signs", "/min", 50, 130},
	{"http://loinc.org", "59408-5", "Oxygen saturation in Arterial blood by Pulse oximetry", "vital-signs", "%", 88, 100},
	{"http://loinc.org", "8480-6", "Systolic blood pressure", "vital-signs", "mm[Hg]", 90, 160}, // body temperature (8310-5) is now read
	{"http://loinc.org", "2823-3", "Potassium [Moles/volume] in Serum or Plasma", "laboratory", "mmol/L", 3.2, 5.4},
	{"http://loinc.org", "2951-2", "Sodium [Moles/volume] in Serum or Plasma", "laboratory", "mmol/L", 130, 148},
	{"http://loinc.org", "718-7", "Hemoglobin [Mass/volume] in Blood", "laboratory", "g/dL", 7, 15},
	{"http://loinc.org", "2524-7", "Lactate [Moles/volume] in Serum or Plasma", "laboratory", "mmol/L", 0.6, 6},
	{"http://loinc.org", "2345-7", "Glucose [Mass/volume] in Serum or Plasma", "laboratory", "mg/dL", 70, 250},
	{"http://loinc.org", "2703-7", "Oxygen [Partial pressure] in Arterial blood", "laboratory", "mm[Hg]", 60, 180},
}

var relevantCodes = []benchCode{
	{"http://loinc.org", "2019-8", "Carbon dioxide [Partial pressure] in Arterial blood", "laboratory", "mm[Hg]", 30, 70},
	{"urn:iso:std:iso:11073:10101", "151708", "MDC_AWAY_CO2_ET", "procedure", "mm[Hg]", 25, 50},
	{"http://loinc.org", "19891-1", "Carbon dioxide [Partial pressure] in Exhaled gas --at end expiration", "procedure", "mm[Hg]", 25, 50},
	{"http://loinc.org", "76007-4", "Tidal volume expired Respiratory system airway --on ventilator", "procedure", "mL", 300, 600},
	{"http://loinc.org", "19840-8", "Breath rate spontaneous and mechanical --on ventilator", "procedure", "/min", 10, 30},
	{"http://loinc.org", "76008-2", "Expired minute Volume during Mechanical ventilation", "procedure", "L/min", 5, 14},
}

func benchLine(rng *rand.Rand, n int, c benchCode) []byte {
	v := c.lo + rng.Float64()*(c.hi-c.lo)
	min := n % 60
	return fmt.Appendf(nil, `{"resourceType":"Observation","id":"%08x-4e1c-4b7a-9d2f-%012x","meta":{"versionId":"%d","lastUpdated":"2025-03-01T10:%02d:%02d.%03dZ"},`+
		`"identifier":[{"system":"urn:oid:1.2.840.114350.1.13.0.1.7.2.798268","value":"OBS-%09d"}],"status":"final",`+
		`"category":[{"coding":[{"system":"http://terminology.hl7.org/CodeSystem/observation-category","code":"%s"}]}],`+
		`"code":{"coding":[{"system":"%s","code":"%s","display":"%s"}]},`+
		`"subject":{"reference":"Patient/pt-%06d"},"encounter":{"reference":"Encounter/enc-%06d"},`+
		`"effectiveDateTime":"2025-03-01T10:%02d:00+01:00","issued":"2025-03-01T10:%02d:30+01:00",`+
		`"valueQuantity":{"value":%.1f,"unit":"%s","system":"http://unitsofmeasure.org","code":"%s"},`+
		`"referenceRange":[{"low":{"value":%.1f,"unit":"%s"},"high":{"value":%.1f,"unit":"%s"}}]}`,
		rng.Uint32(), rng.Uint64()&0xffffffffffff, 1+n%3, min, n%60, n%1000, n, c.category,
		c.system, c.code, c.display, n%500, n%2000, min, min,
		v, c.unit, c.unit, c.lo, c.unit, c.hi, c.unit)
}

// benchLines returns n lines, of which every tenth is relevant when
// unrelated90 is set, and all otherwise.
func benchLines(n int, unrelated90 bool) [][]byte {
	rng := rand.New(rand.NewPCG(1, 2))
	out := make([][]byte, n)
	for i := range out {
		if unrelated90 && i%10 != 0 {
			out[i] = benchLine(rng, i, unrelatedCodes[i%len(unrelatedCodes)])
		} else {
			out[i] = benchLine(rng, i, relevantCodes[i%len(relevantCodes)])
		}
	}
	return out
}

// The benchmark lines are what they claim to be.
func TestBenchLines(t *testing.T) {
	d := New(Options{})
	for _, mix := range []struct {
		name        string
		unrelated90 bool
		wantRelated int
	}{{"Unrelated90", true, 100}, {"AllRelevant", false, 1000}} {
		t.Run(mix.name, func(t *testing.T) {
			related := 0
			for _, l := range benchLines(1000, mix.unrelated90) {
				if len(l) < 600 || len(l) > 900 {
					t.Fatalf("line of %d bytes, want 600–900: %s", len(l), l)
				}
				it, err := d.Decode(l)
				if err != nil {
					t.Fatal(err)
				}
				switch it.Type {
				case ItemReading:
					related++
				case ItemUnrelated:
				default:
					t.Fatalf("line decoded as %v %+v: %s", it.Type, it.Omission, l)
				}
			}
			if related != mix.wantRelated {
				t.Errorf("%d readings, want %d", related, mix.wantRelated)
			}
		})
	}
}

var sink any

func runBench(b *testing.B, lines [][]byte, f func([]byte)) {
	total := 0
	for _, l := range lines {
		total += len(l)
	}
	b.SetBytes(int64(total / len(lines)))
	b.ReportAllocs()
	i := 0
	for b.Loop() {
		f(lines[i%len(lines)])
		i++
	}
}

func BenchmarkBaseline_JSONMap(b *testing.B) {
	for _, mix := range []struct {
		name        string
		unrelated90 bool
	}{{"Unrelated90", true}, {"AllRelevant", false}} {
		b.Run(mix.name, func(b *testing.B) {
			runBench(b, benchLines(1000, mix.unrelated90), func(l []byte) {
				var m map[string]any
				if err := json.Unmarshal(l, &m); err != nil {
					b.Fatal(err)
				}
				sink = m
			})
		})
	}
}

func benchDecode(b *testing.B, unrelated90 bool) {
	d := New(Options{})
	runBench(b, benchLines(1000, unrelated90), func(l []byte) {
		it, err := d.Decode(l)
		if err != nil {
			b.Fatal(err)
		}
		sink = it.Type
	})
}

func BenchmarkDecode_Unrelated90(b *testing.B) { benchDecode(b, true) }
func BenchmarkDecode_AllRelevant(b *testing.B) { benchDecode(b, false) }
