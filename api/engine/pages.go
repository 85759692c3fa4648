package engine

import (
	"context"
	"fmt"

	"github.com/deadspace-fhir/deadspace/derive"
	"github.com/deadspace-fhir/deadspace/fhir/decode"
)

// StoredReading is one stored input version, as the auditor's pages plot
// it.
type StoredReading struct {
	Reading derive.Reading
	// Usable is false for a version that withdraws or invalidates the
	// input; its Reading then holds only what the decoder kept (the
	// reference and kind, and the time and value when they were readable).
	Usable bool
}

// StoredReadings returns every input the store holds for a patient, in
// the store's order. Only the binary head of each is decoded.
func (e *Engine) StoredReadings(ctx context.Context, subject string) ([]StoredReading, error) {
	stored, err := e.cfg.Store.Inputs(ctx, subject)
	if err != nil {
		return nil, fmt.Errorf("engine: stored readings: %w", err)
	}
	out := make([]StoredReading, 0, len(stored))
	for _, in := range stored {
		h, _, err := decodeHead(in.Payload, in.Logical, in.VersionID)
		if err != nil {
			return nil, fmt.Errorf("engine: stored input %s: %w", in.Logical, err)
		}
		out = append(out, StoredReading{Reading: h.Reading, Usable: h.Type == decode.ItemReading})
	}
	return out, nil
}
