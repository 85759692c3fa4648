package derive

// Reason says why an input was not used or a value was not emitted. The
// strings are stable: reviewers count them, metrics label by them and the
// README documents each one.
type Reason string

// Reasons an input is left out. The adapters assign most of these while
// reading resources; they live here so the whole vocabulary is in one place.
const (
	ReasonMalformed      Reason = "resource-malformed"          // not JSON, or not a FHIR resource of the expected type
	ReasonUnrecognised   Reason = "code-not-recognised"         // an Observation this service has no use for
	ReasonStatus         Reason = "status-not-usable"           // status is not final, amended or corrected
	ReasonEnteredInError Reason = "entered-in-error"            // the input was withdrawn
	ReasonNotArterial    Reason = "specimen-not-arterial"       // venous, capillary, unspecified or transcutaneous PCO2
	ReasonNoValue        Reason = "value-absent"                // no valueQuantity (or a dataAbsentReason)
	ReasonCensored       Reason = "value-censored"              // a comparator such as "<" or ">" on the value
	ReasonUnitUnknown    Reason = "unit-not-recognised"         // a unit this service does not know
	ReasonUnitMismatch   Reason = "unit-wrong-dimension"        // a known unit that cannot measure this kind
	ReasonNoTime         Reason = "time-absent"                 // no usable effective time
	ReasonNoSubject      Reason = "subject-absent"              // no Patient subject
	ReasonImplausible    Reason = "value-implausible"           // outside the physiological range of its kind
	ReasonSuperseded     Reason = "version-superseded"          // a newer version of the same resource was seen
	ReasonUnpaired       Reason = "no-blood-gas-nearby"         // a reading in no blood gas's window, and not part of a fall finding
	ReasonLowerPriority  Reason = "preferred-source-present"    // e.g. a set tidal volume where a measured one exists
	ReasonRefiled        Reason = "filed-under-another-patient" // a newer version of the input names another patient
	ReasonWrongUnit      Reason = "value-in-another-unit"       // a CO2 value only plausible in another unit, such as kPa labelled mm[Hg]
	ReasonArtefact       Reason = "etco2-artefact"              // an end-tidal reading that cannot be the patient's end-tidal value then (near zero, or far below its window)
	ReasonTooSparse      Reason = "series-too-sparse"           // an end-tidal series too sparse or gappy for the fall and rise detector to judge
	ReasonPastRetention  Reason = "older-than-retention"        // the live service's retention is over for it: never derived
	ReasonRecoded        Reason = "re-coded"                    // a newer version has a code this service has no use for
	ReasonDeleted        Reason = "deleted"                     // the live service learned that the resource was deleted on the server
	// A blood gas reported twice for one sample (a panel's component and a
	// separate Observation at the same time, the same value): derived once,
	// from the other, which cites it too.
	ReasonSameSample Reason = "same-sample"
	// Blood gases at the same sample time whose values disagree: none is
	// used (inputs and values).
	ReasonSampleDisagrees Reason = "same-sample-disagrees"
	// A separate temperature-adjusted PaCO2 as near to two blood gases:
	// which sample it belongs to cannot be told, so neither uses it.
	ReasonSampleAmbiguous Reason = "sample-ambiguous"
)

// Reasons a derived value is not emitted.
const (
	ReasonMissingInput    Reason = "input-missing"           // a reading the equation needs was not in the window
	ReasonFractionBounds  Reason = "fraction-out-of-bounds"  // a fraction outside [0, 1)
	ReasonPatientFacts    Reason = "patient-facts-missing"   // sex, height or age unknown
	ReasonInconsistent    Reason = "inputs-inconsistent"     // inputs that cannot both be right, such as PĒCO2 above PaCO2
	ReasonNotApplicable   Reason = "not-applicable"          // a measured value made the estimate unnecessary
	ReasonNotAdult        Reason = "patient-not-adult"       // an index defined for adults, for a patient under 18
	ReasonTooFewUsable    Reason = "too-few-usable-readings" // too few readings of the window were usable after artefacts were left out
	ReasonImplausibleVDVT Reason = "fraction-implausible"    // a dead-space fraction (VD/VT) of 0.9 or more: suspect the inputs
)

// AllReasons lists every reason, inputs first, for documentation and for
// metrics that pre-declare their label values.
func AllReasons() []Reason {
	return []Reason{
		ReasonMalformed, ReasonUnrecognised, ReasonStatus, ReasonEnteredInError,
		ReasonNotArterial, ReasonNoValue, ReasonCensored, ReasonUnitUnknown,
		ReasonUnitMismatch, ReasonNoTime, ReasonNoSubject, ReasonImplausible,
		ReasonSuperseded, ReasonUnpaired, ReasonLowerPriority, ReasonRefiled,
		ReasonWrongUnit, ReasonArtefact, ReasonTooSparse, ReasonPastRetention,
		ReasonRecoded, ReasonDeleted, ReasonSameSample, ReasonSampleDisagrees, ReasonSampleAmbiguous,
		ReasonMissingInput, ReasonFractionBounds, ReasonPatientFacts,
		ReasonInconsistent, ReasonNotApplicable, ReasonNotAdult, ReasonTooFewUsable,
		ReasonImplausibleVDVT,
	}
}
