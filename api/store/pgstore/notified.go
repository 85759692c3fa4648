package pgstore

import (
	"context"
	"time"

	"github.com/deadspace-fhir/deadspace/api/store"
)

// PutNotified runs PutInputs and then SeenEvent, in two transactions: the
// counter's row lock, held through the input transaction, would serialise
// every delivery of a subscription across all replicas for as long as the
// inputs take to write. Inputs first keeps the counter from running ahead
// of the content.
func (s *Store) PutNotified(ctx context.Context, inputs []store.Input, now time.Time, subscription string, number uint64) ([]store.PutResult, uint64, error) {
	results, err := s.PutInputs(ctx, inputs, now)
	if err != nil {
		return nil, 0, err
	}
	prev, err := s.SeenEvent(ctx, subscription, number)
	if err != nil {
		return nil, 0, err
	}
	return results, prev, nil
}
