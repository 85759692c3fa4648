package encode

import "fmt"

// Keys returns the identifier key of each value the write carries, by
// series: what [Encoder.Plan] writes as the Observation's identifier, without
// encoding it.
func (w Write) Keys() (map[string]string, error) {
	all := make(map[string]string)
	switch {
	case w.Derivation != nil:
		for _, v := range w.Derivation.Values {
			id, err := ValueIdentity(*w.Derivation, v)
			if err != nil {
				return nil, fmt.Errorf("write keys: %w", err)
			}
			all[id.Series] = id.Key
		}
	case w.Fall != nil:
		id, err := FallIdentity(w.Subject, *w.Fall)
		if err != nil {
			return nil, fmt.Errorf("write keys: %w", err)
		}
		all[id.Series] = id.Key
	}
	keys := make(map[string]string, len(w.Series))
	for _, s := range w.Series {
		k, ok := all[s]
		if !ok {
			return nil, fmt.Errorf("write keys: the write has no value of series %s", s)
		}
		keys[s] = k
	}
	return keys, nil
}

// Current reports whether the write carries what the ledger now records
// for a series, given the entry's key and status: the same value (key),
// withdrawn or not alike. A write that does not is superseded for that
// series: a later write carries its current value, and sending this one
// after it would put an older value back on the server.
func (w Write) Current(keys map[string]string, series, key, status string) bool {
	return keys[series] == key && (w.Kind == WriteWithdraw) == (status == statusWithdrawn)
}

// statusWithdrawn is the status of a withdrawn value's Observation, and of
// its ledger entry.
const statusWithdrawn = "entered-in-error"
