package boltstore

import (
	"fmt"
	"os"
	"path/filepath"
	"testing"
	"time"

	bolt "go.etcd.io/bbolt"

	"github.com/deadspace-fhir/deadspace/api/store"
)

var intakeT0 = time.Date(2024, 3, 14, 2, 0, 0, 0, time.UTC)

func openIntakeTest(t *testing.T, path string, delay time.Duration) *Store {
	t.Helper()
	s, err := Open(path, Options{IntakeDelay: delay})
	if err != nil {
		t.Fatal(err)
	}
	return s
}

// hold stops the applier, so that what PutNotified journals from then on
// stays in the intake, as it would if the process died before applying.
func hold(s *Store) {
	close(s.intake.stop)
	<-s.intake.done
}

// crash closes both files without applying anything more: what a killed
// process leaves.
func crash(t *testing.T, s *Store) {
	t.Helper()
	close(s.intake.wstop)
	<-s.intake.wdone
	if err := s.intake.j.close(); err != nil {
		t.Fatal(err)
	}
	if err := s.db.Close(); err != nil {
		t.Fatal(err)
	}
}

func notifiedInput(subject, logical, version string, minute int) store.Input {
	at := intakeT0.Add(time.Duration(minute) * time.Minute)
	return store.Input{Subject: subject, Logical: logical, VersionID: version, LastUpdated: at, EffectiveAt: at, ChangedAt: at, Payload: []byte(logical + "@" + version)}
}

// unapplied is how many answered records wait to be applied.
func unapplied(s *Store) int {
	s.intake.mu.Lock()
	defer s.intake.mu.Unlock()
	return len(s.intake.queue)
}

// recordsInFile reads the intake file as Open would.
func recordsInFile(t *testing.T, path string) []scanned {
	t.Helper()
	b, err := os.ReadFile(IntakePath(path))
	if err != nil {
		t.Fatal(err)
	}
	recs, _ := scanJournal(b)
	return recs
}

// A notification answered but not applied when the process dies is
// applied at the next Open, before anything reads the store, and its
// event number is remembered.
func TestIntakeRecoversAfterCrash(t *testing.T) {
	path := filepath.Join(t.TempDir(), "deadspace.db")
	s := openIntakeTest(t, path, -1)
	hold(s)
	for i, in := range []store.Input{
		notifiedInput("Patient/a", "Observation/1", "1", 0),
		notifiedInput("Patient/b", "Observation/2", "1", 1),
		notifiedInput("Patient/a", "Observation/1", "2", 2), // a newer version of the first
	} {
		if _, _, err := s.PutNotified(t.Context(), []store.Input{in}, intakeT0, "Subscription/x", uint64(i+1)); err != nil {
			t.Fatal(err)
		}
	}
	crash(t, s)

	s = openIntakeTest(t, path, -1)
	defer s.Close()
	if n := unapplied(s); n != 0 {
		t.Errorf("%d records wait after Open: they must be applied before anything reads", n)
	}
	in, err := s.Input(t.Context(), "Patient/a", "Observation/1")
	if err != nil || in.VersionID != "2" {
		t.Errorf("Patient/a's reading after the restart: version %q (%v), want 2", in.VersionID, err)
	}
	if _, err := s.Input(t.Context(), "Patient/b", "Observation/2"); err != nil {
		t.Errorf("Patient/b's reading after the restart: %v", err)
	}
	dirty, err := s.DirtyPatients(t.Context())
	if err != nil || len(dirty) != 2 {
		t.Errorf("dirty patients after the restart: %v (%v), want Patient/a and Patient/b", dirty, err)
	}
	if prev, err := s.SeenEvent(t.Context(), "Subscription/x", 4); err != nil || prev != 3 {
		t.Errorf("event counter after the restart: %d (%v), want 3", prev, err)
	}
}

// A record applied to the store whose deletion from the intake did not
// happen before the process died is not applied a second time.
func TestIntakeAppliesOnce(t *testing.T) {
	path := filepath.Join(t.TempDir(), "deadspace.db")
	s := openIntakeTest(t, path, -1)
	hold(s)
	if _, _, err := s.PutNotified(t.Context(), []store.Input{notifiedInput("Patient/a", "Observation/1", "1", 0)}, intakeT0, "Subscription/x", 1); err != nil {
		t.Fatal(err)
	}
	if n, err := s.intake.applyNext(); err != nil || n != 1 {
		t.Fatalf("applied %d (%v), want 1", n, err)
	}
	before, err := s.DirtyPatients(t.Context())
	if err != nil || len(before) != 1 {
		t.Fatalf("dirty before the crash: %v (%v)", before, err)
	}
	if recs := recordsInFile(t, path); len(recs) != 1 {
		t.Fatalf("%d records in the intake file before the crash, want the applied one", len(recs))
	}
	crash(t, s)

	s = openIntakeTest(t, path, -1)
	defer s.Close()
	after, err := s.DirtyPatients(t.Context())
	if err != nil || len(after) != 1 || after[0].Generation != before[0].Generation {
		t.Errorf("dirty after the restart: %v (%v), want the mark as it was, %v: the record was applied again", after, err, before)
	}
	if n := unapplied(s); n != 0 {
		t.Errorf("%d records wait after the restart", n)
	}
}

// An intake file lost or deleted by hand must not make the store skip new
// notifications as if they were applied already, and the event counters a
// store kept in its main file before the intake existed carry over.
func TestIntakeLostFileAndOldCounters(t *testing.T) {
	path := filepath.Join(t.TempDir(), "deadspace.db")
	s := openIntakeTest(t, path, -1)
	for i := range 3 {
		if _, _, err := s.PutNotified(t.Context(), []store.Input{notifiedInput("Patient/a", "Observation/1", "1", i)}, intakeT0, "Subscription/x", 1); err != nil {
			t.Fatal(err)
		}
	}
	if err := s.Close(); err != nil {
		t.Fatal(err)
	}
	if err := os.Remove(IntakePath(path)); err != nil {
		t.Fatal(err)
	}
	// The counter as a store without an intake kept it.
	db, err := bolt.Open(path, 0o600, nil)
	if err != nil {
		t.Fatal(err)
	}
	if err := db.Update(func(tx *bolt.Tx) error { return tx.Bucket(bSubs).Put([]byte("Subscription/y"), u64(7)) }); err != nil {
		t.Fatal(err)
	}
	if err := db.Close(); err != nil {
		t.Fatal(err)
	}

	s = openIntakeTest(t, path, -1)
	defer s.Close()
	if _, _, err := s.PutNotified(t.Context(), []store.Input{notifiedInput("Patient/b", "Observation/2", "1", 0)}, intakeT0, "Subscription/x", 2); err != nil {
		t.Fatal(err)
	}
	if err := s.Settle(t.Context()); err != nil {
		t.Fatal(err)
	}
	if _, err := s.Input(t.Context(), "Patient/b", "Observation/2"); err != nil {
		t.Errorf("a notification after the intake was lost: %v", err)
	}
	if prev, err := s.SeenEvent(t.Context(), "Subscription/y", 8); err != nil || prev != 7 {
		t.Errorf("the main file's counter: %d (%v), want 7", prev, err)
	}
}

// Work answered but not applied is not quiet: Stats waits for it (and
// asks for it at once), and Close applies it before the file is closed.
func TestIntakeStatsAndCloseApply(t *testing.T) {
	path := filepath.Join(t.TempDir(), "deadspace.db")
	s := openIntakeTest(t, path, time.Hour)
	if _, _, err := s.PutNotified(t.Context(), []store.Input{notifiedInput("Patient/a", "Observation/1", "1", 0)}, intakeT0, "Subscription/x", 1); err != nil {
		t.Fatal(err)
	}
	st, err := s.Stats(t.Context())
	if err != nil || st.DirtyPatients != 1 {
		t.Errorf("Stats right after a notification: %d dirty (%v), want 1", st.DirtyPatients, err)
	}
	if _, _, err := s.PutNotified(t.Context(), []store.Input{notifiedInput("Patient/b", "Observation/2", "1", 0)}, intakeT0, "Subscription/x", 2); err != nil {
		t.Fatal(err)
	}
	if err := s.Close(); err != nil {
		t.Fatal(err)
	}
	db, err := bolt.Open(path, 0o600, &bolt.Options{ReadOnly: true})
	if err != nil {
		t.Fatal(err)
	}
	defer db.Close()
	if err := db.View(func(tx *bolt.Tx) error {
		if v, _ := inputRow(tx, "Patient/b", "Observation/2"); v == nil {
			t.Error("a notification answered before Close is not in the store file")
		}
		return nil
	}); err != nil {
		t.Fatal(err)
	}
}

// What the applier did with each notification's inputs reaches the
// OnApplied function in order, as PutInputs would have answered.
func TestIntakeResultsInOrder(t *testing.T) {
	path := filepath.Join(t.TempDir(), "deadspace.db")
	s := openIntakeTest(t, path, time.Hour)
	defer s.Close()
	var got []store.PutResult
	s.OnApplied(func(res []store.PutResult) { got = append(got, res...) })
	for _, in := range []store.Input{
		notifiedInput("Patient/a", "Observation/1", "2", 1),
		notifiedInput("Patient/a", "Observation/1", "1", 0), // older, arriving late
		notifiedInput("Patient/a", "Observation/1", "2", 1), // again
		notifiedInput("Patient/b", "Observation/1", "3", 2), // re-filed to another patient
	} {
		if _, _, err := s.PutNotified(t.Context(), []store.Input{in}, intakeT0, "Subscription/x", 1); err != nil {
			t.Fatal(err)
		}
	}
	if err := s.Settle(t.Context()); err != nil {
		t.Fatal(err)
	}
	want := []store.PutResult{store.PutNew, store.PutOlder, store.PutSame, store.PutNewer}
	if len(got) != len(want) {
		t.Fatalf("results %v, want %v", got, want)
	}
	for i := range want {
		if got[i] != want[i] {
			t.Errorf("result %d: %v, want %v (all: %v)", i, got[i], want[i], got)
		}
	}
}

// Close may be called twice (a deferred Close after an explicit one): the
// second returns what the first did instead of stopping the applier again.
func TestIntakeCloseTwice(t *testing.T) {
	s := openIntakeTest(t, filepath.Join(t.TempDir(), "deadspace.db"), time.Hour)
	if _, _, err := s.PutNotified(t.Context(), []store.Input{notifiedInput("Patient/a", "Observation/1", "1", 0)}, intakeT0, "Subscription/x", 1); err != nil {
		t.Fatal(err)
	}
	first := s.Close()
	if first != nil {
		t.Fatal(first)
	}
	_ = s.Close() // bbolt answers for its own files; the intake must not panic
}

// A record torn by a crash in the middle of its write was never answered:
// the records before it are applied at Open, and the next notification
// takes its place in the file and its sequence.
func TestIntakeTornRecord(t *testing.T) {
	path := filepath.Join(t.TempDir(), "deadspace.db")
	s := openIntakeTest(t, path, -1)
	hold(s)
	for i := range 3 {
		if _, _, err := s.PutNotified(t.Context(), []store.Input{notifiedInput("Patient/a", fmt.Sprintf("Observation/%d", i), "1", i)}, intakeT0, "Subscription/x", uint64(i+1)); err != nil {
			t.Fatal(err)
		}
	}
	end := s.intake.j.off
	crash(t, s)
	f, err := os.OpenFile(IntakePath(path), os.O_RDWR, 0)
	if err != nil {
		t.Fatal(err)
	}
	if _, err := f.WriteAt(make([]byte, 5), end-5); err != nil { // the third record's last bytes never reached the disk
		t.Fatal(err)
	}
	must(t, f.Close())

	s = openIntakeTest(t, path, -1)
	defer s.Close()
	for i, want := range []bool{true, true, false} {
		_, err := s.Input(t.Context(), "Patient/a", fmt.Sprintf("Observation/%d", i))
		if (err == nil) != want {
			t.Errorf("Observation/%d stored: %v, want %v", i, err == nil, want)
		}
	}
	if prev, err := s.SeenEvent(t.Context(), "Subscription/x", 3); err != nil || prev != 2 {
		t.Errorf("event counter after the torn record: %d (%v), want 2", prev, err)
	}
	if _, _, err := s.PutNotified(t.Context(), []store.Input{notifiedInput("Patient/a", "Observation/9", "1", 9)}, intakeT0, "Subscription/x", 4); err != nil {
		t.Fatal(err)
	}
	must(t, s.Settle(t.Context()))
	if _, err := s.Input(t.Context(), "Patient/a", "Observation/9"); err != nil {
		t.Errorf("a notification after the torn record: %v", err)
	}
	must(t, s.Close())
	if recs := recordsInFile(t, path); len(recs) == 0 || recs[len(recs)-1].seq != 4 {
		t.Errorf("records in the file after the restart: %v, want them to end with sequence 4", recs)
	}
}
