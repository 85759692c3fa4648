// Package ui is the auditor's view: read-only pages that show each
// patient's dead-space picture over time and explain every derived number
// back to its inputs. The pages are built from a view model of their own
// (this file), filled by two adapters: one over the live engine, for
// `deadspace serve --ui-listen`, and one over a replay's outcome, for
// `deadspace replay --html`. The templates never see the engine or the
// pipeline, so both render the same pages from the same model.
package ui

import (
	"time"

	"github.com/deadspace-fhir/deadspace/derive"
)

// Value statuses, as a page shows them. Final and amended are FHIR
// Observation statuses; superseded marks an earlier version of a value a
// later one replaced; withdrawn is FHIR's entered-in-error (for an input,
// also a version deleted on the server or not usable at its source).
// Left out marks an input usable at its source that the derivations left
// out as no blood gas of its own (another report of one sample).
const (
	StatusFinal      = "final"
	StatusAmended    = "amended"
	StatusSuperseded = "superseded"
	StatusWithdrawn  = "withdrawn"
	StatusLeftOut    = "left-out"
)

// Overview is the unit overview: every patient with data.
type Overview struct {
	// Source says where the data came from, e.g. "replay of 4 files".
	Source   string
	Patients []PatientRow
	// LeftOut counts the inputs left out across the unit, by reason.
	LeftOut []ReasonCount
	// NotEmitted counts the values not emitted across the unit, by reason.
	NotEmitted []ReasonCount
}

// PatientRow is one line of the overview.
type PatientRow struct {
	ID string // the Patient id, without "Patient/"
	// LatestGas is the sample time of the latest blood gas with values.
	LatestGas time.Time
	// Latest are that blood gas's values, in display order.
	Latest []Value
	// Findings are the end-tidal CO2 falls and rises still current,
	// latest first.
	Findings []Finding
	LeftOut  []ReasonCount
	// PendingWrites is how many writes to the FHIR server wait for this
	// patient; -1 when it does not apply (a replay, or standalone).
	PendingWrites int
}

// ReasonCount is a reason code and how often it was given.
type ReasonCount struct {
	Reason derive.Reason
	N      int
}

// Value is one derived number as a page shows it.
type Value struct {
	Code  derive.Code
	Label string
	At    time.Time
	Value float64
	// Unit is the UCUM code; Digits how many decimals to show.
	Unit   string
	Digits int
	// Flag is "H", "L", "N" or "".
	Flag     string
	Estimate bool
	Status   string
	// ReplacedBy is the explanation id of the value that replaced this one,
	// and Why says why; both empty for a current value.
	ReplacedBy string
	Why        string
	// ExplainID is the id of this value's explanation ("sha256:…").
	ExplainID string
}

// Finding is one end-tidal CO2 fall, or rise above the baseline. End is
// when its episode ended ([derive.EpisodeEnd]): the first end-tidal reading
// back within the recovery band, the onset of a finding that took its place,
// or, when Ongoing, the last reading so far.
// It is the page's: the written finding covers onset to confirmation.
type Finding struct {
	Rise                  bool
	Onset, Confirmed, End time.Time
	Ongoing               bool
	Baseline, Level       float64
	Change                float64
	Status                string
	ExplainID             string
}

// Point is one input reading on a plot.
type Point struct {
	At    time.Time
	Value float64
	Ref   string
	// Status is final, superseded, withdrawn (an input withdrawn at its
	// source, deleted, or not usable) or left out (a blood gas the
	// derivations left out: another report of one sample).
	Status string
	Why    string
	// ExplainID links a blood gas to its first value's explanation.
	ExplainID string
	// Adjusted is, for a blood gas, the PaCO2 the equations used when it
	// differs from the reported one (at the patient's temperature); 0
	// otherwise.
	Adjusted float64
}

// Shown is the value a page plots and tabulates: the PaCO2 the equations
// used when it was adjusted to the patient's temperature.
func (p Point) Shown() float64 {
	if p.Adjusted != 0 {
		return p.Adjusted
	}
	return p.Value
}

// Timeline is one patient's page.
type Timeline struct {
	ID       string
	From, To time.Time
	EtCO2    []Point
	PaCO2    []Point
	// Values are every derived value of the patient, oldest first;
	// the plot takes the gradient and the dead-space fractions from them.
	Values   []Value
	Findings []Finding
	// Rows are the table under the plot, one per blood gas, oldest first.
	Rows []Row
	// Notes say what the page cannot show, e.g. pruned inputs.
	Notes []string
}

// Row is one blood gas in the timeline's table.
type Row struct {
	At     time.Time
	PaCO2  *Point
	EtCO2  float64 // the paired median, 0 when none
	Values map[derive.Code]Value
}

// Explanation is how one derived value (or fall finding) was made.
type Explanation struct {
	ID        string // the value's key, "sha256:…"
	Series    string
	PatientID string
	Title     string
	At        time.Time
	Value     *Value
	Fall      *Finding
	Equation  string
	Terms     []derive.Term
	Range     string
	// Inputs are every input cited, the blood gas first.
	Inputs   []Input
	Pairings []Pairing
	// LeftOut are inputs near the blood gas that were not taken, and why.
	LeftOut []Omission
	// NotEmitted are the blood gas's values that were not emitted, and why.
	NotEmitted []Omission
	// Patient describes the patient facts used, "" when none were.
	Patient          string
	AlgorithmVersion string
	Notes            []string
	Status           string
	// ReplacedBy is the id of the explanation of the value that replaced
	// this one; Why says why it was replaced or withdrawn.
	ReplacedBy string
	Why        string
	// History lists the value's versions, oldest first, this one included.
	History []Revision
}

// Input is one cited reading, as used and as its source wrote it.
type Input struct {
	Role  string
	Ref   string
	Kind  string
	At    time.Time
	Value float64
	Unit  string
	// Available is false when the store no longer holds the cited version,
	// so the original and the conversion are unknown.
	Available     bool
	OriginalValue string
	OriginalUnit  string
	Conversion    string
}

// Pairing is how the readings of one kind were summarised for a blood gas.
type Pairing struct {
	Kind   string
	Median float64
	Unit   string
	Rule   string
	Refs   []string
	// Substitute says which lower-priority source was used and why.
	Substitute string
	// Artefacts counts readings of the window left out as artefacts.
	Artefacts int
}

// Omission is an input left out or a value not emitted, with the reason.
type Omission struct {
	What   string
	Reason derive.Reason
	Detail string
}

// Revision is one version of a derived value.
type Revision struct {
	ID      string
	Current bool
}

// Operations is the operations page: the service's own state, without
// patient identifiers.
type Operations struct {
	Standalone  bool
	ServerState string
	ServerOK    time.Time
	FailingFor  time.Duration
	OutboxDepth int
	OldestWrite time.Time
	OutboxAge   time.Duration
	Pending     int // patients waiting for evaluation
	DeadLetters []DeadLetter
	DeadCount   int
	Events      []OpEvent
}

// DeadLetter is a write that was given up, identifiers redacted.
type DeadLetter struct {
	At       time.Time
	Attempts int
	Reason   string
	Answer   string
	Values   int
}

// OpEvent is a gap in the notifications or a catch-up.
type OpEvent struct {
	At   time.Time
	What string
}

// HasLeftOut reports whether the timeline plots a blood gas left out (the
// legend then explains its open marker).
func (t Timeline) HasLeftOut() bool {
	for _, p := range t.PaCO2 {
		if p.Status == StatusLeftOut {
			return true
		}
	}
	return false
}
