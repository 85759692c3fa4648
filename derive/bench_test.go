package derive_test

import (
	"testing"
	"time"

	"github.com/deadspace-fhir/deadspace/derive"
)

// BenchmarkDerive pairs one gas with a monitored patient's buffer: six
// hours of minute readings of six kinds, the gas in the middle.
func BenchmarkDerive(b *testing.B) {
	kinds := []struct {
		k derive.Kind
		v float64
	}{
		{derive.KindEtCO2, 35}, {derive.KindMixedExpiredCO2, 28}, {derive.KindVCO2, 200},
		{derive.KindTidalVolume, 500}, {derive.KindMinuteVolume, 7}, {derive.KindRespRate, 14},
	}
	readings := []derive.Reading{rd(derive.KindHeight, -4*time.Hour, 175)}
	for m := -180; m < 180; m++ {
		for i, k := range kinds {
			readings = append(readings, rd(k.k, time.Duration(m)*time.Minute+time.Duration(i)*time.Second, k.v+float64(m%3)))
		}
	}
	cfg := derive.DefaultConfig()
	gas := gasOf(40)
	b.ReportAllocs()
	for b.Loop() {
		d := derive.Derive(cfg, gas, man60, readings)
		if len(d.Values) == 0 {
			b.Fatal("no values")
		}
	}
}

// BenchmarkDetectFalls runs the detector over six hours of one-second
// EtCO2 readings, the worst a streaming caller re-runs on each arrival.
func BenchmarkDetectFalls(b *testing.B) {
	var series []derive.Reading
	for s := range 6 * 3600 {
		v := 38.0 + float64(s%5)
		if s/600%10 == 9 {
			v = 20
		}
		series = append(series, rd(derive.KindEtCO2, time.Duration(s)*time.Second, v))
	}
	cfg := derive.DefaultConfig().Fall
	b.ReportAllocs()
	for b.Loop() {
		if len(derive.DetectFalls(cfg, series)) == 0 {
			b.Fatal("no falls")
		}
	}
}
