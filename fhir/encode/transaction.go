package encode

import (
	"crypto/sha256"
	"encoding/hex"
	"encoding/json"
	"errors"
	"fmt"
	"maps"
	"net/url"
	"slices"

	"github.com/samply/golang-fhir-models/fhir-models/fhir"

	"github.com/deadspace-fhir/deadspace/derive"
	fhirref "github.com/deadspace-fhir/deadspace/fhir/ref"
)

// Kinds of a typed [Write].
const (
	WriteCreate   = "create"
	WriteRevise   = "revise"
	WriteWithdraw = "withdraw"
)

// Write is what the live service decided to write for some values of one
// result, in the service's own terms: the derivation or fall they come
// from and the series of the values. It holds no FHIR resource; [Encoder.Plan]
// encodes it when it is sent, with the server's ids as known then.
type Write struct {
	Kind       string             `json:"kind"`
	Subject    string             `json:"subject"`
	Derivation *derive.Derivation `json:"derivation,omitempty"`
	Fall       *derive.Fall       `json:"fall,omitempty"`
	// Series are the series identifier values of the values written, in
	// the order they are sent.
	Series []string `json:"series"`
	// Why is a withdrawal's reason, written into its note; it must not name
	// the patient.
	Why string `json:"why,omitempty"`
}

// ServerRef is the server's id and versionId of one series' Observation,
// as the service last saw them: an update carries If-Match on Version.
// Revises, when set, is the version the write's Provenance cites as the one
// it revises, when that is not Version: a write sent again against the
// versions read after a failed If-Match still revises the versions it was
// made to replace, and keeps the Provenance it was given then.
type ServerRef struct{ ID, Version, Revises string }

// revised is the version a write revises: Revises, or else Version.
func (r ServerRef) revised() string {
	if r.Revises != "" {
		return r.Revises
	}
	return r.Version
}

// TxConfig says how writes address the server.
type TxConfig struct {
	// DeviceRef is the server's reference to the software Device,
	// "Device/<id>", which every resource cites.
	DeviceRef string
	// ProvenanceTagSystem tags each Provenance so its create can be made
	// conditional (R4 Provenance has no identifier).
	ProvenanceTagSystem string
}

// ErrNotOnServer is returned by [Encoder.Plan] for an update of a series
// the server never acknowledged creating.
var ErrNotOnServer = errors.New("the derived Observation was never created on the server")

// Plan is one typed write encoded for sending: Observation entries and the
// Provenance, with every reference already resolved except the Provenance's
// targets of creates, which are resolved by [Plan.Transaction] (to fullUrls
// within one transaction) or [Plan.Provenance] (to the ids the server gave).
type Plan struct {
	kind    string
	series  []string
	keys    []string
	entries []txEntry
	prov    fhir.Provenance
	tag     string
	cfg     TxConfig
	// targets are the series the Provenance cites, in order: those of the
	// entries, and those of entries left out by [Plan.Remaining], whose
	// references are held in done.
	targets []string
	done    map[string]string
}

type txEntry struct {
	FullURL  string          `json:"fullUrl,omitempty"`
	Resource json.RawMessage `json:"resource"`
	Request  txRequest       `json:"request"`
}

type txRequest struct {
	Method      string `json:"method"`
	URL         string `json:"url"`
	IfNoneExist string `json:"ifNoneExist,omitempty"`
	IfMatch     string `json:"ifMatch,omitempty"`
}

// Plan encodes w. A create is a POST conditional on the series identifier:
// whatever the server already holds for the series (a create it committed
// after the service gave up on it, even if that value has since been
// revised) is found instead of added again. A revision or withdrawal is a
// PUT with If-Match on the version the service last saw, so a write the
// server commits late can never overwrite a newer revision; server must
// hold every written series' ServerRef, else the error is ErrNotOnServer.
// Its Provenance cites, with role revision, each series' revised version
// ([ServerRef] Revises, else Version).
func (e *Encoder) Plan(w Write, server map[string]ServerRef, cfg TxConfig) (*Plan, error) {
	if cfg.DeviceRef == "" || cfg.ProvenanceTagSystem == "" {
		return nil, errors.New("encode write: a device reference and a provenance tag system are required")
	}
	if len(w.Series) == 0 {
		return nil, fmt.Errorf("encode write: %w", ErrNoValues)
	}
	b, err := e.resultBundle(w)
	if err != nil {
		return nil, err
	}
	obs := make([]fhir.Observation, len(w.Series))
	for i, s := range w.Series {
		j := slices.IndexFunc(b.Observations, func(o fhir.Observation) bool { return e.identifier(o, e.o.SeriesSystem) == s })
		if j < 0 {
			return nil, fmt.Errorf("encode write: the result has no value of series %s", s)
		}
		obs[i] = b.Observations[j]
	}
	p := &Plan{kind: w.Kind, cfg: cfg}
	switch w.Kind {
	case WriteCreate:
		keep := make(map[string]bool, len(obs))
		for _, o := range obs {
			keep[*o.Id] = true
		}
		if b, err = e.Subset(b, func(o fhir.Observation) bool { return keep[*o.Id] }); err != nil {
			return nil, fmt.Errorf("encode write: %w", err)
		}
		obs = b.Observations
	case WriteRevise, WriteWithdraw:
		var previous []string
		for i, s := range w.Series {
			sr, ok := server[s]
			if !ok || sr.ID == "" {
				return nil, fmt.Errorf("encode write: series %s: %w", s, ErrNotOnServer)
			}
			obs[i].Id = &sr.ID
			obs[i].Meta = nil
			if v := sr.revised(); v != "" {
				previous = append(previous, fhirref.Versioned("Observation/"+sr.ID, v))
			}
		}
		if w.Kind == WriteWithdraw {
			if len(obs) != 1 {
				return nil, errors.New("encode write: a withdrawal carries one value")
			}
			o := obs[0]
			if v := server[w.Series[0]].revised(); v != "" {
				o.Meta = &fhir.Meta{VersionId: &v}
			}
			if b, err = e.Withdrawal(o, w.Why); err != nil {
				return nil, fmt.Errorf("encode write: %w", err)
			}
		} else {
			b = Bundle{Observations: obs, Provenance: b.Provenance}
			// The Provenance must cite only what these values used.
			if b, err = e.Subset(b, func(fhir.Observation) bool { return true }); err != nil {
				return nil, fmt.Errorf("encode write: %w", err)
			}
			if len(previous) > 0 {
				if b, err = e.Revision(b, previous); err != nil {
					return nil, fmt.Errorf("encode write: %w", err)
				}
			}
		}
		obs = b.Observations
	default:
		return nil, fmt.Errorf("encode write: unknown kind %q", w.Kind)
	}
	// The Provenance's targets follow the order of obs; so do the entries.
	for _, o := range obs {
		series := e.identifier(o, e.o.SeriesSystem)
		p.series = append(p.series, series)
		p.keys = append(p.keys, e.identifier(o, e.o.IdentifierSystem))
		if o.Device != nil {
			o.Device = &fhir.Reference{Reference: &cfg.DeviceRef}
		}
		en := txEntry{}
		if w.Kind == WriteCreate {
			o.Id = nil
			en.FullURL = urn(series)
			en.Request = txRequest{Method: "POST", URL: "Observation",
				IfNoneExist: "identifier=" + url.QueryEscape(e.o.SeriesSystem+"|"+series)}
		} else {
			sr := server[series]
			o.Meta = nil
			en.Request = txRequest{Method: "PUT", URL: "Observation/" + sr.ID}
			if sr.Version != "" {
				en.Request.IfMatch = `W/"` + sr.Version + `"`
			}
		}
		raw, err := marshalResource(o)
		if err != nil {
			return nil, fmt.Errorf("encode write: %w", err)
		}
		en.Resource = raw
		p.entries = append(p.entries, en)
	}
	prov := b.Provenance
	p.tag = *prov.Id
	prov.Id = nil
	prov.Meta = &fhir.Meta{Tag: []fhir.Coding{{System: &p.cfg.ProvenanceTagSystem, Code: &p.tag}}}
	for i := range prov.Agent {
		prov.Agent[i].Who = fhir.Reference{Reference: &cfg.DeviceRef}
	}
	p.prov = prov
	p.targets = slices.Clone(p.series)
	return p, nil
}

// resultBundle encodes the whole result a write comes from.
func (e *Encoder) resultBundle(w Write) (Bundle, error) {
	var b Bundle
	var err error
	switch {
	case w.Derivation != nil:
		b, err = e.Derivation(w.Subject, *w.Derivation)
	case w.Fall != nil:
		b, err = e.Fall(w.Subject, *w.Fall)
	default:
		return Bundle{}, errors.New("encode write: neither a derivation nor a fall")
	}
	if err != nil {
		return Bundle{}, fmt.Errorf("encode write: %w", err)
	}
	return b, nil
}

func (e *Encoder) identifier(o fhir.Observation, system string) string {
	for _, id := range o.Identifier {
		if id.System != nil && *id.System == system && id.Value != nil {
			return *id.Value
		}
	}
	return ""
}

// Len is the number of Observations the plan writes.
func (p *Plan) Len() int { return len(p.entries) }

// Observation returns the i-th Observation as the plan writes it.
func (p *Plan) Observation(i int) json.RawMessage { return slices.Clone(p.entries[i].Resource) }

// Remaining returns the plan without the Observations of the series in done
// (series → the server's id of its Observation), which the server already
// holds as this plan writes them: a write that partly landed sends the
// rest. The Provenance is unchanged: it still cites every value, those in
// done by their ids. A plan with every series done has no Observations
// left, only its Provenance.
func (p *Plan) Remaining(done map[string]string) (*Plan, error) {
	out := *p
	out.series, out.keys, out.entries = nil, nil, nil
	out.done = maps.Clone(p.done)
	if out.done == nil {
		out.done = make(map[string]string, len(done))
	}
	for s, id := range done {
		if !slices.Contains(p.series, s) {
			return nil, fmt.Errorf("encode plan: series %s is not one this plan writes", s)
		}
		if id == "" {
			return nil, fmt.Errorf("encode plan: no server id for the value of series %s", s)
		}
		out.done[s] = "Observation/" + id
	}
	for i, s := range p.series {
		if _, ok := done[s]; ok {
			continue
		}
		out.series = append(out.series, s)
		out.keys = append(out.keys, p.keys[i])
		out.entries = append(out.entries, p.entries[i])
	}
	return &out, nil
}

// Series returns the series of the i-th Observation.
func (p *Plan) Series(i int) string { return p.series[i] }

// Key returns the key identifier value of the i-th Observation as written.
func (p *Plan) Key(i int) string { return p.keys[i] }

// Transaction returns a transaction Bundle of the Observations [from, to)
// and, when withProvenance (then the range must be all of them), the
// Provenance as a conditional create whose targets are the Observations'
// fullUrls (creates) or ids (updates), which the server resolves.
func (p *Plan) Transaction(from, to int, withProvenance bool) ([]byte, error) {
	if from < 0 || to > len(p.entries) || from >= to || (withProvenance && (from != 0 || to != len(p.entries))) {
		return nil, fmt.Errorf("encode transaction: bad range [%d, %d) of %d", from, to, len(p.entries))
	}
	entries := slices.Clone(p.entries[from:to])
	if withProvenance {
		targets := make(map[string]string, len(p.entries))
		for i, en := range p.entries {
			if en.FullURL != "" {
				targets[p.series[i]] = en.FullURL
			} else {
				targets[p.series[i]] = en.Request.URL
			}
		}
		raw, err := p.provenance(targets)
		if err != nil {
			return nil, err
		}
		entries = append(entries, txEntry{
			FullURL: urn("Provenance/" + p.tag), Resource: raw,
			Request: txRequest{Method: "POST", URL: "Provenance", IfNoneExist: p.provenanceQuery().Encode()},
		})
	}
	tx, err := appendTransaction(nil, entries)
	if err != nil {
		return nil, fmt.Errorf("encode transaction: %w", err)
	}
	return tx, nil
}

// Provenance returns the Provenance for a conditional create of its own,
// its targets resolved to the server ids of the series (series → id), and
// the If-None-Exist query that makes it conditional.
func (p *Plan) Provenance(ids map[string]string) ([]byte, url.Values, error) {
	targets := make(map[string]string, len(ids))
	for s, id := range ids {
		targets[s] = "Observation/" + id
	}
	raw, err := p.provenance(targets)
	if err != nil {
		return nil, nil, err
	}
	return raw, p.provenanceQuery(), nil
}

func (p *Plan) provenanceQuery() url.Values {
	return url.Values{"_tag": {p.cfg.ProvenanceTagSystem + "|" + p.tag}}
}

// ErrNotAProvenance is returned by [Plan.OwnProvenance] for a resource that
// is not a Provenance (or not JSON): it says nothing about the tag.
var ErrNotAProvenance = errors.New("not a Provenance")

// OwnProvenance reports whether resource, the resource a server gave for
// the plan's Provenance create, is this plan's Provenance: a Provenance
// whose meta.tag carries the plan's tag (system and code). A create
// conditional on the tag that matched one resource is answered 200 with
// that resource (R4 http.html#ccreate), so a 200 says the Provenance is on
// the server only when what matched carries the tag: a server that ignores
// _tag in the condition matches any Provenance it holds. An error
// (wrapping [ErrNotAProvenance]) means resource is not a Provenance.
func (p *Plan) OwnProvenance(resource []byte) (bool, error) {
	var r struct {
		ResourceType string `json:"resourceType"`
		Meta         struct {
			Tag []json.RawMessage `json:"tag"`
		} `json:"meta"`
	}
	if err := json.Unmarshal(resource, &r); err != nil {
		return false, fmt.Errorf("encode provenance: the server's resource: %w: %w", ErrNotAProvenance, err)
	}
	if r.ResourceType != "Provenance" {
		return false, fmt.Errorf("encode provenance: the server's resource: %w", ErrNotAProvenance)
	}
	for _, raw := range r.Meta.Tag {
		// A tag of another shape is another system's, not this plan's.
		var c struct {
			System string `json:"system"`
			Code   string `json:"code"`
		}
		if json.Unmarshal(raw, &c) == nil && c.System == p.cfg.ProvenanceTagSystem && c.Code == p.tag {
			return true, nil
		}
	}
	return false, nil
}

// provenance encodes the Provenance with target i set to the reference of
// the i-th series it cites (the order of the Observations): from targets,
// or for a series already done (see [Plan.Remaining]) its id.
func (p *Plan) provenance(targets map[string]string) ([]byte, error) {
	prov := p.prov
	if len(prov.Target) != len(p.targets) {
		return nil, fmt.Errorf("encode provenance: %d targets for %d values", len(prov.Target), len(p.targets))
	}
	prov.Target = slices.Clone(prov.Target)
	for i, s := range p.targets {
		t, ok := targets[s]
		if !ok {
			t, ok = p.done[s]
		}
		if !ok {
			return nil, fmt.Errorf("encode provenance: no reference for the value of series %s", s)
		}
		prov.Target[i] = fhir.Reference{Reference: &t}
	}
	raw, err := marshalResource(prov)
	if err != nil {
		return nil, fmt.Errorf("encode provenance: %w", err)
	}
	return raw, nil
}

// urn returns a stable urn:uuid for a name, so the same write always uses
// the same fullUrls.
func urn(name string) string {
	h := sha256.Sum256([]byte("deadspace fullUrl\x00" + name))
	h[6] = (h[6] & 0x0f) | 0x50 // version 5 style: name-based
	h[8] = (h[8] & 0x3f) | 0x80
	x := hex.EncodeToString(h[:16])
	return "urn:uuid:" + x[0:8] + "-" + x[8:12] + "-" + x[12:16] + "-" + x[16:20] + "-" + x[20:32]
}

// DeviceCreate returns the software Device without its id, for a create
// conditional on its identifier, and that condition.
func (e *Encoder) DeviceCreate() ([]byte, url.Values, error) {
	d := e.Device()
	d.Id = nil
	if len(d.Identifier) == 0 || d.Identifier[0].System == nil || d.Identifier[0].Value == nil {
		return nil, nil, errors.New("encode device: no identifier")
	}
	raw, err := json.Marshal(d)
	if err != nil {
		return nil, nil, fmt.Errorf("encode device: %w", err)
	}
	return raw, url.Values{"identifier": {*d.Identifier[0].System + "|" + *d.Identifier[0].Value}}, nil
}

// DeviceJSON returns the software Device every derived resource cites.
func (e *Encoder) DeviceJSON() (json.RawMessage, error) {
	raw, err := json.Marshal(e.Device())
	if err != nil {
		return nil, fmt.Errorf("encode device: %w", err)
	}
	return raw, nil
}

// ValueJSON returns the Observation of the value of series in the result w
// comes from (w.Series and w.Kind are ignored), as it stands with status:
// final, amended, or entered-in-error with w.Why as the note. Explanations
// show it.
func (e *Encoder) ValueJSON(w Write, series, status string) (json.RawMessage, error) {
	b, err := e.resultBundle(w)
	if err != nil {
		return nil, err
	}
	j := slices.IndexFunc(b.Observations, func(o fhir.Observation) bool { return e.identifier(o, e.o.SeriesSystem) == series })
	if j < 0 {
		return nil, fmt.Errorf("encode value: the result has no value of series %s", series)
	}
	o := b.Observations[j]
	switch status {
	case "amended":
		o.Status = fhir.ObservationStatusAmended
	case "entered-in-error":
		why := w.Why
		if why == "" {
			why = "withdrawn"
		}
		wb, err := e.Withdrawal(o, why)
		if err != nil {
			return nil, fmt.Errorf("encode value: %w", err)
		}
		o = wb.Observations[0]
	}
	raw, err := json.Marshal(o)
	if err != nil {
		return nil, fmt.Errorf("encode value: %w", err)
	}
	return raw, nil
}
