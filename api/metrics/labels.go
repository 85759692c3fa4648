package metrics

import (
	"slices"
	"strconv"

	"github.com/deadspace-fhir/deadspace/derive"
	"github.com/deadspace-fhir/deadspace/fhir/encode"
)

// other stands in for any label value outside a known set. Hook arguments
// partly come from the wire (a resourceType is whatever the sender wrote),
// so every label goes through a closed set: that keeps the series count
// fixed and makes it impossible for an identifier to become a label.
const other = "other"

// The known label values. A value the engine starts to pass that is not
// listed here is counted under "other" until it is added. Every value a
// label can take, "other" included ([produced]), exists at zero from the
// start.
var (
	// modes are the engine's input modes (webhook.Mode* and the engine's
	// own polling and id-only notification fetches).
	modes = []string{"notification", "notification-id-only", "rest-hook", "rest-hook-put", "poll", "grpc"}
	// resourceTypes are the types the service reads; any other resource
	// type received is counted as "other".
	resourceTypes = []string{"Observation", "Patient"}
	// entryStatuses are the FHIR statuses the engine decides for a derived
	// Observation.
	entryStatuses = []string{"final", "amended", "entered-in-error"}
	// triggers are the reasons the engine searches the server.
	triggers = []string{"start", "poll", "heartbeat-missed", "gap", "subscription-restart", "retry", "rest-hook", "read-deferred"}
	// evaluationData are what an evaluation's new data held: a blood gas,
	// or device readings and patient facts only.
	evaluationData = []string{"blood-gas", "device"}
	// outcomes are what happened to one outbox write attempt; taken-over
	// is an attempt whose replica stalled past its claim on the write, so
	// that another replica took it over and records its outcome.
	outcomes = []string{"acknowledged", "retry", "dead-letter", "taken-over"}
	// operations are the client.Observer operations.
	operations = []string{"read", "vread", "search", "create", "conditional-create", "update", "transaction", "batch"}
	// fhirStatuses are the classes of the FHIR server's answers: 429 on its
	// own (the server asks to slow down), the other codes by class, and
	// "error" when no answer came.
	fhirStatuses = []string{"2xx", "3xx", "4xx", "429", "5xx", "error"}
	// webhookStatuses are the statuses the webhook and its concurrency
	// limit answer with; anything else is "other".
	webhookStatuses = []string{"200", "201", "202", "204", "400", "401", "403", "404", "405", "408", "413", "415", "422", "429", "500", "503"}
)

func codes() []string {
	var out []string
	for _, c := range encode.Codes() {
		out = append(out, string(c))
	}
	return out
}

func reasons() []string {
	var out []string
	for _, r := range derive.AllReasons() {
		out = append(out, string(r))
	}
	return out
}

// set is a closed set of label values.
type set map[string]bool

func newSet(values []string) set {
	s := make(set, len(values))
	for _, v := range values {
		s[v] = true
	}
	return s
}

// of returns v when it is in the set, else "other".
func (s set) of(v string) string {
	if s[v] {
		return v
	}
	return other
}

// produced is every value a set of values gives a label through [set.of]:
// each of them, and "other" for the rest. The series of all of them are
// declared at the start, so the fallback too has a 0 to rise from.
func produced(values []string) []string {
	return append(slices.Clip(values), other)
}

// fhirStatus is the class of a FHIR server's answer (fhirStatuses).
func fhirStatus(code int) string {
	switch {
	case code == 429:
		return "429"
	case code >= 200 && code <= 599:
		return strconv.Itoa(code/100) + "xx"
	}
	return "error"
}
