package derive_test

import (
	"encoding/binary"
	"math"
	"reflect"
	"slices"
	"testing"
	"time"

	"github.com/deadspace-fhir/deadspace/derive"
)

// fractionCodes are the values that must lie in [0, 1).
var fractionCodes = []derive.Code{
	derive.CodeAlveolarFraction, derive.CodePhysiologic, derive.CodeAirwayFraction, derive.CodeEstimatedFraction,
}

// decodeReadings turns fuzz bytes into readings: 11 bytes each, a kind, a
// signed offset in seconds (int16, so ±9 h around the gas) and a float64
// value taken bit for bit, so NaN, infinities and negative zero all occur.
func decodeReadings(data []byte) []derive.Reading {
	var rs []derive.Reading
	for len(data) >= 11 {
		k := derive.Kind(data[0] % 12) // includes KindUnknown and one past the last kind
		off := int16(binary.LittleEndian.Uint16(data[1:3]))
		v := math.Float64frombits(binary.LittleEndian.Uint64(data[3:11]))
		rs = append(rs, rd(k, time.Duration(off)*time.Second, v))
		data = data[11:]
	}
	return sortByTime(rs)
}

func encodeReading(k derive.Kind, offSeconds int16, v float64) []byte {
	b := []byte{byte(k)}
	b = binary.LittleEndian.AppendUint16(b, uint16(offSeconds))
	return binary.LittleEndian.AppendUint64(b, math.Float64bits(v))
}

func FuzzDerive(f *testing.F) {
	seed := slices.Concat(
		encodeReading(derive.KindEtCO2, -60, 35), encodeReading(derive.KindMixedExpiredCO2, 0, 28),
		encodeReading(derive.KindTidalVolume, 10, 500), encodeReading(derive.KindMinuteVolume, 20, 7),
		encodeReading(derive.KindRespRate, 30, 14), encodeReading(derive.KindHeight, -3600, 175),
		encodeReading(derive.KindVCO2, 0, 200),
	)
	f.Add(seed, 40.0, uint8(1), int64(60))
	f.Add(encodeReading(derive.KindEtCO2, 0, 44), 40.0, uint8(2), int64(30))
	f.Add(encodeReading(derive.KindEtCO2, 0, math.NaN()), math.Inf(1), uint8(0), int64(-1))
	f.Add(slices.Concat(encodeReading(derive.KindVCO2, 0, 2000), encodeReading(derive.KindMinuteVolume, 0, 0.5)), 5.0, uint8(1), int64(200))
	f.Fuzz(func(t *testing.T, data []byte, paco2 float64, sex uint8, ageYears int64) {
		readings := decodeReadings(data)
		p := derive.Patient{Sex: derive.Sex(sex % 3)}
		if ageYears >= 0 && ageYears < 150 {
			p.BirthDate = sampleTime.AddDate(-int(ageYears), 0, 0)
		}
		d := derive.Derive(derive.DefaultConfig(), gasOf(paco2), p, readings)
		checkAccounts(t, d)
		for _, v := range d.Values {
			lo := 0.0
			if v.Code == derive.CodeAlveolarFraction {
				lo = derive.AlveolarFractionFloor // reported negative, with a warning
			}
			if slices.Contains(fractionCodes, v.Code) && !(v.Value >= lo && v.Value < 1) {
				t.Errorf("%s = %v, outside [%v, 1)", v.Code, v.Value, lo)
			}
			for _, x := range v.Terms {
				if math.IsNaN(x.Value) || math.IsInf(x.Value, 0) {
					t.Errorf("%s term %s = %v", v.Code, x.Name, x.Value)
				}
			}
		}
		for _, s := range d.Used {
			if len(s.Readings) == 0 || math.IsNaN(s.Median) {
				t.Errorf("summary %+v", s)
			}
			for _, r := range s.Readings {
				if ok, _, _ := derive.Plausible(r.Kind, r.Value); !ok || r.Kind != s.Kind {
					t.Errorf("summary of %s uses %+v", s.Kind, r)
				}
			}
		}
		if again := derive.Derive(derive.DefaultConfig(), gasOf(paco2), p, readings); !reflect.DeepEqual(d, again) {
			t.Errorf("not deterministic")
		}
	})
}

// FuzzDetectFalls checks the finding invariants and the prefix property on
// arbitrary series.
func FuzzDetectFalls(f *testing.F) {
	var seed []byte
	for i := range 40 {
		v := 38.0
		if i >= 20 && i < 30 {
			v = 20
		}
		seed = append(seed, encodeReading(derive.KindEtCO2, int16(i*60), v)...)
	}
	f.Add(seed)
	var rise []byte // a rise, then charting every 5 min
	for i := range 40 {
		v := 20.0
		if i >= 20 {
			v = 38
		}
		rise = append(rise, encodeReading(derive.KindEtCO2, int16(i*300), v)...)
	}
	f.Add(rise)
	var further []byte // a rise never recovered, then a fall to near zero
	for i := range 60 {
		v := 38.0
		switch {
		case i >= 40:
			v = 1
		case i >= 20:
			v = 52
		}
		further = append(further, encodeReading(derive.KindEtCO2, int16(i*60), v)...)
	}
	f.Add(further)
	f.Fuzz(func(t *testing.T, data []byte) {
		series := decodeReadings(data)
		cfg := derive.DefaultConfig().Fall
		full := derive.DetectFalls(cfg, series)
		for i, x := range full {
			wrongSign := (x.Rise && !(x.Change > 0)) || (!x.Rise && !(x.Change < 0))
			// A finding that took the place of an open episode is judged
			// against that episode's level, which may hold only the
			// readings that confirmed it.
			least := cfg.MinBaselineReadings
			if i > 0 {
				if end, ongoing := derive.EpisodeEnd(cfg, full[i-1], series); !ongoing && end.Equal(x.Onset) {
					least = min(least, cfg.MinEpisodeReadings)
				}
			}
			if wrongSign || x.Confirmed.Sub(x.Onset) < cfg.Sustain || len(x.BaselineReadings) < least ||
				len(x.EpisodeReadings) < cfg.MinEpisodeReadings {
				t.Errorf("finding %+v", x)
			}
		}
		checkEpisodeEnds(t, cfg, series, full)
		for n := 1; n <= len(series); n++ {
			// The prefix property holds between instants: readings that
			// share one are judged together (a median over them), so a
			// cut among them is not a series the detector ever sees
			// complete.
			if n < len(series) && series[n].AtMillis == series[n-1].AtMillis {
				continue
			}
			assertPrefix(t, cfg, series, full, n)
		}
	})
}
