package encode

import (
	"fmt"

	"github.com/samply/golang-fhir-models/fhir-models/fhir"

	"github.com/deadspace-fhir/deadspace/derive"
)

// Fall encodes one end-tidal CO2 fall or rise of the patient subject
// ("Patient/id") as an Observation whose code is [EpisodeCode], whose value
// is the change from baseline (negative for a fall, positive for a rise) and whose effective period runs from onset to confirmation, and a
// Provenance citing the baseline and episode readings.
//
// The encounter is set as for derived values: only when every cited reading
// has the same one.
func (e *Encoder) Fall(subject string, f derive.Fall) (Bundle, error) {
	id, err := FallIdentity(subject, f)
	if err != nil {
		return Bundle{}, fmt.Errorf("encode fall: %w", err)
	}
	if f.Confirmed.Before(f.Onset) {
		return Bundle{}, fmt.Errorf("encode fall: confirmed %s before onset %s", instant(f.Confirmed), instant(f.Onset))
	}
	cited, err := fallReadings(f)
	if err != nil {
		return Bundle{}, fmt.Errorf("encode fall: %w", err)
	}
	issued := e.issued()
	code := EpisodeCode(f)
	p := precisions[code]
	obs, err := e.observation(id, code, p.Unit, f.Change, subject, cited, issued)
	if err != nil {
		return Bundle{}, fmt.Errorf("encode fall: %w", err)
	}
	obs.EffectivePeriod = &fhir.Period{Start: ptr(instant(f.Onset)), End: ptr(instant(f.Confirmed))}
	obs.Method = &fhir.CodeableConcept{Text: ptr(methodText(
		"Median end-tidal CO2 from onset to confirmation minus the median of the patient's trailing baseline; " +
			"the baseline, threshold and sustain time are the deadspace detector's documented design choices"))}
	baseline, err := formatDecimal(f.Baseline, p.Decimals)
	if err != nil {
		return Bundle{}, fmt.Errorf("encode fall: baseline: %w", err)
	}
	level, err := formatDecimal(f.Level, p.Decimals)
	if err != nil {
		return Bundle{}, fmt.Errorf("encode fall: level: %w", err)
	}
	obs.Note = appendNote(obs.Note, fmt.Sprintf(
		"Baseline %s mm[Hg] (median of %d readings before onset), level %s mm[Hg] (median of %d readings from onset to confirmation).",
		baseline, len(f.BaselineReadings), level, len(f.EpisodeReadings)))
	for _, n := range f.Notes {
		obs.Note = appendNote(obs.Note, n)
	}
	refs := make([]string, 0, len(cited))
	for _, r := range cited {
		refs = append(refs, r.Ref)
	}
	obs.Note = unversionedNote(obs.Note, refs)
	b := Bundle{Observations: []fhir.Observation{obs}}
	b.Provenance, err = e.provenance(b.Observations, activityCreate, refs, nil, issued)
	if err != nil {
		return Bundle{}, fmt.Errorf("encode fall: %w", err)
	}
	return b, nil
}
