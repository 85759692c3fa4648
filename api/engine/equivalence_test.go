package engine_test

import (
	"context"
	"encoding/json"
	"errors"
	"fmt"
	"math/rand/v2"
	"strings"
	"testing"
	"time"

	"github.com/deadspace-fhir/deadspace/api/engine"
	"github.com/deadspace-fhir/deadspace/api/engine/enginetest"
	"github.com/deadspace-fhir/deadspace/api/store/boltstore"
	"github.com/deadspace-fhir/deadspace/derive"
	"github.com/deadspace-fhir/deadspace/fhir/bulk"
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

// deletionLine is a transaction Bundle of DELETE entries, as a bulk
// export's deleted file or a forwarded history has them, each deleted at
// at (response.lastModified).
func deletionLine(at time.Time, refs ...string) json.RawMessage {
	var entries []string
	for _, r := range refs {
		entries = append(entries, fmt.Sprintf(`{"request":{"method":"DELETE","url":"%s"},"response":{"status":"204","lastModified":"%s"}}`,
			r, at.UTC().Format(time.RFC3339Nano)))
	}
	return json.RawMessage(`{"resourceType":"Bundle","type":"transaction","entry":[` + strings.Join(entries, ",") + `]}`)
}

// equivalenceDeletions are deletions of the night's resources, each with
// its time: a blood gas deleted after its last version, an end-tidal
// reading paired with another gas, the re-filed blood gas (withdrawn under
// the patient it was re-filed to), a blood gas written again after it was
// deleted (the new version stands), one deleted at the instant of its only
// version (the version id decides: a deletion has none), a resource the
// stream never carries and a Patient (nothing to do).
func equivalenceDeletions(base time.Time) []json.RawMessage {
	at := func(m int) time.Time { return base.Add(time.Duration(m) * time.Minute) }
	up := func(at time.Time) time.Time { return at.Add(5 * time.Minute) }
	return []json.RawMessage{
		deletionLine(at(200), "Observation/eq1-gas0", "Observation/eq2-et91"),
		deletionLine(at(230), "https://ehr.example/fhir/Observation/eq3-gas2/_history/2"),
		deletionLine(at(100), "Observation/eq3-gas1"),
		obsOf("Patient/eq3", "eq3-gas1", "2", "amended", "2019-8", "mm[Hg]", 49, at(90), at(110)),
		deletionLine(up(at(150)), "Observation/eq2-gas2"),
		deletionLine(at(60), "Observation/eq-never-sent", "Patient/eq3"),
	}
}

// splitDeletions reads the Bundles of DELETE entries among resources as
// backfill reads them (bulk.ParseDeletions), adds their deletions to
// pending, and returns the other resources.
func splitDeletions(t *testing.T, resources []json.RawMessage, pending *[]engine.Deletion) (rest []json.RawMessage) {
	t.Helper()
	for _, raw := range resources {
		ds, err := bulk.ParseDeletions(raw)
		if errors.Is(err, bulk.ErrNotDeletions) {
			rest = append(rest, raw)
			continue
		}
		if err != nil {
			t.Fatal(err)
		}
		for _, d := range ds {
			*pending = append(*pending, engine.Deletion{Ref: d.Ref(), At: d.At, How: "a test's Bundle of DELETE entries lists it"})
		}
	}
	return rest
}

// TestReplayAndLiveAgree feeds one shuffled stream, with duplicates,
// corrections and deletions, to replay's path (Compute) and to the live
// engine in chunks (evaluating after each), and requires the same values
// with the same identifiers: one version order and one pipeline.
func TestReplayAndLiveAgree(t *testing.T) {
	base := time.Date(2026, 1, 10, 0, 0, 0, 0, time.UTC)
	for _, tc := range []struct {
		name   string
		stream []json.RawMessage
	}{
		{"corrections", equivalenceStream(base)},
		{"corrections and deletions", append(equivalenceStream(base), equivalenceDeletions(base)...)},
	} {
		t.Run(tc.name, func(t *testing.T) {
			stream := tc.stream
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
			var pending []engine.Deletion
			var applied engine.DeletionReceipt
			for from := 0; from < len(stream); from += 37 {
				resources := splitDeletions(t, stream[from:min(from+37, len(stream))], &pending)
				if len(resources) > 0 {
					if _, err := eng.Ingest(ctx, "test", resources); err != nil {
						t.Fatal(err)
					}
				}
				// The deletions go to the live service's path (as
				// backfill hands them over). One of a resource the
				// store does not hold yet does nothing: it is applied
				// again after the next chunk (a server that sends its
				// history again), so that the shuffled order cannot put
				// a deletion for ever before what it deletes.
				var still []engine.Deletion
				for _, d := range pending {
					rec, err := eng.Deleted(ctx, []engine.Deletion{d})
					if err != nil {
						t.Fatal(err)
					}
					if rec.NotHeld > 0 {
						still = append(still, d)
					}
					applied.Applied += rec.Applied
					applied.Older += rec.Older
				}
				pending = still
				if err := eng.EvaluateNow(ctx); err != nil {
					t.Fatal(err)
				}
			}
			if strings.Contains(tc.name, "deletions") && (applied.Applied == 0 || applied.Older == 0 || len(pending) == 0) {
				t.Fatalf("the live engine applied %d deletions, found %d older and %d never held: the stream should give each", applied.Applied, applied.Older, len(pending))
			}
			n := sameAsReplay(t, eng, stream, base, []string{"Patient/eq1", "Patient/eq2", "Patient/eq3"}, 0)
			if n < 10 {
				t.Fatalf("replay derived only %d values; the stream should give more", n)
			}
			t.Logf("%d values agree", n)
		})
	}
}
