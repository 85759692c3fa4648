package encode

import (
	"fmt"
	"slices"
	"strings"

	fhirref "github.com/deadspace-fhir/deadspace/fhir/ref"
)

// ref is a parsed relative reference; fhir/ref is the one parser.
type ref = fhirref.Ref

func parseRef(s string) (ref, error) { return fhirref.Parse(s) }

// versioned parses s and requires a version and the given resource type.
func versioned(s, typ string) (ref, error) {
	r, err := parseRef(s)
	if err != nil {
		return ref{}, err
	}
	if r.Type != typ {
		return ref{}, fmt.Errorf("reference %q: want a reference to %s", s, typ)
	}
	if r.Version == "" {
		return ref{}, fmt.Errorf("reference %q has no version: derived values cite the exact version they used", s)
	}
	return r, nil
}

// cited parses a reference to an input and requires the given resource
// type. A version is expected but not required: FHIR R4 makes
// meta.versionId optional, and an input without one is still used and
// cited by its logical reference ([UnversionedNote] goes on the value).
func cited(s, typ string) (ref, error) {
	r, err := parseRef(s)
	if err != nil {
		return ref{}, err
	}
	if r.Type != typ {
		return ref{}, fmt.Errorf("reference %q: want a reference to %s", s, typ)
	}
	return r, nil
}

// UnversionedNote is added to a derived Observation that cites an input
// without a version: the citation then names the resource but not the
// exact content used.
const UnversionedNote = "Cites %d input(s) that carried no version (meta.versionId): the reference names the resource, not the exact version used, so a later change to it is not visible from this record."

// subjectRef checks a subject the decoder keyed (fhir/ref's Key): an
// unversioned reference to a typ, relative ("Patient/p1") or, for a
// resource of a server other than the service's own, absolute
// ("https://other.example/fhir/Patient/p1"). It returns the reference to
// write, which is the subject as given: a FHIR reference may be absolute
// (R4 references.html, literal references).
func subjectRef(s, typ string) (string, error) {
	r, base, err := fhirref.ParseAny(s)
	if err != nil {
		return "", err
	}
	if r.Type != typ || r.Version != "" {
		return "", fmt.Errorf("reference %q: want an unversioned %s/id", s, typ)
	}
	return base + r.Logical(), nil
}

// sortedUnique sorts refs and drops repeats; a reading in two summaries is
// cited once.
func sortedUnique(refs []string) []string {
	out := slices.Clone(refs)
	slices.Sort(out)
	return slices.Compact(out)
}

// noNewline guards the line-based hash input against a field that could
// forge another field.
func noNewline(s string) error {
	if strings.ContainsAny(s, "\n\r") {
		return fmt.Errorf("%q contains a line break", s)
	}
	return nil
}

// isPatient reports whether s is a relative reference to a Patient.
func isPatient(s string) bool {
	r, err := parseRef(s)
	return err == nil && r.Type == "Patient"
}
