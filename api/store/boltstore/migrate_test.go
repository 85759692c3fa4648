package boltstore

import (
	"bytes"
	"cmp"
	"encoding/binary"
	"errors"
	"fmt"
	"io"
	"log/slog"
	"math/rand/v2"
	"path/filepath"
	"slices"
	"strings"
	"testing"
	"time"

	bolt "go.etcd.io/bbolt"

	"github.com/deadspace-fhir/deadspace/api/store"
)

// The buckets of the schemas before 4, in the order they were added.
var (
	schema1Buckets = []string{"meta", "inputs", "inputs_by_time", "patients", "dirty", "ledger",
		"ledger_by_subj", "ledger_by_time", "ledger_by_key", "outbox", "dead", "cursors", "subscriptions", "feed"}
	schema2Buckets = append(slices.Clone(schema1Buckets), "input_owner")
	schema3Buckets = append(slices.Clone(schema2Buckets), "results", "results_by_time", "ledger_versions", "ledger_expiry")
)

// oldInput is one input of an old file: stored under Subject, and the
// latest version of its Logical when owner is set.
type oldInput struct {
	store.Input
	owner bool
}

// writeOldStore writes a file as a build of the given schema (1, 2 or 3)
// left it, byte by byte here rather than through this build's codec, so
// that the test keeps the old file's bytes whatever later schemas change:
// inputs under subject 0 logical (version, last updated, effective time,
// each time as kind 1 (UTC) or 2 (offset), seconds and nanoseconds, then
// the payload) and the index t(EffectiveAt) ⧺ subject 0 logical.
func writeOldStore(t testing.TB, path string, schema uint64, inputs []oldInput) {
	t.Helper()
	names := map[uint64][]string{1: schema1Buckets, 2: schema2Buckets, 3: schema3Buckets}[schema]
	db, err := bolt.Open(path, 0o600, &bolt.Options{Timeout: time.Second})
	if err != nil {
		t.Fatal(err)
	}
	defer db.Close()
	oldTime := func(b []byte, at time.Time) []byte {
		if _, off := at.Zone(); off == 0 {
			b = append(b, 1)
		} else {
			b = binary.AppendVarint(append(b, 2), int64(off))
		}
		b = binary.AppendVarint(b, at.Unix())
		return binary.AppendUvarint(b, uint64(at.Nanosecond()))
	}
	err = db.Update(func(tx *bolt.Tx) error {
		for _, name := range names {
			if _, err := tx.CreateBucket([]byte(name)); err != nil {
				return err
			}
		}
		if err := tx.Bucket([]byte("meta")).Put([]byte("schema"), binary.BigEndian.AppendUint64(nil, schema)); err != nil {
			return err
		}
		for _, in := range inputs {
			key := append([]byte(in.Subject+"\x00"), in.Logical...)
			v := binary.AppendUvarint(nil, uint64(len(in.VersionID)))
			v = append(v, in.VersionID...)
			v = oldTime(v, in.LastUpdated)
			v = oldTime(v, in.EffectiveAt)
			v = append(v, in.Payload...)
			if err := tx.Bucket([]byte("inputs")).Put(key, v); err != nil {
				return err
			}
			tk := binary.BigEndian.AppendUint64(nil, uint64(in.EffectiveAt.Unix())^(1<<63))
			tk = binary.BigEndian.AppendUint32(tk, uint32(in.EffectiveAt.Nanosecond()))
			if err := tx.Bucket([]byte("inputs_by_time")).Put(append(tk, key...), nil); err != nil {
				return err
			}
			if in.owner && schema >= 2 {
				if err := tx.Bucket([]byte("input_owner")).Put([]byte(in.Logical), []byte(in.Subject)); err != nil {
					return err
				}
			}
		}
		return nil
	})
	if err != nil {
		t.Fatal(err)
	}
}

// oldInputs are three patients' inputs: times before 1970, equal times, a
// height a year ahead, an offset other than UTC, and an input re-filed
// from Patient/a to Patient/b (the withdrawal under a, the latest under b).
func oldInputs() []oldInput {
	t0 := time.Date(2026, 3, 14, 2, 0, 0, 0, time.UTC)
	in := func(subject, logical, version string, at time.Time, payload string) oldInput {
		return oldInput{Input: store.Input{Subject: subject, Logical: logical, VersionID: version,
			LastUpdated: t0.Add(time.Hour), EffectiveAt: at, Payload: []byte(payload)}, owner: true}
	}
	var out []oldInput
	for i := range 40 {
		// Ids in the opposite order to the times, as random ids may be.
		out = append(out, in("Patient/a", fmt.Sprintf("Observation/a%02d", 40-i), "1", t0.Add(time.Duration(i)*time.Minute), fmt.Sprintf("reading %d", i)))
	}
	out = append(out,
		in("Patient/a", "Observation/same1", "3", t0.Add(5*time.Minute), "same time"),
		in("Patient/a", "Observation/1969", "1", time.Unix(0, 0).UTC().Add(-time.Second), "before 1970"),
		in("Patient/a", "Observation/1950", "1", time.Date(1950, 1, 1, 0, 0, 0, 0, time.UTC), "1950"),
		in("Patient/a", "Observation/height", "1", t0.AddDate(1, 0, 0), "height, a year ahead"),
		in("Patient/a", "Observation/offset", "2", t0.Add(90*time.Second).In(time.FixedZone("", -4*3600)), "UTC-4"),
		in("Patient/b", "Observation/b1", "1", t0.Add(-time.Hour), "b1"),
		in("Patient/b", "Observation/b2", "1", t0, "b2"),
		in("Patient/b", "Observation/refiled", "2", t0.Add(10*time.Minute), "latest, on b"),
		in("Patient/c", "Observation/c1", "1", t0, "c1"),
	)
	withdrawn := in("Patient/a", "Observation/refiled", "2", t0.Add(10*time.Minute), "withdrawn from a")
	withdrawn.owner = false
	return append(out, withdrawn)
}

func describeInput(in store.Input) string {
	return fmt.Sprintf("%s v%s eff %s lu %s %q", in.Logical, in.VersionID,
		in.EffectiveAt.Format(time.RFC3339Nano), in.LastUpdated.Format(time.RFC3339Nano), in.Payload)
}

// checkMovedInputs compares what the store returns with the old file's
// inputs, whole and from each stored time on.
func checkMovedInputs(t *testing.T, s *Store, old []oldInput) {
	t.Helper()
	bySubject := map[string][]store.Input{}
	for _, in := range old {
		bySubject[in.Subject] = append(bySubject[in.Subject], in.Input)
	}
	for subject, want := range bySubject {
		slices.SortFunc(want, func(a, b store.Input) int {
			return cmp.Or(a.EffectiveAt.Compare(b.EffectiveAt), strings.Compare(a.Logical, b.Logical))
		})
		for _, from := range append([]time.Time{{}}, func() []time.Time {
			var ts []time.Time
			for _, in := range want {
				ts = append(ts, in.EffectiveAt, in.EffectiveAt.Add(time.Nanosecond))
			}
			return ts
		}()...) {
			got, err := s.InputsFrom(t.Context(), subject, from)
			if err != nil {
				t.Fatal(err)
			}
			var have, wanted []string
			for _, in := range got {
				have = append(have, describeInput(in))
			}
			for _, in := range want {
				if !in.EffectiveAt.Before(from) {
					wanted = append(wanted, describeInput(in))
				}
			}
			if !slices.Equal(have, wanted) {
				t.Errorf("%s from %v after the move:\n%s\nwant\n%s", subject, from, strings.Join(have, "\n"), strings.Join(wanted, "\n"))
			}
		}
		for _, in := range want {
			got, err := s.Input(t.Context(), subject, in.Logical)
			if err != nil || describeInput(got) != describeInput(in) {
				t.Errorf("Input(%s, %s) = %s, %v; want %s", subject, in.Logical, describeInput(got), err, describeInput(in))
			}
		}
	}
	if err := s.db.View(checkConsistent); err != nil {
		t.Error(err)
	}
	var schema uint64
	must(t, s.db.View(func(tx *bolt.Tx) error { schema = getU64(tx.Bucket(bMeta), kSchema); return nil }))
	if schema != schemaVersion {
		t.Errorf("schema %d after the move, want %d", schema, schemaVersion)
	}
}

// openMigrated opens the old file at path twice. The first Open must
// migrate it, with log lines that hold each of wantLog and name no patient
// or resource, and leave it holding old (checkMovedInputs); the second must
// log nothing and find the same. It returns the store of the second Open,
// closed when the test ends.
func openMigrated(t *testing.T, path string, old []oldInput, wantLog ...string) *Store {
	t.Helper()
	var logs bytes.Buffer
	s, err := Open(path, Options{Logger: slog.New(slog.NewTextHandler(&logs, nil))})
	must(t, err)
	checkMovedInputs(t, s, old)
	text := logs.String()
	for _, want := range wantLog {
		if !strings.Contains(text, want) {
			t.Errorf("the migration's log lacks %q:\n%s", want, text)
		}
	}
	if strings.Contains(text, "Patient/") || strings.Contains(text, "Observation/") {
		t.Errorf("the migration's log names a patient or a resource:\n%s", text)
	}
	must(t, s.Close())

	logs.Reset()
	s, err = Open(path, Options{Logger: slog.New(slog.NewTextHandler(&logs, nil))})
	must(t, err)
	t.Cleanup(func() { s.Close() })
	if logs.Len() != 0 {
		t.Errorf("a second Open logged:\n%s", logs.String())
	}
	checkMovedInputs(t, s, old)
	return s
}

func must(t *testing.T, err error) {
	t.Helper()
	if err != nil {
		t.Fatal(err)
	}
}

// A file written in the layout of schema 3 (inputs keyed by logical
// reference) opens with its inputs moved into their time order, once, in
// several transactions with a progress line after each that carries
// counts only; a second Open moves nothing and logs nothing.
func TestSchema3InputsMoveIntoTimeOrder(t *testing.T) {
	defer func(batch int, every time.Duration) { moveBatch, moveReportEvery = batch, every }(moveBatch, moveReportEvery)
	moveBatch, moveReportEvery = 2, 0 // each patient is a batch of its own

	path := filepath.Join(t.TempDir(), "deadspace.db")
	old := oldInputs()
	writeOldStore(t, path, 3, old)
	s := openMigrated(t, path, old,
		fmt.Sprintf("moving inputs into their time order (schema 4), once\" inputs=%d", len(old)),
		"moved=", // a progress line between batches
		fmt.Sprintf("inputs moved\" inputs=%d", len(old)))
	if got, err := s.Owner(t.Context(), "Observation/refiled"); err != nil || got != "Patient/b" {
		t.Errorf("Owner of the re-filed input = %q, %v; want Patient/b", got, err)
	}

	// The moved rows are the store's rows: a newer version moves one in
	// time, and Prune removes what is before its horizon.
	t0 := time.Date(2026, 3, 14, 2, 0, 0, 0, time.UTC)
	_, err := s.PutInputs(t.Context(), []store.Input{{Subject: "Patient/a", Logical: "Observation/a40", VersionID: "2",
		LastUpdated: t0.Add(2 * time.Hour), EffectiveAt: t0.Add(-2 * time.Hour), Payload: []byte("moved earlier")}}, t0)
	must(t, err)
	n, err := s.Prune(t.Context(), t0.Add(-time.Hour))
	must(t, err)
	if n != 3 { // 1950, 1969 and the version moved earlier
		t.Errorf("Prune after the move = %d, want 3", n)
	}
	if err := s.db.View(checkConsistent); err != nil {
		t.Error(err)
	}
}

// A move cut short (here after its first batch) carries on at the next
// Open; the file says schema 4 from the first batch on, so an older build
// refuses it rather than reading half the inputs.
func TestSchema4MoveResumes(t *testing.T) {
	path := filepath.Join(t.TempDir(), "deadspace.db")
	old := oldInputs()
	writeOldStore(t, path, 3, old)
	db, err := bolt.Open(path, 0o600, &bolt.Options{Timeout: time.Second})
	must(t, err)
	must(t, db.Update(func(tx *bolt.Tx) error { return migrate(tx, 3) }))
	must(t, db.Update(func(tx *bolt.Tx) error {
		n, done, err := moveInputBatch(tx, 1)
		if err == nil && (done || n != 40+6) {
			err = fmt.Errorf("first batch moved %d inputs (done %v), want Patient/a's 46", n, done)
		}
		return err
	}))
	must(t, db.Close())

	s, err := Open(path, Options{Logger: slog.New(slog.NewTextHandler(io.Discard, nil))})
	must(t, err)
	defer s.Close()
	checkMovedInputs(t, s, old)
}

// Schemas 1 and 2 move as well, after the owner index of schema 2 is
// built from the old inputs.
func TestSchemaOneMigratesTheOwnerIndex(t *testing.T) {
	path := filepath.Join(t.TempDir(), "deadspace.db")
	old := oldInputs()
	writeOldStore(t, path, 1, old)
	s, err := Open(path, Options{Logger: slog.New(slog.NewTextHandler(io.Discard, nil))})
	must(t, err)
	defer s.Close()
	checkMovedInputs(t, s, old)
	for logical, want := range map[string]string{"Observation/a01": "Patient/a", "Observation/c1": "Patient/c"} {
		if got, err := s.Owner(t.Context(), logical); err != nil || got != want {
			t.Errorf("Owner(%s) after migration = %q, %v; want %s", logical, got, err, want)
		}
	}
	if _, err := s.Owner(t.Context(), "Observation/none"); !errors.Is(err, store.ErrNotFound) {
		t.Errorf("Owner of an unknown input: %v, want ErrNotFound", err)
	}
}

// An old file without its inputs bucket is damage, not an empty store.
func TestOldSchemaWithoutInputsRefused(t *testing.T) {
	path := filepath.Join(t.TempDir(), "deadspace.db")
	writeOldStore(t, path, 3, nil)
	db, err := bolt.Open(path, 0o600, &bolt.Options{Timeout: time.Second})
	must(t, err)
	must(t, db.Update(func(tx *bolt.Tx) error { return tx.DeleteBucket([]byte("inputs")) }))
	must(t, db.Close())
	s, err := Open(path, Options{})
	if err == nil {
		s.Close()
		t.Fatal("opened a schema-3 file without its inputs")
	}
	if !errors.Is(err, ErrCorrupt) {
		t.Errorf("err = %v, want ErrCorrupt", err)
	}
}

// BenchmarkMoveInputs times the move of schema 4 at Open for a schema-3
// file of ten patients with six hours of minute readings of six kinds
// (21,600 inputs, payloads of benchPayload bytes, Medplum-style ids).
func BenchmarkMoveInputs(b *testing.B) {
	benchMigration(b, func(path string, old []oldInput) { writeOldStore(b, path, 3, old) })
}

// BenchmarkMergePlaces times the merge of schema 5 at Open for a file of
// schema 4 with the same inputs as BenchmarkMoveInputs.
func BenchmarkMergePlaces(b *testing.B) {
	benchMigration(b, func(path string, old []oldInput) { writeSchema4Store(b, path, old, len(old)) })
}

// benchMigration times Open of the file write leaves, per input.
func benchMigration(b *testing.B, write func(path string, old []oldInput)) {
	r := rand.New(rand.NewPCG(9, 10))
	var old []oldInput
	var next int
	for range 10 {
		for _, in := range readings(r, "Patient/"+uuidLike(r), 6, 6*60, false, &next) {
			old = append(old, oldInput{Input: in, owner: true})
		}
	}
	quiet := slog.New(slog.NewTextHandler(io.Discard, nil))
	for b.Loop() {
		b.StopTimer()
		path := filepath.Join(b.TempDir(), "deadspace.db")
		write(path, old)
		b.StartTimer()
		s, err := Open(path, Options{Logger: quiet})
		if err != nil {
			b.Fatal(err)
		}
		b.StopTimer()
		if err := s.Close(); err != nil {
			b.Fatal(err)
		}
		b.StartTimer()
	}
	b.ReportMetric(float64(b.Elapsed().Nanoseconds())/float64(b.N*len(old)), "ns/input")
}

// writeSchema4Store writes a file as a build of schema 4 left it: the
// inputs in input_rows, found through input_at and input_owner. The first
// moved inputs are in that layout and the rest still in the inputs bucket
// of schema 3, as a move of schema 4 cut short leaves them (moved ==
// len(inputs): the move was complete and the old buckets are gone). The
// row record is this build's: schema 5 left it as it was.
func writeSchema4Store(t testing.TB, path string, inputs []oldInput, moved int) {
	t.Helper()
	writeOldStore(t, path, 3, inputs[moved:])
	db, err := bolt.Open(path, 0o600, &bolt.Options{Timeout: time.Second})
	if err != nil {
		t.Fatal(err)
	}
	defer db.Close()
	err = db.Update(func(tx *bolt.Tx) error {
		rows, err := tx.CreateBucket([]byte("input_rows"))
		if err != nil {
			return err
		}
		at, err := tx.CreateBucket([]byte("input_at"))
		if err != nil {
			return err
		}
		owner := tx.Bucket([]byte("input_owner"))
		for _, in := range inputs[:moved] {
			prefix := []byte(in.Subject + "\x00")
			tk := binary.BigEndian.AppendUint64(nil, uint64(in.EffectiveAt.Unix())^(1<<63))
			tk = binary.BigEndian.AppendUint32(tk, uint32(in.EffectiveAt.Nanosecond()))
			if err := rows.Put(append(append(bytes.Clone(prefix), tk...), in.Logical...), encodeInput(in.Input)); err != nil {
				return err
			}
			if err := at.Put(append(prefix, in.Logical...), tk); err != nil {
				return err
			}
			if in.owner {
				if err := owner.Put([]byte(in.Logical), []byte(in.Subject)); err != nil {
					return err
				}
			}
		}
		if moved == len(inputs) {
			for _, name := range []string{"inputs", "inputs_by_time"} {
				if err := tx.DeleteBucket([]byte(name)); err != nil {
					return err
				}
			}
		}
		return tx.Bucket([]byte("meta")).Put([]byte("schema"), binary.BigEndian.AppendUint64(nil, 4))
	})
	if err != nil {
		t.Fatal(err)
	}
}

// A file of schema 4 opens with input_at and input_owner merged into
// input_place, in batches with a progress line that carries counts only,
// whether its own move of schema 4 was complete or cut short; the owners,
// the re-filed input's among them, are kept, and a second Open moves
// nothing.
func TestSchema4IndexesMergeIntoPlaces(t *testing.T) {
	defer func(batch int, every time.Duration) { moveBatch, moveReportEvery = batch, every }(moveBatch, moveReportEvery)
	moveBatch, moveReportEvery = 7, 0
	old := oldInputs()
	for _, c := range []struct {
		name  string
		moved int
	}{
		{"move of schema 4 complete", len(old)},
		{"move of schema 4 cut short", 30},
		{"nothing moved yet", 0},
	} {
		t.Run(c.name, func(t *testing.T) {
			path := filepath.Join(t.TempDir(), "deadspace.db")
			writeSchema4Store(t, path, old, c.moved)
			var wantLog []string
			if c.moved > 0 {
				wantLog = append(wantLog, fmt.Sprintf("input indexes merged\" inputs=%d", c.moved))
			}
			s := openMigrated(t, path, old, wantLog...)
			for logical, want := range map[string]string{"Observation/refiled": "Patient/b", "Observation/a01": "Patient/a", "Observation/c1": "Patient/c"} {
				if got, err := s.Owner(t.Context(), logical); err != nil || got != want {
					t.Errorf("Owner(%s) = %q, %v; want %s", logical, got, err, want)
				}
			}

			// The merged places are the store's: a newer version of the
			// re-filed input back under Patient/a withdraws b's copy, and
			// Prune drops the rows before its horizon and their places.
			t0 := time.Date(2026, 3, 14, 2, 0, 0, 0, time.UTC)
			res, err := s.PutInputs(t.Context(), []store.Input{{Subject: "Patient/a", Logical: "Observation/refiled", VersionID: "3",
				LastUpdated: t0.Add(2 * time.Hour), EffectiveAt: t0.Add(11 * time.Minute), Payload: []byte("back on a"), Withdrawal: []byte("withdrawn from b")}}, t0)
			must(t, err)
			if res[0] != store.PutMoved {
				t.Errorf("re-filing back to Patient/a = %v, want PutMoved", res[0])
			}
			if got, err := s.Owner(t.Context(), "Observation/refiled"); err != nil || got != "Patient/a" {
				t.Errorf("Owner after re-filing back = %q, %v; want Patient/a", got, err)
			}
			n, err := s.Prune(t.Context(), t0.Add(-time.Hour))
			must(t, err)
			if n != 2 { // 1950 and 1969
				t.Errorf("Prune after the merge = %d, want 2", n)
			}
			if _, err := s.Owner(t.Context(), "Observation/1950"); !errors.Is(err, store.ErrNotFound) {
				t.Errorf("Owner of a pruned input: %v, want ErrNotFound", err)
			}
			if err := s.db.View(checkConsistent); err != nil {
				t.Error(err)
			}
		})
	}
}

// A merge of schema 5 cut short (here after its first batch) carries on
// at the next Open, and the places already written are kept as they are.
func TestSchema5MergeResumes(t *testing.T) {
	path := filepath.Join(t.TempDir(), "deadspace.db")
	old := oldInputs()
	writeSchema4Store(t, path, old, len(old))
	db, err := bolt.Open(path, 0o600, &bolt.Options{Timeout: time.Second})
	must(t, err)
	must(t, db.Update(func(tx *bolt.Tx) error { return migrate(tx, 4) }))
	must(t, db.Update(func(tx *bolt.Tx) error {
		n, done, err := movePlaceBatch(tx, 10)
		if err == nil && (done || n != 10) {
			err = fmt.Errorf("first batch merged %d inputs (done %v), want 10", n, done)
		}
		return err
	}))
	must(t, db.Close())

	s, err := Open(path, Options{Logger: slog.New(slog.NewTextHandler(io.Discard, nil))})
	must(t, err)
	defer s.Close()
	checkMovedInputs(t, s, old)
	if got, err := s.Owner(t.Context(), "Observation/refiled"); err != nil || got != "Patient/b" {
		t.Errorf("Owner of the re-filed input = %q, %v; want Patient/b", got, err)
	}
}
