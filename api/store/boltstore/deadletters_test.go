package boltstore_test

import (
	"path/filepath"
	"testing"

	"github.com/deadspace-fhir/deadspace/api/store/boltstore"
	"github.com/deadspace-fhir/deadspace/api/store/storetest"
)

func TestDeadLetterContract(t *testing.T) {
	storetest.RunDeadLetters(t, func(t *testing.T) storetest.DeadLetterStore {
		s, err := boltstore.Open(filepath.Join(t.TempDir(), "deadspace.db"), boltstore.Options{})
		if err != nil {
			t.Fatal(err)
		}
		t.Cleanup(func() { s.Close() })
		return s
	})
}
