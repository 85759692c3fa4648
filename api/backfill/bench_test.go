package backfill_test

// Memory of a backfill: the peak live heap while reading, storing and
// deriving a generated export, for the same largest patient in exports of
// different sizes, and for a larger patient. Run:
//
//	go test -run XXX -bench BackfillMemory -benchtime 1x ./api/backfill
//
// The figures go in the README. No assertion is made on them here.

import (
	"bufio"
	"context"
	"fmt"
	"log/slog"
	"os"
	"path/filepath"
	"runtime"
	"runtime/metrics"
	"sync"
	"testing"
	"time"

	"github.com/deadspace-fhir/deadspace/api/backfill"
	"github.com/deadspace-fhir/deadspace/derive"
)

// writeExport writes an invented unit's NDJSON: each patient has a height,
// a blood gas every two hours and five ventilator/capnograph readings a
// minute (EtCO2, tidal volume, rate, minute volume, VCO2). The values are
// invented and plausible; this measures memory, not physiology.
func writeExport(b *testing.B, dir string, patients, hours int) (files []string, resources int) {
	b.Helper()
	start := time.Date(2026, 1, 5, 0, 0, 0, 0, time.UTC)
	pf, err := os.Create(filepath.Join(dir, "Patient.ndjson"))
	if err != nil {
		b.Fatal(err)
	}
	of, err := os.Create(filepath.Join(dir, "Observation.ndjson"))
	if err != nil {
		b.Fatal(err)
	}
	w := bufio.NewWriter(of)
	obs := func(id, subject, code, unit string, v float64, at time.Time) {
		fmt.Fprintf(w, `{"resourceType":"Observation","id":"%s","meta":{"versionId":"1","lastUpdated":"%s"},"status":"final",`+
			`"code":{"coding":[{"system":"http://loinc.org","code":"%s"}]},"subject":{"reference":"%s"},"effectiveDateTime":"%s",`+
			`"valueQuantity":{"value":%g,"unit":"%s","system":"http://unitsofmeasure.org","code":"%s"}}`+"\n",
			id, at.Format(time.RFC3339), code, subject, at.Format(time.RFC3339), v, unit, unit)
		resources++
	}
	for p := range patients {
		subject := fmt.Sprintf("Patient/p%d", p)
		fmt.Fprintf(pf, `{"resourceType":"Patient","id":"p%d","meta":{"versionId":"1","lastUpdated":"2026-01-01T00:00:00Z"},"gender":"female","birthDate":"1960-01-01"}`+"\n", p)
		resources++
		obs(fmt.Sprintf("p%d-h", p), subject, "8302-2", "cm", 170, start.Add(-time.Hour))
		for m := range hours * 60 {
			at := start.Add(time.Duration(m) * time.Minute)
			id := fmt.Sprintf("p%d-%d", p, m)
			obs(id+"-etco2", subject, "19891-1", "mm[Hg]", 34+float64(m%3), at)
			obs(id+"-vt", subject, "76222-9", "mL", 450+float64(m%7), at)
			obs(id+"-rr", subject, "19840-8", "/min", 18, at)
			obs(id+"-ve", subject, "76008-2", "L/min", 8.1, at)
			obs(id+"-vco2", subject, "60825-7", "mL/min", 220+float64(m%5), at)
			if m%120 == 60 {
				obs(id+"-abg", subject, "2019-8", "mm[Hg]", 42+float64(m%4), at)
			}
		}
	}
	if err := w.Flush(); err != nil {
		b.Fatal(err)
	}
	pf.Close()
	of.Close()
	return []string{pf.Name(), of.Name()}, resources
}

// peakHeap samples the live heap until stop is called and returns the
// largest value seen above the baseline taken at the start.
func peakHeap() (stop func() uint64) {
	runtime.GC()
	sample := []metrics.Sample{{Name: "/memory/classes/heap/objects:bytes"}}
	metrics.Read(sample)
	base := sample[0].Value.Uint64()
	var peak uint64
	done := make(chan struct{})
	var wg sync.WaitGroup
	wg.Add(1)
	go func() {
		defer wg.Done()
		s := []metrics.Sample{{Name: "/memory/classes/heap/objects:bytes"}}
		t := time.NewTicker(5 * time.Millisecond)
		defer t.Stop()
		for {
			metrics.Read(s)
			if v := s[0].Value.Uint64(); v > peak {
				peak = v
			}
			select {
			case <-done:
				return
			case <-t.C:
			}
		}
	}()
	return func() uint64 {
		close(done)
		wg.Wait()
		if peak < base {
			return 0
		}
		return peak - base
	}
}

func BenchmarkBackfillMemory(b *testing.B) {
	cases := []struct {
		name            string
		patients, hours int
	}{
		{"1 patient x 24h", 1, 24},
		{"8 patients x 24h", 8, 24},
		{"32 patients x 24h", 32, 24},
		{"1 patient x 192h", 1, 192},
	}
	for _, tc := range cases {
		b.Run(tc.name, func(b *testing.B) {
			dir := b.TempDir()
			files, n := writeExport(b, dir, tc.patients, tc.hours)
			var size int64
			for _, f := range files {
				fi, _ := os.Stat(f)
				size += fi.Size()
			}
			b.ResetTimer()
			for range b.N {
				stop := peakHeap()
				sum, err := backfill.Run(context.Background(), backfill.Options{
					Derive: derive.DefaultConfig(), Encode: encOptions(), Files: files, DryRun: true,
					Logger: slog.New(slog.DiscardHandler),
				})
				peak := stop()
				if err != nil {
					b.Fatal(err)
				}
				if sum.Derived["final"] == 0 {
					b.Fatal("nothing derived")
				}
				b.ReportMetric(float64(peak)/(1<<20), "peak-heap-MiB")
				b.ReportMetric(float64(n), "resources")
				b.ReportMetric(float64(size)/(1<<20), "export-MiB")
			}
		})
	}
}
