package encode

import (
	"crypto/sha256"
	"encoding/hex"
	"fmt"
	"slices"
	"strconv"
	"strings"
	"time"

	"github.com/deadspace-fhir/deadspace/derive"
)

// Identity holds the two identifier values of one derived Observation.
type Identity struct {
	// Key is identifier[0].value: "sha256:" and the hex digest of the
	// algorithm version, the output code and the sorted versioned references
	// of every input used (the blood gas, every reading cited, and the
	// Patient when the value used the patient's sex or age). An input
	// without a version (no meta.versionId) is cited by its reference and
	// what the value used of it (citation). It changes whenever any input
	// version or the rules change.
	Key string
	// Series is identifier[1].value: "sha256:" and the hex digest of the
	// output code and the unversioned blood gas reference (for a fall, the
	// patient and the onset time). It stays the same across corrections of
	// the inputs.
	Series string
}

// ID returns the resource id of the Observation: "ds-" and the first 32 hex
// digits of the series digest. It follows the series, not the key, so an
// updated derivation overwrites its earlier version instead of standing
// beside it.
func (id Identity) ID() string { return seriesID(id.Series) }

func seriesID(series string) string {
	return "ds-" + strings.TrimPrefix(series, "sha256:")[:32]
}

const hashPrefix = "sha256:"

// digest hashes one field per line. The first line names the scheme, so a
// future change of the layout can never collide with today's digests.
func digest(scheme string, fields ...string) (string, error) {
	var h hashInput
	h.start(scheme)
	for _, f := range fields {
		h.field("", f)
	}
	return h.sum()
}

// hashInput gathers the lines of a digest: every evaluation computes the
// identifiers of every value it derives, so the lines are written into
// one buffer (on the stack unless they outgrow it), each field as its name
// and value, rather than built as a string each.
type hashInput struct {
	stack [512]byte
	n     int // bytes of stack used; -1 once b holds the lines
	b     []byte
	err   error
}

func (h *hashInput) start(scheme string) { h.field("", scheme) }

// field adds the line name+value; a line break in it is an error, the
// first one reported.
func (h *hashInput) field(name, value string) {
	if h.err != nil {
		return
	}
	if hasLineBreak(name) || hasLineBreak(value) {
		h.err = fmt.Errorf("identity field: %w", noNewline(name+value))
		return
	}
	if need := len(name) + len(value) + 1; h.n >= 0 && h.n+need <= len(h.stack) {
		h.n += copy(h.stack[h.n:], name)
		h.n += copy(h.stack[h.n:], value)
		h.stack[h.n] = '\n'
		h.n++
		return
	} else if h.n >= 0 {
		h.b = append(make([]byte, 0, 2*(h.n+need)), h.stack[:h.n]...)
		h.n = -1
	}
	h.b = append(h.b, name...)
	h.b = append(h.b, value...)
	h.b = append(h.b, '\n')
}

// hasLineBreak is noNewline's test, by the byte search the runtime
// speeds up (strings.ContainsAny walks the string a byte at a time).
func hasLineBreak(s string) bool {
	return strings.IndexByte(s, '\n') >= 0 || strings.IndexByte(s, '\r') >= 0
}

// sum returns "sha256:" and the hex digest of the lines.
func (h *hashInput) sum() (string, error) {
	if h.err != nil {
		return "", h.err
	}
	lines := h.b
	if h.n >= 0 {
		lines = h.stack[:h.n]
	}
	d := sha256.Sum256(lines)
	var out [len(hashPrefix) + 2*sha256.Size]byte
	copy(out[:], hashPrefix)
	hex.Encode(out[len(hashPrefix):], d[:])
	return string(out[:]), nil
}

// ValueIdentity computes both identifiers of the Observation that encodes v,
// one of d.Values, without encoding it. It fails when a cited reference is
// malformed, or when v cites an input kind d has no summary
// for.
func ValueIdentity(d derive.Derivation, v derive.Value) (Identity, error) {
	gas, err := cited(d.Gas.Ref, "Observation")
	if err != nil {
		return Identity{}, fmt.Errorf("blood gas: %w", err)
	}
	var buf [48]string
	refs := buf[:0]
	if err := eachValueReading(d, v, func(r derive.Reading) { refs = append(refs, citation(r)) }); err != nil {
		return Identity{}, err
	}
	if v.UsesPatient {
		p, err := cited(d.Patient.Ref, "Patient")
		if err != nil {
			return Identity{}, fmt.Errorf("%s uses the patient: %w", v.Code, err)
		}
		refs = append(refs, patientCitation(p, d.Patient))
	}
	key, err := valueKey(v.Code, refs)
	if err != nil {
		return Identity{}, err
	}
	series, err := gasSeries(v.Code, gas)
	if err != nil {
		return Identity{}, err
	}
	return Identity{Key: key, Series: series}, nil
}

// GasSeries returns the series identifier value of the Observation for code
// derived from the blood gas gasRef, versioned or not. The live service uses
// it to find what it derived from a blood gas that has since been amended.
func GasSeries(code derive.Code, gasRef string) (string, error) {
	r, err := parseRef(gasRef)
	if err != nil {
		return "", fmt.Errorf("blood gas: %w", err)
	}
	if r.Type != "Observation" {
		return "", fmt.Errorf("blood gas %q: want an Observation", gasRef)
	}
	return gasSeries(code, r)
}

// ObservationID returns the resource id of the Observation whose series
// identifier value is series, as [Identity.ID] does.
func ObservationID(series string) (string, error) {
	hexPart, ok := strings.CutPrefix(series, hashPrefix)
	if !ok || len(hexPart) != 2*sha256.Size {
		return "", fmt.Errorf("series %q: want sha256: and 64 hex digits", series)
	}
	if _, err := hex.DecodeString(hexPart); err != nil {
		return "", fmt.Errorf("series %q: %w", series, err)
	}
	return seriesID(series), nil
}

func gasSeries(code derive.Code, gas ref) (string, error) {
	if _, ok := precisions[code]; !ok {
		return "", fmt.Errorf("unknown code %q", code)
	}
	var h hashInput
	h.start("deadspace value series 1")
	h.field("code=", string(code))
	h.field("gas=", gas.Type+"/"+gas.ID)
	return h.sum()
}

// valueKey is the key digest of a value of code citing refs, which it
// sorts in place.
func valueKey(code derive.Code, refs []string) (string, error) {
	if _, ok := precisions[code]; !ok {
		return "", fmt.Errorf("unknown code %q", code)
	}
	var h hashInput
	h.start("deadspace value key 1")
	h.field("algorithm=", derive.AlgorithmVersion)
	h.field("code=", string(code))
	slices.Sort(refs)
	for _, r := range slices.Compact(refs) {
		h.field("input=", r)
	}
	return h.sum()
}

// citation is how a cited reading enters a key: its versioned reference,
// or, for a reading of a resource without a version, its reference and
// what it said (kind, time and value). Two versions of such a resource
// share one reference, and the key must still tell them apart: the live
// service and replay keep the same one of two such versions in whatever
// order they arrive (fhir/ref's Compare), and the key says which, so a
// value derived from the other is replaced and not taken as recorded.
func citation(r derive.Reading) string {
	if strings.Contains(r.Ref, "/_history/") {
		return r.Ref
	}
	return r.Ref + "#" + r.Kind.String() + "@" + strconv.FormatInt(r.AtMillis, 10) + "=" + strconv.FormatFloat(r.Value, 'g', -1, 64)
}

// patientCitation is citation for the Patient a value used: its versioned
// reference, or without a version its reference and the facts used.
func patientCitation(r ref, p derive.Patient) string {
	if r.Version != "" {
		return r.String()
	}
	birth := ""
	if !p.BirthDate.IsZero() {
		birth = p.BirthDate.UTC().Format(time.DateOnly)
	}
	return r.String() + "#" + strconv.Itoa(int(p.Sex)) + "@" + birth
}

// FallIdentity computes both identifiers of the Observation that encodes f
// for the patient subject ("Patient/id").
func FallIdentity(subject string, f derive.Fall) (Identity, error) {
	s, err := subjectRef(subject, "Patient")
	if err != nil {
		return Identity{}, fmt.Errorf("subject: %w", err)
	}
	used, err := fallReadings(f)
	if err != nil {
		return Identity{}, err
	}
	refs := make([]string, 0, len(used))
	for _, r := range used {
		refs = append(refs, citation(r))
	}
	key, err := valueKey(EpisodeCode(f), refs)
	if err != nil {
		return Identity{}, err
	}
	series, err := episodeSeries(s, EpisodeCode(f), f.Onset)
	if err != nil {
		return Identity{}, err
	}
	return Identity{Key: key, Series: series}, nil
}

// FallSeries returns the series identifier value of the fall that began at
// onset for the patient subject.
func FallSeries(subject string, onset time.Time) (string, error) {
	return episodeSeries(subject, derive.CodeEtCO2Drop, onset)
}

// EpisodeCode is the code of a fall or rise finding.
func EpisodeCode(f derive.Fall) derive.Code {
	if f.Rise {
		return derive.CodeEtCO2Rise
	}
	return derive.CodeEtCO2Drop
}

// episodeSeries is the series of a fall (code etco2-drop-from-baseline, the
// same digest as before rises existed) or a rise.
func episodeSeries(subject string, code derive.Code, onset time.Time) (string, error) {
	s, err := subjectRef(subject, "Patient")
	if err != nil {
		return "", fmt.Errorf("subject: %w", err)
	}
	if onset.IsZero() {
		return "", fmt.Errorf("fall has no onset time")
	}
	return digest("deadspace fall series 1", "code="+string(code),
		"subject="+s, "onset="+onset.UTC().Format(time.RFC3339Nano))
}

// valueReadings returns the blood gas and every reading of the summaries v
// cites ([derive.Derivation.EachCitedSummary]: the other reports of the blood
// gas's sample, then the kinds v used), each checked to be a versioned
// Observation reference.
func valueReadings(d derive.Derivation, v derive.Value) ([]derive.Reading, error) {
	var out []derive.Reading
	if err := eachValueReading(d, v, func(r derive.Reading) { out = append(out, r) }); err != nil {
		return nil, err
	}
	return out, nil
}

// eachValueReading calls use with each reading valueReadings returns, in
// its order, without gathering them.
func eachValueReading(d derive.Derivation, v derive.Value, use func(derive.Reading)) error {
	if _, err := cited(d.Gas.Ref, "Observation"); err != nil {
		return fmt.Errorf("blood gas: %w", err)
	}
	use(d.Gas)
	return d.EachCitedSummary(v, func(s derive.Summary) error {
		for _, r := range s.Readings {
			if _, err := cited(r.Ref, "Observation"); err != nil {
				if s.Kind == derive.KindPaCO2 {
					return fmt.Errorf("%s: another report of the blood gas: %w", v.Code, err)
				}
				return fmt.Errorf("%s input %s: %w", v.Code, s.Kind, err)
			}
			use(r)
		}
		return nil
	})
}

// fallReadings returns every reading a fall cites, each checked.
func fallReadings(f derive.Fall) ([]derive.Reading, error) {
	out := make([]derive.Reading, 0, len(f.BaselineReadings)+len(f.EpisodeReadings))
	for _, set := range [][]derive.Reading{f.BaselineReadings, f.EpisodeReadings} {
		for _, r := range set {
			if _, err := cited(r.Ref, "Observation"); err != nil {
				return nil, fmt.Errorf("fall reading: %w", err)
			}
			out = append(out, r)
		}
	}
	if len(f.EpisodeReadings) == 0 {
		return nil, fmt.Errorf("fall cites no episode readings")
	}
	return out, nil
}
