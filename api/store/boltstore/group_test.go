package boltstore

import (
	"errors"
	"fmt"
	"path/filepath"
	"slices"
	"sync"
	"testing"

	bolt "go.etcd.io/bbolt"
)

// TestGroupCommitKeepsEachCallsOutcome runs many concurrent calls through
// the group commit, some of which fail or panic, and checks that every
// call gets its own answer: a failing call changes nothing, and the calls
// grouped with it are committed all the same.
func TestGroupCommitKeepsEachCallsOutcome(t *testing.T) {
	db := openBucketDB(t)
	g := &groupCommit{db: db}
	errFail := errors.New("refused")
	const calls = 200
	errs := make([]error, calls)
	var wg sync.WaitGroup
	for i := range calls {
		wg.Add(1)
		go func() {
			defer wg.Done()
			errs[i] = g.do(func(tx *bolt.Tx) error {
				// Written before failing, so a failed call's writes must be
				// rolled back for the test to pass.
				if err := tx.Bucket([]byte("b")).Put(fmt.Appendf(nil, "k%03d", i), []byte("v")); err != nil {
					return err
				}
				switch i % 10 {
				case 3:
					return errFail
				case 7:
					panic("boom")
				}
				return nil
			})
		}()
	}
	wg.Wait()
	err := db.View(func(tx *bolt.Tx) error {
		b := tx.Bucket([]byte("b"))
		for i := range calls {
			stored := b.Get(fmt.Appendf(nil, "k%03d", i)) != nil
			switch i % 10 {
			case 3:
				if !errors.Is(errs[i], errFail) || stored {
					t.Errorf("call %d: err %v, stored %v; want its own error and nothing stored", i, errs[i], stored)
				}
			case 7:
				if errs[i] == nil || stored {
					t.Errorf("call %d: err %v, stored %v; want the panic as an error and nothing stored", i, errs[i], stored)
				}
			default:
				if errs[i] != nil || !stored {
					t.Errorf("call %d: err %v, stored %v; want committed", i, errs[i], stored)
				}
			}
		}
		return nil
	})
	if err != nil {
		t.Fatal(err)
	}
	// The committer stops when idle and starts again on the next call.
	if err := g.do(func(tx *bolt.Tx) error { return tx.Bucket([]byte("b")).Put([]byte("last"), nil) }); err != nil {
		t.Fatal(err)
	}
}

// TestGroupCommitBeginsEachTransactionOnce runs a group of three calls,
// the second of which fails, and checks that begin runs once in each
// transaction the group takes (the group, rolled back; the failed call
// alone, rolled back; the other two, committed), not once per call, and
// that what it returns runs only after the one that was committed.
func TestGroupCommitBeginsEachTransactionOnce(t *testing.T) {
	db := openBucketDB(t)
	var begun, committed []int // the transactions begin started; those committed
	g := &groupCommit{db: db, begin: func(tx *bolt.Tx) (func(), error) {
		n := len(begun) + 1
		begun = append(begun, n)
		if err := tx.Bucket([]byte("b")).Put([]byte("begun"), fmt.Append(nil, n)); err != nil {
			return nil, err
		}
		return func() { committed = append(committed, n) }, nil
	}}
	errFail := errors.New("refused")
	put := func(key string, fail bool) *groupCall {
		return &groupCall{done: make(chan error, 1), fn: func(tx *bolt.Tx) error {
			if err := tx.Bucket([]byte("b")).Put([]byte(key), []byte("v")); err != nil {
				return err
			}
			if fail {
				return errFail
			}
			return nil
		}}
	}
	calls := []*groupCall{put("a", false), put("bad", true), put("c", false)}
	g.commit(slices.Clone(calls))
	for i, want := range []error{nil, errFail, nil} {
		if err := <-calls[i].done; !errors.Is(err, want) {
			t.Errorf("call %d: %v, want %v", i, err, want)
		}
	}
	if !slices.Equal(begun, []int{1, 2, 3}) || !slices.Equal(committed, []int{3}) {
		t.Errorf("begin ran in transactions %v, %v committed; want 1, 2 and 3 begun, 3 committed", begun, committed)
	}
	err := db.View(func(tx *bolt.Tx) error {
		b := tx.Bucket([]byte("b"))
		if got := string(b.Get([]byte("begun"))); got != "3" {
			t.Errorf("begin's write in the store is from transaction %q, want 3", got)
		}
		if b.Get([]byte("a")) == nil || b.Get([]byte("c")) == nil || b.Get([]byte("bad")) != nil {
			t.Errorf("a %q, bad %q, c %q: want a and c stored, not bad", b.Get([]byte("a")), b.Get([]byte("bad")), b.Get([]byte("c")))
		}
		return nil
	})
	if err != nil {
		t.Fatal(err)
	}
}

// openBucketDB opens a bbolt file of the test's with one bucket, b.
func openBucketDB(t *testing.T) *bolt.DB {
	t.Helper()
	db, err := bolt.Open(filepath.Join(t.TempDir(), "g.db"), 0o600, nil)
	if err != nil {
		t.Fatal(err)
	}
	t.Cleanup(func() { db.Close() })
	if err := db.Update(func(tx *bolt.Tx) error { _, err := tx.CreateBucket([]byte("b")); return err }); err != nil {
		t.Fatal(err)
	}
	return db
}
