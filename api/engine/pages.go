package engine

import (
	"context"
	"fmt"
	"time"

	"github.com/deadspace-fhir/deadspace/api/pipeline"
	"github.com/deadspace-fhir/deadspace/api/store"
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

// LeftOutInput is one of a patient's stored inputs that the derivations
// leave out, with why.
type LeftOutInput struct {
	// Reading holds the reference (versioned) and kind, and the time and
	// value when they are known: always for a usable reading the
	// derivations left out, and for a version withdrawn at its source when
	// it still carried them ([decode] keeps them for entered-in-error).
	Reading derive.Reading
	Reason  derive.Reason
	Detail  string
}

// LeftOutInputs returns every stored input of the patient that is no part
// of the derivations as the stored data stands, each once, in the store's
// order: the versions withdrawn or not usable at their source, with the
// reason the decoder gave, then what a complete evaluation leaves out (the
// left-out picture's own re-derivation, [Hooks.Evaluated]: artefacts, a
// preferred source present, another report of one sample, readings near
// no blood gas), each placed in time from the stored reading. Nothing is
// committed and the FHIR server is not asked.
func (e *Engine) LeftOutInputs(ctx context.Context, subject string) ([]LeftOutInput, error) {
	var out []LeftOutInput
	var inputs []pipeline.Input
	byRef := make(map[string]derive.Reading)
	var hr headReader
	err := e.scanInputs(ctx, subject, time.Time{}, func(row store.InputRow) error {
		h, _, err := hr.decode(row.Payload, func() string { return versionedRef(row.Logical, row.VersionID) })
		if err != nil {
			return fmt.Errorf("stored input %s: %w", row.Logical, err)
		}
		if h.Type != decode.ItemReading {
			si, err := decodeStored(row.Payload, string(row.Logical), string(row.VersionID))
			if err != nil {
				return fmt.Errorf("stored input %s: %w", row.Logical, err)
			}
			out = append(out, LeftOutInput{Reading: h.Reading, Reason: si.Item.Omission.Reason, Detail: si.Item.Omission.Detail})
			return nil
		}
		inputs = h.appendInputs(inputs)
		byRef[h.Reading.Ref] = h.Reading
		return nil
	})
	if err != nil {
		return nil, fmt.Errorf("engine: left-out inputs: %w", err)
	}
	omitted, err := e.omissionsOf(ctx, subject, inputs)
	if err != nil {
		return nil, fmt.Errorf("engine: left-out inputs: %w", err)
	}
	seen := make(map[derive.Omission]bool, len(omitted))
	for _, o := range omitted {
		if o.Code != "" || seen[o] {
			continue // a value not emitted; or a reading the resource carries besides, left out alike
		}
		seen[o] = true
		r, ok := byRef[o.Ref]
		if !ok {
			r = derive.Reading{Ref: o.Ref}
		}
		out = append(out, LeftOutInput{Reading: r, Reason: o.Reason, Detail: o.Detail})
	}
	return out, nil
}
