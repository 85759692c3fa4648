package boltstore_test

import (
	"bufio"
	"context"
	"encoding/binary"
	"errors"
	"fmt"
	"io"
	"os"
	"os/exec"
	"path/filepath"
	"slices"
	"strings"
	"sync"
	"testing"
	"time"

	bolt "go.etcd.io/bbolt"

	"github.com/deadspace-fhir/deadspace/api/store"
	"github.com/deadspace-fhir/deadspace/api/store/boltstore"
)

var t0 = time.Date(2024, 3, 14, 2, 0, 0, 0, time.UTC)

func openAt(t testing.TB, path string) *boltstore.Store {
	t.Helper()
	s, err := boltstore.Open(path, boltstore.Options{})
	if err != nil {
		t.Fatal(err)
	}
	return s
}

func openTemp(t testing.TB) (*boltstore.Store, string) {
	t.Helper()
	path := filepath.Join(t.TempDir(), "state", "deadspace.db")
	s := openAt(t, path)
	t.Cleanup(func() { _ = s.Close() })
	return s, path
}

func must(t testing.TB, err error) {
	t.Helper()
	if err != nil {
		t.Fatal(err)
	}
}

// The directory is private to the service: the file holds patient data.
func TestOpenCreatesPrivateFile(t *testing.T) {
	_, path := openTemp(t)
	for _, tc := range []struct {
		path string
		want os.FileMode
	}{
		{filepath.Dir(path), 0o700 | os.ModeDir},
		{path, 0o600},
	} {
		fi, err := os.Stat(tc.path)
		must(t, err)
		// The umask can only take permissions away.
		if fi.Mode()&^tc.want != 0 {
			t.Errorf("%s: mode %v, want at most %v", tc.path, fi.Mode(), tc.want)
		}
	}
}

// Everything a method returned survives Close and a new Open: the service
// restarts with its ledger, outbox, feed and marks.
func TestDurableAcrossRestart(t *testing.T) {
	ctx := t.Context()
	path := filepath.Join(t.TempDir(), "deadspace.db")
	s := openAt(t, path)
	_, err := s.PutInputs(ctx, []store.Input{{Subject: "Patient/a", Logical: "Observation/1", VersionID: "2",
		LastUpdated: t0, EffectiveAt: t0.In(time.FixedZone("", -5*3600)), Payload: []byte{0, 1, 2, 0xff}}}, t0)
	must(t, err)
	_, err = s.PutPatient(ctx, store.Patient{Subject: "Patient/a", VersionID: "1", LastUpdated: t0, FetchedAt: t0, Payload: []byte("pt")}, t0)
	must(t, err)
	must(t, s.MarkDirty(ctx, "Patient/b", t0))
	must(t, s.Commit(ctx, store.Change{Subject: "Patient/a",
		Entries: []store.Entry{{Series: "s1", Key: "k1", Status: "final", EffectiveAt: t0, Payload: []byte("r")}},
		Writes:  []store.Write{{Series: []string{"s1"}, Body: []byte("b")}, {Series: []string{"s1"}, Body: []byte("c")}},
	}, t0))
	ws, err := s.DueWrites(ctx, t0, 10)
	must(t, err)
	must(t, s.Bury(ctx, ws[1].ID, "gone", t0))
	must(t, s.SetCursor(ctx, "poll", "v1"))
	_, err = s.SeenEvent(ctx, "sub", 9)
	must(t, err)
	before, err := s.Stats(ctx)
	must(t, err)
	lastBefore, err := s.LastEvent(ctx)
	must(t, err)
	must(t, s.Close())

	s = openAt(t, path)
	defer s.Close()
	in, err := s.Input(ctx, "Patient/a", "Observation/1")
	must(t, err)
	if in.VersionID != "2" || !in.EffectiveAt.Equal(t0) || string(in.Payload) != "\x00\x01\x02\xff" {
		t.Errorf("input after restart = %+v", in)
	}
	if _, off := in.EffectiveAt.Zone(); off != -5*3600 {
		t.Errorf("EffectiveAt offset %d after restart, want the written -5h", off)
	}
	if p, err := s.Patient(ctx, "Patient/a"); err != nil || string(p.Payload) != "pt" {
		t.Errorf("patient after restart = %+v, %v", p, err)
	}
	ds, err := s.DirtyPatients(ctx)
	must(t, err)
	if len(ds) != 2 {
		t.Errorf("dirty after restart = %+v", ds)
	}
	if en, err := s.Entry(ctx, "s1"); err != nil || en.Key != "k1" {
		t.Errorf("entry after restart = %+v, %v", en, err)
	}
	if ws, _ := s.DueWrites(ctx, t0, 10); len(ws) != 1 || string(ws[0].Body) != "b" {
		t.Errorf("outbox after restart = %+v", ws)
	}
	if dl, _ := s.DeadLetters(ctx, 10); len(dl) != 1 || dl[0].Reason != "gone" {
		t.Errorf("dead letters after restart = %+v", dl)
	}
	if v, _ := s.Cursor(ctx, "poll"); v != "v1" {
		t.Errorf("cursor after restart = %q", v)
	}
	if prev, _ := s.SeenEvent(ctx, "sub", 10); prev != 9 {
		t.Errorf("SeenEvent after restart: previous %d, want 9", prev)
	}
	after, err := s.Stats(ctx)
	must(t, err)
	if after != before {
		t.Errorf("Stats after restart = %+v, before %+v", after, before)
	}
	// Sequences continue after a restart: a feed Seq and a write id are
	// never reused (store.Event).
	must(t, s.Commit(ctx, store.Change{Subject: "Patient/a",
		Entries: []store.Entry{{Series: "s2", Key: "k2", Status: "final", EffectiveAt: t0}},
		Writes:  []store.Write{{Series: []string{"s2"}}},
	}, t0))
	if last, _ := s.LastEvent(ctx); last != lastBefore+1 {
		t.Errorf("LastEvent after restart and one more event = %d, want %d", last, lastBefore+1)
	}
	ws2, err := s.DueWrites(ctx, t0, 10)
	must(t, err)
	if len(ws2) != 2 || ws2[1].ID <= ws[1].ID {
		t.Errorf("write ids after restart: %+v, want the new one above %d", ws2, ws[1].ID)
	}
}

func TestSecondOpenFailsLocked(t *testing.T) {
	_, path := openTemp(t)
	s2, err := boltstore.Open(path, boltstore.Options{Timeout: 100 * time.Millisecond})
	if err == nil {
		s2.Close()
		t.Fatal("second Open of an open file succeeded")
	}
	if !errors.Is(err, boltstore.ErrLocked) {
		t.Errorf("err = %v, want ErrLocked", err)
	}
	if !strings.Contains(err.Error(), path) || !strings.HasPrefix(err.Error(), "boltstore.Open: ") {
		t.Errorf("error %q does not name the operation and the file", err)
	}
}

func setSchema(t *testing.T, path string, version uint64) {
	t.Helper()
	db, err := bolt.Open(path, 0o600, &bolt.Options{Timeout: time.Second})
	must(t, err)
	defer db.Close()
	must(t, db.Update(func(tx *bolt.Tx) error {
		return tx.Bucket([]byte("meta")).Put([]byte("schema"), binary.BigEndian.AppendUint64(nil, version))
	}))
}

func TestNewerSchemaRefused(t *testing.T) {
	path := filepath.Join(t.TempDir(), "deadspace.db")
	must(t, openAt(t, path).Close())
	setSchema(t, path, 7)
	s, err := boltstore.Open(path, boltstore.Options{})
	if err == nil {
		s.Close()
		t.Fatal("opened a file of a newer schema")
	}
	if !errors.Is(err, boltstore.ErrNewerSchema) {
		t.Errorf("err = %v, want ErrNewerSchema", err)
	}
	// The refusal releases the file: an older build must not keep a
	// newer file locked.
	setSchema(t, path, 5)
	must(t, openAt(t, path).Close())
}

func TestCorruptFileRefused(t *testing.T) {
	dir := t.TempDir()
	foreign := filepath.Join(dir, "foreign.db")
	db, err := bolt.Open(foreign, 0o600, nil)
	must(t, err)
	must(t, db.Update(func(tx *bolt.Tx) error { _, err := tx.CreateBucket([]byte("widgets")); return err }))
	must(t, db.Close())

	good := filepath.Join(dir, "good.db")
	must(t, openAt(t, good).Close())
	goodBytes, err := os.ReadFile(good)
	must(t, err)

	for _, tc := range []struct {
		name  string
		write func(path string) error
	}{
		{"Text", func(p string) error { return os.WriteFile(p, []byte(strings.Repeat("not a database\n", 1000)), 0o600) }},
		{"TooShort", func(p string) error { return os.WriteFile(p, []byte("x"), 0o600) }},
		{"MetaPagesZeroed", func(p string) error {
			b := slices.Clone(goodBytes)
			clear(b[:2*os.Getpagesize()])
			return os.WriteFile(p, b, 0o600)
		}},
		{"ForeignBoltFile", func(p string) error {
			b, err := os.ReadFile(foreign)
			if err != nil {
				return err
			}
			return os.WriteFile(p, b, 0o600)
		}},
	} {
		t.Run(tc.name, func(t *testing.T) {
			path := filepath.Join(t.TempDir(), "bad.db")
			must(t, tc.write(path))
			s, err := boltstore.Open(path, boltstore.Options{})
			if err == nil {
				s.Close()
				t.Fatal("opened a damaged file")
			}
			if !errors.Is(err, boltstore.ErrCorrupt) {
				t.Errorf("err = %v, want ErrCorrupt", err)
			}
		})
	}
}

// Non-positive limits are refused rather than read as "everything": the
// feed and the dead letters grow without bound.
func TestLimitMustBePositive(t *testing.T) {
	s, _ := openTemp(t)
	ctx := t.Context()
	for _, limit := range []int{0, -1} {
		t.Run(fmt.Sprint(limit), func(t *testing.T) {
			if _, err := s.Events(ctx, 0, limit); err == nil {
				t.Error("Events accepted the limit")
			}
			if _, err := s.DueWrites(ctx, t0, limit); err == nil {
				t.Error("DueWrites accepted the limit")
			}
			if _, err := s.DeadLetters(ctx, limit); err == nil {
				t.Error("DeadLetters accepted the limit")
			}
			if _, err := s.EntriesBetween(ctx, "Patient/a", t0, t0.Add(time.Hour), "", limit); err == nil {
				t.Error("EntriesBetween accepted the limit")
			}
		})
	}
}

// The store keeps what it knows about an entry when a caller replaces it
// with less: the previous key stays findable and the server id stays.
func TestEntryReplaceKeepsKnowledge(t *testing.T) {
	s, _ := openTemp(t)
	ctx := t.Context()
	const subj = "Patient/e"
	must(t, s.Commit(ctx, store.Change{Subject: subj, Entries: []store.Entry{{Series: "s1", Key: "k1", Status: "final", EffectiveAt: t0}},
		Writes: []store.Write{{Series: []string{"s1"}}}}, t0))
	ws, err := s.DueWrites(ctx, t0, 1)
	must(t, err)
	must(t, s.Acknowledge(ctx, ws[0].ID, map[string][2]string{"s1": {"obs-1", "1"}}))
	must(t, s.Commit(ctx, store.Change{Subject: subj, Entries: []store.Entry{{Series: "s1", Key: "k2", Status: "amended", EffectiveAt: t0}}}, t0))
	en, err := s.EntryByKey(ctx, "k1")
	must(t, err)
	if en.Key != "k2" || !slices.Equal(en.Revisions, []string{"k1"}) || en.ServerID != "obs-1" || en.ServerVersion != "1" {
		t.Errorf("entry = %+v; want key k2, revisions [k1], server ids kept", en)
	}
	// The same key again (a status change only) adds no revision.
	must(t, s.Commit(ctx, store.Change{Subject: subj, Entries: []store.Entry{{Series: "s1", Key: "k2", Status: "entered-in-error", EffectiveAt: t0}}}, t0))
	if en, _ := s.Entry(ctx, "s1"); !slices.Equal(en.Revisions, []string{"k1"}) || en.Status != "entered-in-error" {
		t.Errorf("after a status-only change: %+v", en)
	}
	// Acknowledging with a series the ledger does not hold changes nothing.
	must(t, s.Commit(ctx, store.Change{Subject: subj, Writes: []store.Write{{Series: []string{"s1"}}}}, t0))
	ws, err = s.DueWrites(ctx, t0, 1)
	must(t, err)
	if err := s.Acknowledge(ctx, ws[0].ID, map[string][2]string{"s-none": {"x", "1"}}); !errors.Is(err, store.ErrNotFound) {
		t.Errorf("Acknowledge with an unknown series: %v, want ErrNotFound", err)
	}
	if st, _ := s.Stats(ctx); st.OutboxDepth != 1 {
		t.Errorf("failed Acknowledge removed the write: depth %d", st.OutboxDepth)
	}
}

// A fetch that finds nothing newer still records when the facts were
// read, without asking for an evaluation.
func TestPutPatientSameAdvancesFetchedAt(t *testing.T) {
	s, _ := openTemp(t)
	ctx := t.Context()
	p := store.Patient{Subject: "Patient/a", VersionID: "1", LastUpdated: t0, FetchedAt: t0, Payload: []byte("v1")}
	_, err := s.PutPatient(ctx, p, t0)
	must(t, err)
	ds, err := s.DirtyPatients(ctx)
	must(t, err)
	p.FetchedAt = t0.Add(time.Hour)
	res, err := s.PutPatient(ctx, p, t0.Add(time.Hour))
	must(t, err)
	if res != store.PutSame {
		t.Fatalf("result %v, want PutSame", res)
	}
	got, err := s.Patient(ctx, "Patient/a")
	must(t, err)
	if !got.FetchedAt.Equal(t0.Add(time.Hour)) || string(got.Payload) != "v1" {
		t.Errorf("patient = %+v; want FetchedAt advanced, payload kept", got)
	}
	ds2, err := s.DirtyPatients(ctx)
	must(t, err)
	if len(ds2) != 1 || ds2[0].Generation != ds[0].Generation {
		t.Errorf("dirty %+v → %+v: a same version must not count as a change", ds, ds2)
	}
}

// A page token that names no entry of this patient is an error, not a
// silent restart from the first page (which would loop a client forever).
func TestEntriesBetweenUnknownAfter(t *testing.T) {
	s, _ := openTemp(t)
	ctx := t.Context()
	must(t, s.Commit(ctx, store.Change{Subject: "Patient/b", Entries: []store.Entry{{Series: "s-b", Key: "k", EffectiveAt: t0}}}, t0))
	for _, after := range []string{"s-none", "s-b"} {
		if _, err := s.EntriesBetween(ctx, "Patient/a", t0, t0.Add(time.Hour), after, 10); !errors.Is(err, store.ErrNotFound) {
			t.Errorf("after %q: err = %v, want ErrNotFound", after, err)
		}
	}
}

const crashEnv = "DEADSPACE_BOLTSTORE_CRASH_CHILD"

// A process killed at any moment (SIGKILL: no deferred Close, no flush)
// leaves a file that opens, passes bbolt's consistency check, and holds
// every input whose PutInputs returned. bbolt's reason to expect it is its
// two-phase commit: data pages, fsync, then a checksummed meta page, fsync
// (go.etcd.io/bbolt v1.5.0 README, "Reading the Source", Tx.Commit). A
// killed process leaves the kernel's page cache intact, so this checks
// the commit protocol, not fsync against power loss.
func TestCrashSafety(t *testing.T) {
	if path := os.Getenv(crashEnv); path != "" {
		crashChild(path)
		return
	}
	if testing.Short() {
		t.Skip("runs a child process")
	}
	path := filepath.Join(t.TempDir(), "deadspace.db")
	var acked []string
	// Several rounds, each killing a writer on the file the previous one
	// left, so recovery itself is also recovered from.
	for round := range 3 {
		acked = append(acked, runAndKill(t, path, round, 800)...)
	}

	db, err := bolt.Open(path, 0o600, &bolt.Options{Timeout: 5 * time.Second, ReadOnly: true})
	must(t, err)
	must(t, db.View(func(tx *bolt.Tx) error {
		for err := range tx.Check() {
			return err
		}
		return nil
	}))
	must(t, db.Close())

	s := openAt(t, path)
	defer s.Close()
	for _, line := range acked {
		subject, logical, ok := strings.Cut(line, " ")
		if !ok {
			t.Fatalf("child printed %q", line)
		}
		in, err := s.Input(t.Context(), subject, logical)
		if err != nil {
			t.Errorf("acknowledged input %s %s: %v", subject, logical, err)
			continue
		}
		if len(in.Payload) != crashPayload {
			t.Errorf("acknowledged input %s %s has %d payload bytes, want %d", subject, logical, len(in.Payload), crashPayload)
		}
	}
	// A batch is one transaction: the one in flight at the kill is there
	// whole or not at all.
	batches := map[string]int{}
	for p := range 3 {
		ins, err := s.Inputs(t.Context(), fmt.Sprintf("Patient/%d", p))
		must(t, err)
		for _, in := range ins {
			batch := in.Logical[:strings.LastIndexByte(in.Logical, '-')]
			batches[batch]++
		}
	}
	for batch, n := range batches {
		if n != crashBatch {
			t.Errorf("batch %s has %d of its %d inputs", batch, n, crashBatch)
		}
	}
	t.Logf("%d acknowledged inputs present after SIGKILL, %d batches stored", len(acked), len(batches))
}

// runAndKill starts a writer child on path, kills it once it has
// acknowledged at least n inputs, and returns every input it acknowledged.
func runAndKill(t *testing.T, path string, round, n int) []string {
	t.Helper()
	ctx, cancel := context.WithTimeout(t.Context(), 2*time.Minute)
	defer cancel()
	cmd := exec.CommandContext(ctx, os.Args[0], "-test.run=^TestCrashSafety$", "-test.count=1")
	cmd.Env = append(os.Environ(), crashEnv+"="+path, fmt.Sprintf("%s_ROUND=%d", crashEnv, round))
	cmd.Stderr = os.Stderr
	out, err := cmd.StdoutPipe()
	must(t, err)
	must(t, cmd.Start())
	r := bufio.NewReader(out)
	var acked []string
	for len(acked) < n {
		line, err := r.ReadString('\n')
		if err != nil {
			_ = cmd.Process.Kill()
			_ = cmd.Wait()
			t.Fatalf("round %d: child stopped after %d acknowledgements: %v", round, len(acked), err)
		}
		acked = append(acked, strings.TrimSuffix(line, "\n"))
	}
	must(t, cmd.Process.Kill())
	// Lines written before the kill are acknowledged too; a cut-off last
	// line (no newline) is not.
	rest, _ := io.ReadAll(r)
	lines := strings.Split(string(rest), "\n")
	acked = append(acked, lines[:len(lines)-1]...)
	if err := cmd.Wait(); err == nil {
		t.Fatalf("round %d: child exited cleanly, it was meant to be killed", round)
	}
	return acked
}

const (
	crashPayload = 1500
	crashBatch   = 8
)

// crashChild writes batches until it is killed, printing each input once
// its PutInputs has returned. Batches of several inputs over several
// patients make each commit touch many pages, so the kill can land inside
// one.
func crashChild(path string) {
	round := os.Getenv(crashEnv + "_ROUND")
	s, err := boltstore.Open(path, boltstore.Options{})
	if err != nil {
		fmt.Fprintln(os.Stderr, err)
		os.Exit(2)
	}
	payload := []byte(strings.Repeat("p", crashPayload))
	w := bufio.NewWriter(os.Stdout)
	for i := 0; ; i++ {
		batch := make([]store.Input, 0, crashBatch)
		for j := range crashBatch {
			batch = append(batch, store.Input{
				Subject: fmt.Sprintf("Patient/%d", j%3), Logical: fmt.Sprintf("Observation/%s-%d-%d", round, i, j),
				VersionID: "1", LastUpdated: t0, EffectiveAt: t0.Add(time.Duration(i) * time.Second), Payload: payload,
			})
		}
		if _, err := s.PutInputs(context.Background(), batch, t0); err != nil {
			fmt.Fprintln(os.Stderr, err)
			os.Exit(2)
		}
		for _, in := range batch {
			fmt.Fprintf(w, "%s %s\n", in.Subject, in.Logical)
		}
		// Flushed after every call: a line may be printed only once its
		// input is durable, and must not wait in a buffer past the kill.
		if err := w.Flush(); err != nil {
			os.Exit(2)
		}
	}
}

// An empty commit's clear is held in memory (no fsync of its own) and
// written by the next synced transaction or by Close: after a clean
// restart the patient is not evaluated again, and a clear that the next
// write carried survives too.
func TestEmptyCommitClearSurvivesRestart(t *testing.T) {
	t.Parallel()
	path := filepath.Join(t.TempDir(), "deadspace.db")
	ctx := t.Context()
	s := openAt(t, path)
	for _, subject := range []string{"Patient/a", "Patient/b"} {
		if err := s.MarkDirty(ctx, subject, t0); err != nil {
			t.Fatal(err)
		}
	}
	ds, err := s.DirtyPatients(ctx)
	if err != nil || len(ds) != 2 {
		t.Fatalf("DirtyPatients = %v, %v", ds, err)
	}
	for _, d := range ds {
		if err := s.Commit(ctx, store.Change{Subject: d.Subject, Generation: d.Generation}, t0); err != nil {
			t.Fatal(err)
		}
		if d.Subject == "Patient/a" {
			// A later write carries the clear of Patient/a.
			if err := s.SetCursor(ctx, "poll", "x"); err != nil {
				t.Fatal(err)
			}
		}
	}
	if err := s.Close(); err != nil {
		t.Fatal(err)
	}
	s = openAt(t, path)
	defer s.Close()
	if ds, err := s.DirtyPatients(ctx); err != nil || len(ds) != 0 {
		t.Errorf("after a restart: DirtyPatients = %+v, %v; want none", ds, err)
	}
	if st, err := s.Stats(ctx); err != nil || st.DirtyPatients != 0 {
		t.Errorf("after a restart: Stats = %+v, %v; want no dirty patient", st, err)
	}
}

// TestCommitStatsCountTheCommitter: concurrent writes are counted as calls,
// merged into fewer transactions, with the time the writer was busy; a
// write the store makes on its own (a prune) counts as a transaction of
// one call.
func TestCommitStatsCountTheCommitter(t *testing.T) {
	ctx := t.Context()
	s := openAt(t, filepath.Join(t.TempDir(), "deadspace.db"))
	before := s.CommitStats()
	const writers = 40
	var wg sync.WaitGroup
	for i := range writers {
		wg.Add(1)
		go func() {
			defer wg.Done()
			_, err := s.PutInputs(ctx, []store.Input{{Subject: fmt.Sprintf("Patient/c%d", i%4), Logical: fmt.Sprintf("Observation/c%d", i),
				VersionID: "1", LastUpdated: t0, EffectiveAt: t0, Payload: []byte{1}}}, t0)
			if err != nil {
				t.Error(err)
			}
		}()
	}
	wg.Wait()
	after := s.CommitStats()
	calls, txs := after.Calls-before.Calls, after.Transactions-before.Transactions
	if calls != writers || txs < 1 || txs > writers || after.Busy <= before.Busy {
		t.Errorf("%d writes: %d calls in %d transactions, busy %v more; want %d calls in 1 to %d transactions and some time", writers, calls, txs, after.Busy-before.Busy, writers, writers)
	}
	if _, err := s.Prune(ctx, t0.Add(-time.Hour)); err != nil {
		t.Fatal(err)
	}
	pruned := s.CommitStats()
	if pruned.Calls != after.Calls+1 || pruned.Transactions != after.Transactions+1 || pruned.Busy <= after.Busy {
		t.Errorf("after a prune: %+v, want one call and one transaction more than %+v, and more time", pruned, after)
	}
}

// Held answers as Owner does, for many inputs in one read.
func TestHeldAnswersAsOwner(t *testing.T) {
	s, _ := openTemp(t)
	ctx := t.Context()
	if _, err := s.PutInputs(ctx, []store.Input{
		{Subject: "Patient/a", Logical: "Observation/held", VersionID: "1", LastUpdated: t0, EffectiveAt: t0, Payload: []byte("x")},
		{Subject: "Patient/a", Logical: "Observation/pruned", VersionID: "1", LastUpdated: t0, EffectiveAt: t0.Add(-time.Hour), Payload: []byte("x")},
	}, t0); err != nil {
		t.Fatal(err)
	}
	if _, err := s.Prune(ctx, t0.Add(-time.Minute)); err != nil {
		t.Fatal(err)
	}
	logicals := []string{"Observation/held", "Observation/never", "Observation/pruned"}
	got, err := s.Held(ctx, logicals)
	if err != nil {
		t.Fatal(err)
	}
	for i, l := range logicals {
		_, oerr := s.Owner(ctx, l)
		if got[i] != (oerr == nil) {
			t.Errorf("%s: Held %v, Owner %v", l, got[i], oerr)
		}
	}
	if !got[0] || got[1] || got[2] {
		t.Errorf("Held = %v, want [true false false]", got)
	}
}
