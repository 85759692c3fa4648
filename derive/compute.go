package derive

import "time"

// DefaultConfig returns the documented defaults.
func DefaultConfig() Config { panic("not implemented") }

// Validate reports every problem with the configuration at once.
func (c Config) Validate() error { panic("not implemented") }

// Plausible reports whether v is inside the physiological range of kind k,
// and returns the range.
func Plausible(k Kind, v float64) (ok bool, lo, hi float64) { panic("not implemented") }

// Derive computes every value it can for one blood gas. readings are the
// same patient's accepted readings of any kind, sorted by AtMillis; readings
// of KindPaCO2 are ignored.
func Derive(cfg Config, gas Reading, patient Patient, readings []Reading) Derivation {
	panic("not implemented")
}

// DetectFalls finds end-tidal CO2 fall episodes in one patient's EtCO2
// series, sorted by AtMillis.
func DetectFalls(cfg FallConfig, series []Reading) []Fall { panic("not implemented") }

var _ = time.Second
