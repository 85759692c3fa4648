package boltstore

import (
	"errors"
	"fmt"
	"path/filepath"
	"sync"
	"testing"

	bolt "go.etcd.io/bbolt"
)

// TestGroupCommitKeepsEachCallsOutcome runs many concurrent calls through
// the group commit, some of which fail or panic, and checks that every
// call gets its own answer: a failing call changes nothing, and the calls
// grouped with it are committed all the same.
func TestGroupCommitKeepsEachCallsOutcome(t *testing.T) {
	db, err := bolt.Open(filepath.Join(t.TempDir(), "g.db"), 0o600, nil)
	if err != nil {
		t.Fatal(err)
	}
	defer db.Close()
	if err := db.Update(func(tx *bolt.Tx) error { _, err := tx.CreateBucket([]byte("b")); return err }); err != nil {
		t.Fatal(err)
	}
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
	err = db.View(func(tx *bolt.Tx) error {
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
