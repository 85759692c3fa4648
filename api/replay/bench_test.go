package replay_test

import (
	"bufio"
	"context"
	"encoding/json"
	"fmt"
	"os"
	"path/filepath"
	"runtime"
	"testing"
	"time"

	"github.com/deadspace-fhir/deadspace/api/pipeline"
	"github.com/deadspace-fhir/deadspace/api/replay"
	"github.com/deadspace-fhir/deadspace/derive"
	"github.com/deadspace-fhir/deadspace/fhir/decode"
	"github.com/deadspace-fhir/deadspace/fhir/encode"
)

// exportLine renders one Observation the way a bulk export writes it. The
// shapes are generated for the benchmark; no value here is checked.
func exportLine(id, system, code, display, unit string, value float64, patient int, at time.Time) string {
	return fmt.Sprintf(`{"resourceType":"Observation","id":"%s","meta":{"versionId":"1","lastUpdated":"%s"},"status":"final",`+
		`"category":[{"coding":[{"system":"http://terminology.hl7.org/CodeSystem/observation-category","code":"vital-signs"}]}],`+
		`"code":{"coding":[{"system":"%s","code":"%s","display":"%s"}]},"subject":{"reference":"Patient/bench-%d"},`+
		`"encounter":{"reference":"Encounter/bench-enc-%d"},"effectiveDateTime":"%s",`+
		`"valueQuantity":{"value":%.1f,"unit":"%s","system":"http://unitsofmeasure.org","code":"%s"},`+
		`"device":{"reference":"Device/monitor-%d"}}`,
		id, at.Add(time.Minute).Format(time.RFC3339), system, code, display, patient, patient, at.Format(time.RFC3339), value, unit, unit, patient)
}

var unrelatedKinds = []struct{ code, display, unit string }{
	{"8867-4", "Heart rate", "/min"},
	{"59408-5", "Oxygen saturation in Arterial blood by Pulse oximetry", "%"},
	{"8462-4", "Diastolic blood pressure", "mm[Hg]"}, // body temperature (8310-5) is read now
	{"8480-6", "Systolic blood pressure", "mm[Hg]"},
	{"2345-7", "Glucose [Mass/volume] in Serum or Plasma", "mg/dL"},
}

var relevantKinds = []struct {
	code, display, unit string
	value               float64
}{
	{"19891-1", "Carbon dioxide [Partial pressure] in Exhaled gas --at end expiration", "mm[Hg]", 36},
	{"76222-9", "Tidal volume Ventilator --on ventilator", "mL", 480},
	{"19840-8", "Breath rate spontaneous and mechanical --on ventilator", "/min", 16},
	{"76008-2", "Expired minute Volume during Mechanical ventilation", "L/min", 7.7},
}

// writeExport writes n lines of which a fraction relevant are readings this
// service uses (with an arterial blood gas every 60 readings) and the rest
// unrelated vital signs.
func writeExport(tb testing.TB, n int, relevant float64) string {
	tb.Helper()
	path := filepath.Join(tb.TempDir(), "export.ndjson")
	f, err := os.Create(path)
	if err != nil {
		tb.Fatal(err)
	}
	w := bufio.NewWriter(f)
	start := time.Date(2026, 3, 14, 22, 0, 0, 0, time.UTC)
	var acc float64
	rel := 0
	for i := 0; i < n; i++ {
		patient := i % 20
		at := start.Add(time.Duration(i/20) * time.Minute)
		acc += relevant
		var line string
		if acc >= 1 {
			acc--
			k := relevantKinds[rel%len(relevantKinds)]
			line = exportLine(fmt.Sprintf("r%d", i), "http://loinc.org", k.code, k.display, k.unit, k.value, patient, at)
			if rel%60 == 59 {
				line = exportLine(fmt.Sprintf("g%d", i), "http://loinc.org", "2019-8", "Carbon dioxide [Partial pressure] in Arterial blood", "mm[Hg]", 41, patient, at)
			}
			rel++
		} else {
			k := unrelatedKinds[i%len(unrelatedKinds)]
			line = exportLine(fmt.Sprintf("u%d", i), "http://loinc.org", k.code, k.display, k.unit, 80, patient, at)
		}
		w.WriteString(line)
		w.WriteByte('\n')
	}
	if err := w.Flush(); err != nil {
		tb.Fatal(err)
	}
	if err := f.Close(); err != nil {
		tb.Fatal(err)
	}
	return path
}

// baseline decodes every line of the file with plain encoding/json into a
// generic map: what a reader that does not filter would do.
func baseline(tb testing.TB, path string) int {
	f, err := os.Open(path)
	if err != nil {
		tb.Fatal(err)
	}
	defer f.Close()
	s := bufio.NewScanner(f)
	s.Buffer(make([]byte, 1<<20), 1<<24)
	n := 0
	for s.Scan() {
		var m map[string]any
		if err := json.Unmarshal(s.Bytes(), &m); err != nil {
			tb.Fatal(err)
		}
		n++
	}
	return n
}

func replayOptions() replay.Options {
	enc := encode.DefaultOptions()
	enc.Issued = time.Date(2026, 3, 15, 7, 0, 0, 0, time.UTC)
	return replay.Options{Derive: derive.DefaultConfig(), Encode: enc}
}

// BenchmarkReplay runs the whole replay (read, decode, derive, encode) and
// the encoding/json baseline over the same file in the same iteration, and
// reports their ratio as x-vs-json (above 1 means replay is faster).
func BenchmarkReplay(b *testing.B) {
	for _, mix := range []struct {
		name     string
		relevant float64
	}{
		{"unrelated90", 0.10},
		{"allRelevant", 1.0},
	} {
		b.Run(mix.name, func(b *testing.B) {
			path := writeExport(b, 20000, mix.relevant)
			info, err := os.Stat(path)
			if err != nil {
				b.Fatal(err)
			}
			opts := replayOptions()
			var base, ours time.Duration
			b.SetBytes(info.Size())
			b.ResetTimer()
			for i := 0; i < b.N; i++ {
				t0 := time.Now()
				baseline(b, path)
				t1 := time.Now()
				out, err := replay.Run(context.Background(), opts, []string{path})
				t2 := time.Now()
				if err != nil || len(out.Skipped) > 0 {
					b.Fatalf("replay: %v, skipped %d", err, len(out.Skipped))
				}
				base += t1.Sub(t0)
				ours += t2.Sub(t1)
			}
			b.ReportMetric(float64(base)/float64(ours), "x-vs-json")
			b.ReportMetric(float64(ours.Nanoseconds())/float64(b.N)/20000, "ns/line")
		})
	}
}

// BenchmarkBufferedReadingMemory reports the heap a Collector retains per
// buffered reading after decoding an export of readings only.
func BenchmarkBufferedReadingMemory(b *testing.B) {
	const n = 50000
	path := writeExport(b, n, 1.0)
	data, err := os.ReadFile(path)
	if err != nil {
		b.Fatal(err)
	}
	var lines [][]byte
	for len(data) > 0 {
		i := 0
		for i < len(data) && data[i] != '\n' {
			i++
		}
		lines = append(lines, data[:i])
		if i < len(data) {
			i++
		}
		data = data[i:]
	}
	dec := decode.New(decode.Options{})
	var perReading float64
	for i := 0; i < b.N; i++ {
		var before, after runtime.MemStats
		runtime.GC()
		runtime.ReadMemStats(&before)
		col := pipeline.NewCollector()
		readings := 0
		for _, l := range lines {
			it, err := dec.Decode(l)
			if err != nil {
				b.Fatal(err)
			}
			if it.Type == decode.ItemReading {
				readings++
			}
			col.Add(it)
		}
		runtime.GC()
		runtime.ReadMemStats(&after)
		perReading = float64(after.HeapAlloc-before.HeapAlloc) / float64(readings)
		runtime.KeepAlive(col)
	}
	b.ReportMetric(perReading, "B/reading")
}
