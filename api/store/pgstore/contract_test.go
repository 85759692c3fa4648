package pgstore

import (
	"testing"

	"github.com/deadspace-fhir/deadspace/api/store"
	"github.com/deadspace-fhir/deadspace/api/store/pgstore/pgtest"
	"github.com/deadspace-fhir/deadspace/api/store/storetest"
)

// TestContract runs the contract every store passes, unchanged, each case
// on an empty schema of its own.
func TestContract(t *testing.T) {
	storetest.Run(t, func(t *testing.T) store.Store {
		return openAs(t, pgtest.NewSchema(t), "contract")
	})
}

// TestContractReplicas runs the guarantees for replicas sharing a store:
// two Stores, as two replicas hold them, on one schema.
func TestContractReplicas(t *testing.T) {
	storetest.RunReplicas(t, func(t *testing.T) (store.Store, store.Store) {
		url := pgtest.NewSchema(t)
		return openAs(t, url, "replica-a"), openAs(t, url, "replica-b")
	})
}

// TestDeadLetterContract runs the operator's dead-letter contract, the one
// the embedded store passes, each case on an empty schema of its own.
func TestDeadLetterContract(t *testing.T) {
	storetest.RunDeadLetters(t, func(t *testing.T) storetest.DeadLetterStore {
		return openAs(t, pgtest.NewSchema(t), "dead-letters")
	})
}
