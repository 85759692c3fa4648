package encode

import (
	"encoding/json"
	"errors"
	"fmt"
	"slices"
	"strings"

	"github.com/samply/golang-fhir-models/fhir-models/fhir"
)

// Activities, from the v3-DataOperation code system that the R4
// ProvenanceActivityType value set includes. It has no "derive" code, so
// derivation is said by entity.role instead.
const (
	activityCreate  = "CREATE"
	activityUpdate  = "UPDATE"
	activityNullify = "NULLIFY"
)

var activityDisplay = map[string]string{
	activityCreate:  "create",
	activityUpdate:  "revise",
	activityNullify: "nullify",
}

// provenance says that the Device assembled targets from the inputs (role
// derivation) and, for an update, from the earlier versions (role
// revision). Its id hashes the activity, the targets' keys and the cited
// references, so writing the same result twice writes the same Provenance.
func (e *Encoder) provenance(targets []fhir.Observation, activity string, inputs, revisions []string, recorded string) (fhir.Provenance, error) {
	if len(targets) == 0 {
		return fhir.Provenance{}, errors.New("provenance: no targets")
	}
	fields := []string{"activity=" + activity}
	p := fhir.Provenance{
		Recorded: recorded,
		Activity: &fhir.CodeableConcept{Coding: []fhir.Coding{{
			System: ptr(systemDataOperation), Code: ptr(activity), Display: ptr(activityDisplay[activity]),
		}}},
		Agent: []fhir.ProvenanceAgent{{
			Type: &fhir.CodeableConcept{Coding: []fhir.Coding{{
				System: ptr(systemParticipant), Code: ptr("assembler"), Display: ptr("Assembler"),
			}}},
			Who: fhir.Reference{Reference: ptr(e.DeviceRef())},
		}},
	}
	for _, o := range targets {
		if o.Id == nil || len(o.Identifier) == 0 || o.Identifier[0].Value == nil {
			return fhir.Provenance{}, errors.New("provenance: target without id or key")
		}
		p.Target = append(p.Target, fhir.Reference{Reference: ptr("Observation/" + *o.Id)})
		fields = append(fields, "target="+*o.Id+" "+*o.Identifier[0].Value)
	}
	for _, r := range sortedUnique(inputs) {
		p.Entity = append(p.Entity, fhir.ProvenanceEntity{
			Role: fhir.ProvenanceEntityRoleDerivation, What: fhir.Reference{Reference: ptr(r)},
		})
		fields = append(fields, "derivation="+r)
	}
	for _, r := range sortedUnique(revisions) {
		p.Entity = append(p.Entity, fhir.ProvenanceEntity{
			Role: fhir.ProvenanceEntityRoleRevision, What: fhir.Reference{Reference: ptr(r)},
		})
		fields = append(fields, "revision="+r)
	}
	d, err := digest("deadspace provenance 1", fields...)
	if err != nil {
		return fhir.Provenance{}, fmt.Errorf("provenance: %w", err)
	}
	p.Id = ptr("dsp-" + strings.TrimPrefix(d, hashPrefix)[:32])
	return p, nil
}

// Revision turns b, freshly encoded after an input changed, into an update
// of Observations that already exist: each Observation gets status amended
// ("modified subsequent to being Final", R4 observation-status), and the
// Provenance gets activity UPDATE plus one entity with role revision for
// each earlier version in previous ("Observation/<id>/_history/<v>"). Every
// previous version must be of one of b's Observations.
func (e *Encoder) Revision(b Bundle, previous []string) (Bundle, error) {
	if len(previous) == 0 {
		return Bundle{}, errors.New("encode revision: no previous versions")
	}
	ids := map[string]bool{}
	for _, o := range b.Observations {
		if o.Id != nil {
			ids[*o.Id] = true
		}
	}
	for _, s := range previous {
		r, err := versioned(s, "Observation")
		if err != nil {
			return Bundle{}, fmt.Errorf("encode revision: %w", err)
		}
		if !ids[r.ID] {
			return Bundle{}, fmt.Errorf("encode revision: %s is not a version of an Observation in this bundle", s)
		}
	}
	out := Bundle{Observations: make([]fhir.Observation, len(b.Observations))}
	for i, o := range b.Observations {
		o.Status = fhir.ObservationStatusAmended
		out.Observations[i] = o
	}
	var inputs []string
	for _, en := range b.Provenance.Entity {
		if en.Role == fhir.ProvenanceEntityRoleDerivation && en.What.Reference != nil {
			inputs = append(inputs, *en.What.Reference)
		}
	}
	var err error
	out.Provenance, err = e.provenance(out.Observations, activityUpdate, inputs, previous, b.Provenance.Recorded)
	if err != nil {
		return Bundle{}, fmt.Errorf("encode revision: %w", err)
	}
	return out, nil
}

// Withdrawal marks a derived Observation as entered-in-error ("should never
// have existed", R4 observation-status), for when an input it was derived
// from is itself entered-in-error. obs is the current stored version; why
// is appended as a note and must not name the patient. The Provenance has
// activity NULLIFY and, when obs.meta.versionId is set, cites that version
// with role revision.
//
// It refuses an Observation that does not carry this encoder's identifier
// system: deadspace withdraws only what it wrote.
func (e *Encoder) Withdrawal(obs fhir.Observation, why string) (Bundle, error) {
	why = strings.TrimSpace(why)
	if why == "" {
		return Bundle{}, errors.New("encode withdrawal: a reason is required")
	}
	if obs.Id == nil || *obs.Id == "" {
		return Bundle{}, errors.New("encode withdrawal: Observation has no id")
	}
	ours := slices.ContainsFunc(obs.Identifier, func(id fhir.Identifier) bool {
		return id.System != nil && *id.System == e.o.IdentifierSystem && id.Value != nil
	})
	if !ours {
		return Bundle{}, fmt.Errorf("encode withdrawal: Observation/%s has no identifier in %s: not derived by deadspace", *obs.Id, e.o.IdentifierSystem)
	}
	issued := e.issued()
	out := obs
	// Copy what is changed so the caller's value is left alone.
	out.Note = append(slices.Clone(obs.Note), fhir.Annotation{
		Text: "Withdrawn by deadspace " + e.o.SoftwareVersion + ": " + why,
	})
	out.Status = fhir.ObservationStatusEnteredInError
	out.Issued = ptr(issued)
	// The key must come first for the Provenance id; put ours there.
	out.Identifier = slices.Clone(obs.Identifier)
	slices.SortStableFunc(out.Identifier, func(a, b fhir.Identifier) int {
		aOurs := a.System != nil && *a.System == e.o.IdentifierSystem
		bOurs := b.System != nil && *b.System == e.o.IdentifierSystem
		switch {
		case aOurs && !bOurs:
			return -1
		case bOurs && !aOurs:
			return 1
		}
		return 0
	})
	var revisions []string
	if obs.Meta != nil && obs.Meta.VersionId != nil {
		r, err := versioned("Observation/"+*obs.Id+"/_history/"+*obs.Meta.VersionId, "Observation")
		if err != nil {
			return Bundle{}, fmt.Errorf("encode withdrawal: %w", err)
		}
		revisions = append(revisions, r.String())
	}
	prov, err := e.provenance([]fhir.Observation{out}, activityNullify, nil, revisions, issued)
	if err != nil {
		return Bundle{}, fmt.Errorf("encode withdrawal: %w", err)
	}
	return Bundle{Observations: []fhir.Observation{out}, Provenance: prov}, nil
}

func numberPtr(s string) *json.Number {
	n := json.Number(s)
	return &n
}

// Subset narrows b to the Observations keep selects, with a Provenance
// (activity CREATE) that cites only what those Observations were derived
// from, plus the Patient when b's Provenance cited one. The live service
// uses it when only some values of a derivation are new: each write then
// says exactly what it carries. It returns ErrNoValues when keep selects
// nothing.
func (e *Encoder) Subset(b Bundle, keep func(fhir.Observation) bool) (Bundle, error) {
	var out Bundle
	var inputs []string
	for _, o := range b.Observations {
		if !keep(o) {
			continue
		}
		out.Observations = append(out.Observations, o)
		for _, r := range o.DerivedFrom {
			if r.Reference != nil {
				inputs = append(inputs, *r.Reference)
			}
		}
	}
	if len(out.Observations) == 0 {
		return Bundle{}, ErrNoValues
	}
	for _, en := range b.Provenance.Entity {
		if en.Role == fhir.ProvenanceEntityRoleDerivation && en.What.Reference != nil && isPatient(*en.What.Reference) {
			inputs = append(inputs, *en.What.Reference)
		}
	}
	var err error
	out.Provenance, err = e.provenance(out.Observations, activityCreate, inputs, nil, b.Provenance.Recorded)
	if err != nil {
		return Bundle{}, fmt.Errorf("encode subset: %w", err)
	}
	return out, nil
}
