package boltstore

import (
	"bytes"
	"encoding/binary"
	"fmt"
	"path/filepath"
	"slices"
	"testing"

	bolt "go.etcd.io/bbolt"

	"github.com/deadspace-fhir/deadspace/api/store"
	"github.com/deadspace-fhir/deadspace/api/store/storetest"
)

// TestContract runs the shared contract, and after every case checks that
// the indexes and counters agree with the records they are derived from:
// the contract sees only results, and a stale index key can hide behind a
// correct result until a later operation trips on it.
func TestContract(t *testing.T) {
	storetest.Run(t, func(t *testing.T) store.Store {
		s, err := Open(filepath.Join(t.TempDir(), "deadspace.db"), Options{})
		if err != nil {
			t.Fatal(err)
		}
		t.Cleanup(func() {
			if err := s.db.View(checkConsistent); err != nil {
				t.Errorf("after %s: %v", t.Name(), err)
			}
			if err := s.Close(); err != nil {
				t.Error(err)
			}
		})
		return s
	})
}

func keysOf(b *bolt.Bucket) [][]byte {
	var ks [][]byte
	_ = b.ForEach(func(k, _ []byte) error {
		ks = append(ks, bytes.Clone(k))
		return nil
	})
	return ks
}

func sameKeys(name string, got [][]byte, want [][]byte) error {
	slices.SortFunc(want, bytes.Compare)
	if !slices.EqualFunc(got, want, bytes.Equal) {
		return fmt.Errorf("%s has %d keys %q, the records imply %d %q", name, len(got), got, len(want), want)
	}
	return nil
}

func checkConsistent(tx *bolt.Tx) error {
	// Every row sits at its input's effective time, and input_place points
	// at each row once: a second row of one input under one subject would
	// show as a place twice, a place without its row as one too many.
	var want, have [][]byte
	err := tx.Bucket(bInputRows).ForEach(func(k, v []byte) error {
		i := bytes.IndexByte(k, sep)
		if i < 0 || len(k) < i+1+timeKeyLen {
			return fmt.Errorf("input row key %q has no subject and time", k)
		}
		_, _, eff, err := decodeInputHead(v)
		if err != nil {
			return err
		}
		t := k[i+1 : i+1+timeKeyLen]
		if !bytes.Equal(t, appendTimeKey(nil, eff)) {
			return fmt.Errorf("input row %q is not at its effective time %v", k, eff)
		}
		subject, logical := string(k[:i]), k[i+1+timeKeyLen:]
		pl, err := getPlaces(tx, logical)
		if err != nil {
			return err
		}
		if p := pl.timeOf(subject); !bytes.Equal(p, t) {
			return fmt.Errorf("input_place %q of %s → %x, its row is at %x", logical, subject, p, t)
		}
		want = append(want, subjectKey(subject, string(logical)))
		return nil
	})
	if err != nil {
		return err
	}
	err = tx.Bucket(bInputPlace).ForEach(func(k, v []byte) error {
		pl, err := decodePlaces(v)
		if err != nil {
			return err
		}
		if len(pl.list) == 0 {
			return fmt.Errorf("input_place %q holds no place", k)
		}
		for _, p := range pl.list {
			have = append(have, subjectKey(p.subject, string(k)))
		}
		return nil
	})
	if err != nil {
		return err
	}
	slices.SortFunc(have, bytes.Compare)
	if err := sameKeys("input_place", have, want); err != nil {
		return err
	}
	for _, name := range [][]byte{bOldInputAt, bOldInputOwner} {
		if tx.Bucket(name) != nil {
			return fmt.Errorf("bucket %s of schema 4 left behind", name)
		}
	}
	for _, name := range [][]byte{bOldInputs, bOldInputsByTime} {
		if tx.Bucket(name) != nil {
			return fmt.Errorf("bucket %s of schema 3 left behind", name)
		}
	}

	var bySubj, byTime [][]byte
	byKey := map[string]string{}
	err = tx.Bucket(bLedger).ForEach(func(k, v []byte) error {
		en, err := decodeEntry(string(k), v)
		if err != nil {
			return err
		}
		bySubj = append(bySubj, subjectKey(en.Subject, en.Series))
		byTime = append(byTime, ledgerTimeKey(en))
		for _, key := range append([]string{en.Key}, en.Revisions...) {
			byKey[key] = en.Series
		}
		return nil
	})
	if err != nil {
		return err
	}
	if err := sameKeys("ledger_by_subj", keysOf(tx.Bucket(bLedgerBySubj)), bySubj); err != nil {
		return err
	}
	if err := sameKeys("ledger_by_time", keysOf(tx.Bucket(bLedgerByTime)), byTime); err != nil {
		return err
	}
	err = tx.Bucket(bLedgerByKey).ForEach(func(k, v []byte) error {
		if byKey[string(k)] != string(v) {
			return fmt.Errorf("ledger_by_key %q → %q, the ledger says %q", k, v, byKey[string(k)])
		}
		delete(byKey, string(k))
		return nil
	})
	if err != nil {
		return err
	}
	if len(byKey) != 0 {
		return fmt.Errorf("keys missing from ledger_by_key: %v", byKey)
	}

	meta := tx.Bucket(bMeta)
	for _, c := range []struct {
		counter []byte
		bucket  []byte
	}{{kOutboxN, bOutbox}, {kDeadN, bDead}, {kDirtyN, bDirty}} {
		if got, want := getU64(meta, c.counter), uint64(tx.Bucket(c.bucket).Stats().KeyN); got != want {
			return fmt.Errorf("counter %s = %d, bucket %s holds %d", c.counter, got, c.bucket, want)
		}
	}
	feed := tx.Bucket(bFeed)
	if k, _ := feed.Cursor().Last(); k != nil && binary.BigEndian.Uint64(k) != feed.Sequence() {
		return fmt.Errorf("last feed key %d, sequence %d", binary.BigEndian.Uint64(k), feed.Sequence())
	}
	return nil
}

// TestContractReplicas runs the replicas' guarantees on the one handle an
// embedded store has: a process owns the file, so its "replicas" are
// goroutines sharing that handle.
func TestContractReplicas(t *testing.T) {
	storetest.RunReplicas(t, func(t *testing.T) (store.Store, store.Store) {
		s, err := Open(filepath.Join(t.TempDir(), "deadspace.db"), Options{})
		if err != nil {
			t.Fatal(err)
		}
		t.Cleanup(func() { _ = s.Close() })
		return s, s
	})
}
