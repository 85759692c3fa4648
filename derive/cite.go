package derive

import "fmt"

// EachCitedSummary calls use with each summary whose readings v, one of
// d.Values, cites besides the blood gas itself: first every summary of
// [KindPaCO2] (the other reports of the blood gas's sample, which every
// value cites, whatever its equation uses), then the summaries of each
// other kind v uses, in v.Inputs order. This is the one rule of what a
// value cites: the encoder's derivedFrom and Provenance, Explain and the
// pages all take a value's inputs from it. It stops at the first error use
// returns, and fails when it reaches a kind v uses that d has no summary
// for.
func (d Derivation) EachCitedSummary(v Value, use func(Summary) error) error {
	for _, s := range d.Used {
		if s.Kind == KindPaCO2 {
			if err := use(s); err != nil {
				return err
			}
		}
	}
	for _, k := range v.Inputs {
		if k == KindPaCO2 {
			continue // the blood gas itself, and its other reports above
		}
		found := false
		for _, s := range d.Used {
			if s.Kind != k {
				continue
			}
			found = true
			if err := use(s); err != nil {
				return err
			}
		}
		if !found {
			return fmt.Errorf("%s cites input %s, but the derivation has no summary of it", v.Code, k)
		}
	}
	return nil
}

// CitedSummaries returns the summaries [Derivation.EachCitedSummary]
// visits, in its order; on an error, those found before it.
func (d Derivation) CitedSummaries(v Value) ([]Summary, error) {
	var out []Summary
	err := d.EachCitedSummary(v, func(s Summary) error { out = append(out, s); return nil })
	return out, err
}
