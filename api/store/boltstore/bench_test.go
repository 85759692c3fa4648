package boltstore

import (
	"context"
	"fmt"
	"math/rand/v2"
	"os"
	"path/filepath"
	"testing"
	"time"

	bolt "go.etcd.io/bbolt"

	"github.com/deadspace-fhir/deadspace/api/store"
)

// benchPayload is the size assumed for the engine's encoding of one
// reading (value, original value and unit, conversion): a guess, since the
// engine's encoding is not fixed yet. Sizes scale the figures roughly
// linearly.
const benchPayload = 300

var benchStart = time.Date(2024, 3, 14, 0, 0, 0, 0, time.UTC)

// uuidLike makes server-assigned ids in the form Medplum uses (random
// UUIDs, as measured with @medplum/fhir-router 5.2.13): they land at random places in a
// patient's key range, the worst case for B+tree page fill.
func uuidLike(r *rand.Rand) string {
	return fmt.Sprintf("%08x-%04x-4%03x-8%03x-%012x", r.Uint32(), r.Uint32()&0xffff, r.Uint32()&0xfff, r.Uint32()&0xfff, r.Uint64()&0xffffffffffff)
}

// readings makes the inputs of one patient: kinds readings a minute for
// the given minutes, in time order.
func readings(r *rand.Rand, subject string, kinds, minutes int, sequential bool, next *int) []store.Input {
	payload := make([]byte, benchPayload)
	out := make([]store.Input, 0, kinds*minutes)
	for m := range minutes {
		at := benchStart.Add(time.Duration(m) * time.Minute)
		for range kinds {
			for i := range payload {
				payload[i] = byte('a' + r.IntN(26))
			}
			id := uuidLike(r)
			if sequential {
				*next++
				id = fmt.Sprint(*next)
			}
			out = append(out, store.Input{
				Subject: subject, Logical: "Observation/" + id, VersionID: "1",
				LastUpdated: at.Add(30 * time.Second), EffectiveAt: at, Payload: append([]byte(nil), payload...),
			})
		}
	}
	return out
}

func benchOpen(b *testing.B, noSync bool) (*Store, string) {
	b.Helper()
	path := filepath.Join(b.TempDir(), "deadspace.db")
	s, err := Open(path, Options{NoSync: noSync})
	if err != nil {
		b.Fatal(err)
	}
	b.Cleanup(func() { _ = s.Close() })
	return s, path
}

// fillPatients stores, for each of patients new patients, kinds readings a
// minute for the given minutes, in batches of 500, and returns the
// patients' subjects.
func fillPatients(b *testing.B, s *Store, r *rand.Rand, patients, kinds, minutes int) []string {
	b.Helper()
	var subjects []string
	var next int
	for range patients {
		subj := "Patient/" + uuidLike(r)
		subjects = append(subjects, subj)
		all := readings(r, subj, kinds, minutes, false, &next)
		for len(all) > 0 {
			k := min(500, len(all))
			if _, err := s.PutInputs(context.Background(), all[:k], benchStart); err != nil {
				b.Fatal(err)
			}
			all = all[k:]
		}
	}
	return subjects
}

// BenchmarkPutInputs measures durable writes (fsync on every commit), the
// path every polled or pushed reading takes.
func BenchmarkPutInputs(b *testing.B) {
	for _, batch := range []int{1, 50} {
		b.Run(fmt.Sprintf("batch=%d", batch), func(b *testing.B) {
			s, _ := benchOpen(b, false)
			r := rand.New(rand.NewPCG(1, 2))
			ctx := context.Background()
			var next int
			pool := readings(r, "Patient/"+uuidLike(r), 6, 1000, false, &next)
			n := 0
			for b.Loop() {
				in := make([]store.Input, batch)
				for i := range in {
					in[i] = pool[n%len(pool)]
					in[i].Logical = fmt.Sprintf("Observation/%d", n)
					n++
				}
				if _, err := s.PutInputs(ctx, in, benchStart); err != nil {
					b.Fatal(err)
				}
			}
			b.ReportMetric(float64(b.Elapsed().Nanoseconds())/float64(n), "ns/input")
		})
	}
}

// BenchmarkInputsScan reads one patient's six hours of minute readings of
// six kinds (2160 inputs) from a store holding ten such patients.
func BenchmarkInputsScan(b *testing.B) {
	s, _ := benchOpen(b, true)
	ctx := context.Background()
	subjects := fillPatients(b, s, rand.New(rand.NewPCG(3, 4)), 10, 6, 6*60)
	var got int
	for b.Loop() {
		ins, err := s.Inputs(ctx, subjects[3])
		if err != nil {
			b.Fatal(err)
		}
		got = len(ins)
	}
	if got != 2160 {
		b.Fatalf("scan returned %d inputs, want 2160", got)
	}
	b.ReportMetric(float64(got), "inputs/op")
}

// BenchmarkRetainedBytes fills a fresh store the way the service does
// (readings in time order, batches of 50, patients interleaved) and
// reports what stays on disk per stored input: file-B is the file size
// (bbolt grows it in 16 MB steps past 16 MB), used-B the pages up to the
// highest one in use (the file after compaction would be about this),
// live-B the bytes the B+trees hold (keys, values, page headers), so
// used-B/live-B is the cost of half-full pages and free pages. Sync is
// off: it changes timing only, not layout.
func BenchmarkRetainedBytes(b *testing.B) {
	for _, sequential := range []bool{false, true} {
		name := "ids=uuid"
		if sequential {
			name = "ids=sequential"
		}
		b.Run(name, func(b *testing.B) {
			const patients = 10
			var fileBytes, usedBytes, liveBytes, inputs float64
			for b.Loop() {
				s, path := benchOpen(b, true)
				r := rand.New(rand.NewPCG(5, 6))
				ctx := context.Background()
				var next int
				per := make([][]store.Input, patients)
				for p := range per {
					per[p] = readings(r, "Patient/"+uuidLike(r), 6, 6*60, sequential, &next)
				}
				var n int
				for off := 0; off < len(per[0]); off += 50 {
					for p := range per {
						chunk := per[p][off:min(off+50, len(per[p]))]
						if _, err := s.PutInputs(ctx, chunk, benchStart); err != nil {
							b.Fatal(err)
						}
						n += len(chunk)
					}
				}
				if err := s.db.View(func(tx *bolt.Tx) error {
					usedBytes = float64(tx.Size())
					liveBytes = 0
					return tx.ForEach(func(_ []byte, bk *bolt.Bucket) error {
						st := bk.Stats()
						liveBytes += float64(st.BranchInuse + st.LeafInuse + st.InlineBucketInuse)
						return nil
					})
				}); err != nil {
					b.Fatal(err)
				}
				if err := s.Close(); err != nil {
					b.Fatal(err)
				}
				fi, err := os.Stat(path)
				if err != nil {
					b.Fatal(err)
				}
				fileBytes, inputs = float64(fi.Size()), float64(n)
			}
			b.ReportMetric(fileBytes/inputs, "file-B/input")
			b.ReportMetric(usedBytes/inputs, "used-B/input")
			b.ReportMetric(liveBytes/inputs, "live-B/input")
			b.ReportMetric(benchPayload, "payload-B/input")
		})
	}
}

// BenchmarkInputsFromRecent reads the last 15 minutes of one patient (five
// kinds a minute, 75 inputs) from two stores of ten patients, one holding
// 1 hour and one 12 hours of such readings: what an incremental
// evaluation asks for. Each iteration reads from both, alternately, so
// that the ratio (12h/1h) compares the two under the same load; a range
// read that pays for the history before its range shows as a ratio well
// above 1.
func BenchmarkInputsFromRecent(b *testing.B) {
	ctx := context.Background()
	type history struct {
		s       *Store
		subject string
		from    time.Time
		spent   time.Duration
	}
	var hs []*history
	for i, hours := range []int{1, 12} {
		s, _ := benchOpen(b, true)
		subjects := fillPatients(b, s, rand.New(rand.NewPCG(7, uint64(i))), 10, 5, hours*60)
		hs = append(hs, &history{s: s, subject: subjects[3], from: benchStart.Add(time.Duration(hours)*time.Hour - 15*time.Minute)})
	}
	b.ReportAllocs() // per iteration: two reads
	n := 0
	for b.Loop() {
		for _, h := range hs {
			start := time.Now()
			ins, err := h.s.InputsFrom(ctx, h.subject, h.from)
			h.spent += time.Since(start)
			if err != nil {
				b.Fatal(err)
			}
			if len(ins) != 75 {
				b.Fatalf("range read returned %d inputs, want 75", len(ins))
			}
		}
		n++
	}
	b.ReportMetric(float64(hs[0].spent.Nanoseconds())/float64(n), "1h-ns/read")
	b.ReportMetric(float64(hs[1].spent.Nanoseconds())/float64(n), "12h-ns/read")
	b.ReportMetric(float64(hs[1].spent)/float64(hs[0].spent), "12h/1h")
}
