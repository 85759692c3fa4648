// Package derive computes the dead-space picture of a ventilated patient from
// plain values: the arterial to end-tidal CO2 difference, the alveolar,
// physiologic (Enghoff) and airway (Bohr) dead-space fractions, dead-space
// volume, alveolar minute ventilation, the ventilatory ratio, an estimated
// VD/VT when no expired CO2 is measured, and falls of end-tidal CO2 below the
// patient's own baseline.
//
// The package is pure on purpose: it imports only the standard library, does
// no I/O and knows nothing of FHIR, so every number it produces can be checked
// against published worked examples without a server, a clock or a network.
// Adapters (package fhir) turn resources into [Reading] values in the
// canonical units documented on each [Kind], and turn a [Derivation] back
// into resources.
//
// Every result carries what it was computed from, the equation and its
// published source, and the intermediate terms, so a reviewer can audit it.
// Everything that is not computed carries a [Reason].
package derive
