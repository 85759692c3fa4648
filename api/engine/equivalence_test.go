package engine_test

import (
	"context"
	"encoding/json"
	"fmt"
	"math/rand/v2"
	"testing"
	"time"

	"github.com/deadspace-fhir/deadspace/api/engine"
	"github.com/deadspace-fhir/deadspace/api/engine/enginetest"
	"github.com/deadspace-fhir/deadspace/api/store/boltstore"
	"github.com/deadspace-fhir/deadspace/derive"
	"github.com/deadspace-fhir/deadspace/fhir/decode"
	"github.com/deadspace-fhir/deadspace/fhir/encode"
)

func obsOf(subject, id, version, status, code, unit string, v float64, at, updated time.Time) json.RawMessage {
	return json.RawMessage(fmt.Sprintf(`{"resourceType":"Observation","id":"%s","meta":{"versionId":"%s","lastUpdated":"%s"},"status":"%s",`+
		`"code":{"coding":[{"system":"http://loinc.org","code":"%s"}]},"subject":{"reference":"%s"},"effectiveDateTime":"%s",`+
		`"valueQuantity":{"value":%g,"unit":"%s","system":"http://unitsofmeasure.org","code":"%s"}}`,
		id, version, updated.UTC().Format(time.RFC3339Nano), status, code, subject, at.UTC().Format(time.RFC3339), v, unit, unit))
}

// equivalenceStream is three patients' night: end-tidal CO2 every minute
// (one patient's falling), three blood gases each, and corrections: an
// amended blood gas, a withdrawn one, a blood gas re-filed to another
// patient, an amended reading, with versions differing only in
// nanoseconds and in version ids past 64 bits. The values are arbitrary:
// the test compares two code paths, not clinical results.
func equivalenceStream(base time.Time) []json.RawMessage {
	var out []json.RawMessage
	up := func(at time.Time) time.Time { return at.Add(5 * time.Minute) }
	for p := 1; p <= 3; p++ {
		subj := fmt.Sprintf("Patient/eq%d", p)
		for m := range 180 {
			at := base.Add(time.Duration(m) * time.Minute)
			v := 36 + float64(m%5)/2
			if p == 2 && m >= 120 {
				v = 24 + float64(m%3)/2
			}
			out = append(out, obsOf(subj, fmt.Sprintf("eq%d-et%d", p, m), "1", "final", "19891-1", "mm[Hg]", v, at, up(at)))
		}
		for g, m := range []int{30, 90, 150} {
			at := base.Add(time.Duration(m) * time.Minute)
			out = append(out, obsOf(subj, fmt.Sprintf("eq%d-gas%d", p, g), "1", "final", "2019-8", "mm[Hg]", 44+float64(g), at, up(at)))
		}
	}
	at := func(m int) time.Time { return base.Add(time.Duration(m) * time.Minute) }
	out = append(out,
		// Two amendments one nanosecond apart: the later time wins, though
		// its version id is the smaller (a millisecond clock would pick
		// the other).
		obsOf("Patient/eq1", "eq1-gas1", "3", "amended", "2019-8", "mm[Hg]", 50, at(90), up(at(90)).Add(time.Hour)),
		obsOf("Patient/eq1", "eq1-gas1", "2", "amended", "2019-8", "mm[Hg]", 51, at(90), up(at(90)).Add(time.Hour+time.Nanosecond)),
		// Withdrawn.
		obsOf("Patient/eq2", "eq2-gas0", "2", "entered-in-error", "2019-8", "mm[Hg]", 44, at(30), up(at(30)).Add(time.Hour)),
		// Re-filed to another patient.
		obsOf("Patient/eq1", "eq3-gas2", "2", "amended", "2019-8", "mm[Hg]", 47, at(150), up(at(150)).Add(time.Hour)),
		// Equal times: the version id past 64 bits is the newer.
		obsOf("Patient/eq1", "eq1-et30", "18446744073709551616", "amended", "19891-1", "mm[Hg]", 30, at(30), up(at(30)).Add(time.Hour)),
		obsOf("Patient/eq1", "eq1-et30", "18446744073709551615", "amended", "19891-1", "mm[Hg]", 31, at(30), up(at(30)).Add(time.Hour)),
	)
	return out
}

type derivedValue struct {
	key   string
	value float64
}

func valuesOfObservations(t *testing.T, raws []json.RawMessage) map[string]derivedValue {
	t.Helper()
	opts := encode.DefaultOptions()
	out := map[string]derivedValue{}
	for _, raw := range raws {
		var o struct {
			Status        string
			Identifier    []struct{ System, Value string }
			ValueQuantity *struct{ Value float64 }
		}
		if err := json.Unmarshal(raw, &o); err != nil {
			t.Fatal(err)
		}
		if o.Status == "entered-in-error" {
			continue
		}
		var series string
		var v derivedValue
		for _, id := range o.Identifier {
			switch id.System {
			case opts.IdentifierSystem:
				v.key = id.Value
			case opts.SeriesSystem:
				series = id.Value
			}
		}
		if o.ValueQuantity != nil {
			v.value = o.ValueQuantity.Value
		}
		if _, dup := out[series]; dup {
			t.Fatalf("series %s twice", series)
		}
		out[series] = v
	}
	return out
}

// TestReplayAndLiveAgree feeds one shuffled stream, with duplicates and
// corrections, to replay's path (Compute) and to the live engine in
// chunks (evaluating after each), and requires the same values with the
// same identifiers: one version order and one pipeline.
func TestReplayAndLiveAgree(t *testing.T) {
	base := time.Date(2026, 1, 10, 0, 0, 0, 0, time.UTC)
	stream := equivalenceStream(base)
	rng := rand.New(rand.NewPCG(9, 9))
	for i := range len(stream) / 10 {
		stream = append(stream, stream[i*7%len(stream)])
	}
	rng.Shuffle(len(stream), func(i, j int) { stream[i], stream[j] = stream[j], stream[i] })

	st := enginetest.OpenStore(t, boltstore.Options{NoSync: true})
	enc := enginetest.Encoder(t)
	eng, err := engine.New(engine.Config{
		Store: st, Decoder: decode.New(decode.Options{}), Encoder: enc, Derive: derive.DefaultConfig(),
		Now: func() time.Time { return base.Add(4 * time.Hour) },
	})
	if err != nil {
		t.Fatal(err)
	}
	ctx := context.Background()
	for from := 0; from < len(stream); from += 37 {
		if _, err := eng.Ingest(ctx, "test", stream[from:min(from+37, len(stream))]); err != nil {
			t.Fatal(err)
		}
		if err := eng.EvaluateNow(ctx); err != nil {
			t.Fatal(err)
		}
	}
	n := sameAsReplay(t, eng, stream, base, []string{"Patient/eq1", "Patient/eq2", "Patient/eq3"}, 0)
	if n < 10 {
		t.Fatalf("replay derived only %d values; the stream should give more", n)
	}
	t.Logf("%d values agree", n)
}
