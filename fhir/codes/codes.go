// Package codes says which coded FHIR Observations this service reads, and as
// what. Recognition is a data table, not code: each row maps a coding
// (system and code) to a [derive.Kind], or rejects it with a reason, so a
// site can add its local codes or overrule a default without a rebuild.
//
// The default table is embedded from default.json. Its rows are LOINC and
// ISO/IEEE 11073-10101 (MDC) codes seen in published FHIR profiles and code
// lists, mostly the Medizininformatik-Initiative ICU module. Each row's
// "note" names where the code was seen, whether only in a secondary source,
// and what is from memory, because no LOINC code was checked on loinc.org
// and no MDC code against the 11073-10101 nomenclature itself.
// Mixed-expired PCO2 has no default row: no LOINC code for it was found, so
// a site that records it adds its own row with kind "mixed-expired-co2".
//
// # File format
//
// A table file is a JSON object with one member, "rows", an array of rows:
//
//	{"rows": [
//	  {"system": "http://loinc.org", "code": "2019-8", "display": "…",
//	   "kind": "paco2", "priority": 20, "note": "…"},
//	  {"system": "http://loinc.org", "code": "2021-4", "action": "reject",
//	   "reason": "specimen-not-arterial"},
//	  {"system": "http://loinc.org", "code": "9279-1", "action": "ignore"}
//	]}
//
// "action" is "accept" (the default), "reject" or "ignore". An accepted row
// needs a "kind" (a [derive.Kind] name). A rejected row needs a "reason" (a
// [derive.Reason]); Observations with its code are reported as omitted with
// that reason. An "ignore" row in a site file removes the default row with
// the same system and code, so such Observations are unrelated to this
// service. "source" says what an accepted row's code measures (see
// Source below). "co2Basis" ("wet" or "dry") is allowed on expired-gas CO2 rows
// only and overrides the site's default basis for converting a percent to a
// partial pressure (see package units). "panel": true marks the code of a
// panel (an arterial blood gas panel, 24336-0) whose PaCO2 is one of its
// components; it is allowed on accepted paco2 rows only (see package
// decode).
//
// # Priority
//
// Several codes can measure one kind at once: a ventilator sends both the set
// and the measured tidal volume. The decoder does not choose between them: it
// copies the row's priority (higher is preferred) into each item's Priority,
// and the pairing (package derive) keeps, per kind and window, only the
// readings of the highest priority present, reporting the others with
// [derive.ReasonLowerPriority].
// Default priorities: measured expired values 30 (tidal volume) or 20,
// other measurements 20, settings, inspired volumes and partial rates 10–15
// (a delivered, inspired tidal volume 15, above the set one at 10).
// The pairing chooses per window, and a priority below
// [derive.SubstitutePriority] (20) is disclosed in the derived value's note
// as a substitute; a site row keeps to this scale.
//
// # Source
//
// "source" says what a code measures of its kind: "measured",
// "delivered" (or "inspired": a volume measured on the inspired side),
// "set" (a ventilator setting) or "partial-rate" (mechanical-only or
// spontaneous-only breaths). The note on a value computed from a
// substitute names it by its source, never by its priority, and a leak is
// judged between the measured volume and the delivered, inspired or set
// one. A site row without it takes the default row's source for the same
// system and code, else [derive.DefaultSource]: below 20 a tidal volume is
// taken as set, a minute volume as inspired, a rate as partial; anything
// else is measured. A CO2 percentage is marked converted by the decoder,
// whatever its row says.
package codes

import (
	"bytes"
	_ "embed"
	"encoding/json"
	"errors"
	"fmt"
	"io"
	"os"
	"slices"
	"strings"
	"sync"

	"github.com/deadspace-fhir/deadspace/derive"
)

// ConvertedPercentPriority is the highest priority an end-tidal or
// mixed-expired CO2 reading sent as a percentage keeps, whatever its row
// says: turned into a partial pressure with an assumed barometric pressure
// and basis, it is a substitute for a measured partial pressure (the
// priority of the fraction code 19889-5), so it is disclosed and a
// measured pressure in the same window is preferred to it. The decoder
// applies it.
const ConvertedPercentPriority = 10

// Code system URIs.
const (
	LOINC = "http://loinc.org"
	MDC   = "urn:iso:std:iso:11073:10101"
	UCUM  = "http://unitsofmeasure.org"
)

// Action says what the decoder does with an Observation whose coding matches
// a row.
type Action uint8

// The actions. ActionAccept is the zero value, so a row without "action"
// accepts.
const (
	ActionAccept Action = iota
	ActionReject
	ActionIgnore
)

var actionNames = [...]string{ActionAccept: "accept", ActionReject: "reject", ActionIgnore: "ignore"}

// String returns the action's name as written in table files.
func (a Action) String() string {
	if int(a) < len(actionNames) {
		return actionNames[a]
	}
	return fmt.Sprintf("Action(%d)", a)
}

// Row is one recognised coding.
type Row struct {
	System  string
	Code    string
	Display string
	// Kind is what an accepted row measures. Rejected rows may leave it
	// KindUnknown.
	Kind   derive.Kind
	Action Action
	// Reason is set on rejected rows only.
	Reason derive.Reason
	// CO2Basis is "", "wet" or "dry"; "" means the site default.
	CO2Basis string
	// Priority ranks rows of the same kind; higher is preferred.
	Priority int
	// Source says what the code measures of its kind ("source": measured,
	// delivered or inspired, set, partial-rate); it names a substitute in
	// a value's note and decides what a leak is judged against. Unspecified
	// in a site row, it is the default row's for the same code (a site that
	// re-ranks a default code keeps what the code measures), else
	// [derive.DefaultSource] of the kind and priority. A CO2 percentage is
	// marked converted by the decoder whatever the row says.
	Source derive.Source
	// Panel marks a panel's code (an arterial blood gas panel): the value
	// of Kind is read from the panel's components, each recognised by its
	// own row, and the reading cites the panel. Only paco2 rows may be
	// panels.
	Panel bool
	// Broader marks a rejected row whose code is a broader concept than an
	// accepted one (a PCO2 in blood of an unspecified specimen beside an
	// arterial PCO2): a coding of it beside an accepted coding of the same
	// Observation narrows it, and the accepted one decides. Any other
	// rejected coding beside an accepted one contradicts it (a venous PCO2
	// beside an arterial one) and the rejection decides, in any order.
	Broader bool
	// Note records where the code comes from and how sure we are of it.
	Note string
}

// Token returns the row's FHIR search token, "system|code".
func (r Row) Token() string { return r.System + "|" + r.Code }

type key struct{ system, code string }

// Table is an immutable set of rows, keyed by system and code. It is safe for
// concurrent use.
type Table struct {
	rows map[key]Row
}

//go:embed default.json
var defaultJSON []byte

var defaultTable = sync.OnceValue(func() *Table {
	t, err := Parse(bytes.NewReader(defaultJSON))
	if err != nil {
		// The embedded file is tested; reaching this is a build defect.
		panic(fmt.Sprintf("codes: embedded default.json: %v", err))
	}
	return t
})

// Default returns the embedded default table. The same *Table is returned
// on every call; tables are immutable.
func Default() *Table { return defaultTable() }

// LoadFile is Load for a site file by path; an empty path means the
// default table alone. Both commands read the --codes flag through it.
func LoadFile(path string) (*Table, error) {
	if path == "" {
		return Default(), nil
	}
	f, err := os.Open(path)
	if err != nil {
		return nil, fmt.Errorf("codes.LoadFile: %w", err)
	}
	defer f.Close()
	t, err := Load(f)
	if err != nil {
		return nil, fmt.Errorf("%s: %w", path, err)
	}
	return t, nil
}

// Load reads a site table and merges it over the default table, as
// [Table.Merge] describes.
func Load(r io.Reader) (*Table, error) {
	site, err := Parse(r)
	if err != nil {
		return nil, fmt.Errorf("codes.Load: %w", err)
	}
	return Default().Merge(site), nil
}

// Merge returns a new table with the rows of t, overridden and extended by
// the rows of site: a site row replaces the row with the same system and
// code, and a site row with [ActionIgnore] removes it.
func (t *Table) Merge(site *Table) *Table {
	out := &Table{rows: make(map[key]Row, len(t.rows)+len(site.rows))}
	for k, r := range t.rows {
		if r.Action != ActionIgnore {
			out.rows[k] = r
		}
	}
	for k, r := range site.rows {
		if r.Action == ActionIgnore {
			delete(out.rows, k)
			continue
		}
		if def, ok := t.rows[k]; ok && r.Source == derive.SourceUnspecified && def.Kind == r.Kind {
			r.Source = def.Source
		}
		out.rows[k] = r
	}
	return out
}

// Lookup returns the row for a coding. Ignore rows (present only in a table
// from [Parse] that was not merged) are returned too; callers treat them as
// absent.
func (t *Table) Lookup(system, code string) (Row, bool) {
	r, ok := t.rows[key{system, code}]
	return r, ok
}

// Rows returns every row, sorted by system then code.
func (t *Table) Rows() []Row {
	out := make([]Row, 0, len(t.rows))
	for _, r := range t.rows {
		out = append(out, r)
	}
	slices.SortFunc(out, func(a, b Row) int {
		if c := strings.Compare(a.System, b.System); c != 0 {
			return c
		}
		return strings.Compare(a.Code, b.Code)
	})
	return out
}

// Codes returns the distinct code strings of the accepted and rejected rows,
// sorted. A bulk reader uses them to skip lines that cannot be relevant
// without decoding them; rejected codes are included because their lines
// are reported as omissions.
func (t *Table) Codes() []string {
	seen := make(map[string]struct{}, len(t.rows))
	for _, r := range t.rows {
		if r.Action != ActionIgnore {
			seen[r.Code] = struct{}{}
		}
	}
	out := make([]string, 0, len(seen))
	for c := range seen {
		out = append(out, c)
	}
	slices.Sort(out)
	return out
}

// SearchTokens returns "system|code" tokens of the accepted rows of the
// given kinds (of every kind when none is given), sorted, for a FHIR search
// such as Observation?code=a,b. Rejected rows are left out: fetching them
// would only produce omissions.
func (t *Table) SearchTokens(kinds ...derive.Kind) []string {
	var out []string
	for _, r := range t.Rows() {
		if r.Action != ActionAccept {
			continue
		}
		if len(kinds) > 0 && !slices.Contains(kinds, r.Kind) {
			continue
		}
		out = append(out, r.Token())
	}
	return out
}

// fileJSON and rowJSON are the file format. Strings, not typed values, so
// that every bad value can be reported together with its row.
type fileJSON struct {
	Rows json.RawMessage `json:"rows"`
}

type rowJSON struct {
	System   string `json:"system"`
	Code     string `json:"code"`
	Display  string `json:"display"`
	Kind     string `json:"kind"`
	Action   string `json:"action"`
	Reason   string `json:"reason"`
	CO2Basis string `json:"co2Basis"`
	Priority int    `json:"priority"`
	Panel    bool   `json:"panel"`
	Broader  bool   `json:"broader"`
	Source   string `json:"source"`
	Note     string `json:"note"`
}

// Parse reads one table file on its own, without merging it over the
// default. Decoding is strict: an unknown member is an error. Every bad row
// is reported, each with its line, in one joined error.
func Parse(r io.Reader) (*Table, error) {
	data, err := io.ReadAll(r)
	if err != nil {
		return nil, fmt.Errorf("read code table: %w", err)
	}
	dec := json.NewDecoder(bytes.NewReader(data))
	dec.DisallowUnknownFields()
	var f fileJSON
	if err := dec.Decode(&f); err != nil {
		return nil, fmt.Errorf("code table: %w", describe(data, 0, err))
	}
	if dec.More() {
		return nil, fmt.Errorf("code table line %d: data after the table object", lineAt(data, int(dec.InputOffset())))
	}
	if f.Rows == nil {
		return nil, errors.New(`code table: no "rows" member`)
	}
	// The offset of the rows array in data, so row errors can name lines.
	base := bytes.Index(data, f.Rows)
	return parseRows(data, base, f.Rows)
}

func parseRows(data []byte, base int, raw json.RawMessage) (*Table, error) {
	dec := json.NewDecoder(bytes.NewReader(raw))
	dec.DisallowUnknownFields()
	if tok, err := dec.Token(); err != nil || tok != json.Delim('[') {
		return nil, fmt.Errorf("code table line %d: \"rows\" must be an array", lineAt(data, base))
	}
	t := &Table{rows: make(map[key]Row)}
	firstLine := make(map[key]int)
	var errs []error
	for n := 1; dec.More(); n++ {
		start := base + skipSpace(raw, int(dec.InputOffset()))
		var rj rowJSON
		if err := dec.Decode(&rj); err != nil {
			var syn *json.SyntaxError
			if errors.As(err, &syn) {
				return nil, fmt.Errorf("code table: %w", describe(data, start, err))
			}
			errs = append(errs, fmt.Errorf("row %d: %w", n, describe(data, start, err)))
			continue
		}
		line := lineAt(data, start)
		row, rowErrs := rj.row()
		for _, e := range rowErrs {
			errs = append(errs, fmt.Errorf("row %d (line %d, %s|%s): %w", n, line, rj.System, rj.Code, e))
		}
		if len(rowErrs) > 0 {
			continue
		}
		k := key{row.System, row.Code}
		if prev, dup := firstLine[k]; dup {
			errs = append(errs, fmt.Errorf("row %d (line %d, %s|%s): duplicate of the row on line %d", n, line, rj.System, rj.Code, prev))
			continue
		}
		firstLine[k] = line
		t.rows[k] = row
	}
	if err := errors.Join(errs...); err != nil {
		return nil, fmt.Errorf("code table: %w", err)
	}
	return t, nil
}

// row converts and checks one decoded row, returning every problem.
func (rj rowJSON) row() (Row, []error) {
	var errs []error
	r := Row{System: rj.System, Code: rj.Code, Display: rj.Display, CO2Basis: rj.CO2Basis, Priority: rj.Priority, Panel: rj.Panel, Broader: rj.Broader, Note: rj.Note}
	if rj.System == "" {
		errs = append(errs, errors.New(`"system" is required`))
	}
	if rj.Code == "" {
		errs = append(errs, errors.New(`"code" is required`))
	}
	switch rj.Action {
	case "", "accept":
		r.Action = ActionAccept
	case "reject":
		r.Action = ActionReject
	case "ignore":
		r.Action = ActionIgnore
	default:
		errs = append(errs, fmt.Errorf(`"action" must be accept, reject or ignore, got %q`, rj.Action))
	}
	if rj.Kind != "" {
		k, ok := derive.ParseKind(rj.Kind)
		if !ok {
			errs = append(errs, fmt.Errorf(`unknown "kind" %q`, rj.Kind))
		}
		r.Kind = k
	}
	if rj.Reason != "" {
		if !slices.Contains(derive.AllReasons(), derive.Reason(rj.Reason)) {
			errs = append(errs, fmt.Errorf(`unknown "reason" %q`, rj.Reason))
		}
		r.Reason = derive.Reason(rj.Reason)
	}
	switch r.Action {
	case ActionAccept:
		if rj.Kind == "" {
			errs = append(errs, errors.New(`an accepted row needs a "kind"`))
		}
		if rj.Reason != "" {
			errs = append(errs, errors.New(`"reason" is for rejected rows only`))
		}
	case ActionReject:
		if rj.Reason == "" {
			errs = append(errs, errors.New(`a rejected row needs a "reason"`))
		}
	}
	if rj.Broader && r.Action != ActionReject {
		errs = append(errs, errors.New(`"broader" is for rejected rows only`))
	}
	switch rj.CO2Basis {
	case "":
	case "wet", "dry":
		if r.Action != ActionAccept || (r.Kind != derive.KindEtCO2 && r.Kind != derive.KindMixedExpiredCO2) {
			errs = append(errs, errors.New(`"co2Basis" applies only to accepted etco2 and mixed-expired-co2 rows`))
		}
	default:
		errs = append(errs, fmt.Errorf(`"co2Basis" must be wet or dry, got %q`, rj.CO2Basis))
	}
	if rj.Panel && (r.Action != ActionAccept || r.Kind != derive.KindPaCO2) {
		errs = append(errs, errors.New(`"panel" applies only to accepted paco2 rows: a blood gas panel whose PaCO2 is a component`))
	}
	if rj.Source != "" {
		src, ok := derive.ParseSource(rj.Source)
		switch {
		case !ok || src == derive.SourceConvertedPercent:
			errs = append(errs, fmt.Errorf(`"source" must be measured, delivered, inspired, set or partial-rate, got %q (a CO2 percentage is marked converted from its unit)`, rj.Source))
		case r.Action != ActionAccept:
			errs = append(errs, errors.New(`"source" applies only to accepted rows`))
		case !sourceFits(src, r.Kind):
			errs = append(errs, fmt.Errorf(`"source" %q does not apply to kind %q`, rj.Source, rj.Kind))
		}
		r.Source = src
	}
	if rj.Priority < 0 {
		errs = append(errs, fmt.Errorf(`"priority" must not be negative, got %d`, rj.Priority))
	}
	return r, errs
}

// sourceFits reports whether a row of kind k can name source s: delivered
// or inspired for a volume, a setting for a volume or a rate, a partial
// rate for a rate; any kind can be measured.
func sourceFits(s derive.Source, k derive.Kind) bool {
	switch s {
	case derive.SourceMeasured:
		return true
	case derive.SourceInspired:
		return k == derive.KindTidalVolume || k == derive.KindMinuteVolume
	case derive.SourceSet:
		return k == derive.KindTidalVolume || k == derive.KindMinuteVolume || k == derive.KindRespRate
	case derive.SourcePartialRate:
		return k == derive.KindRespRate
	}
	return false
}

// describe adds the line (and, for unknown members, the member's own line)
// to a decoding error. start is where the value being decoded begins.
func describe(data []byte, start int, err error) error {
	var syn *json.SyntaxError
	var typ *json.UnmarshalTypeError
	switch {
	case errors.As(err, &syn):
		return fmt.Errorf("line %d: %w", lineAt(data, start+int(syn.Offset)), err)
	case errors.As(err, &typ):
		return fmt.Errorf("line %d: member %q: %w", lineAt(data, start+int(typ.Offset)), typ.Field, err)
	}
	const prefix = `json: unknown field "`
	if msg := err.Error(); strings.HasPrefix(msg, prefix) {
		name := strings.TrimSuffix(strings.TrimPrefix(msg, prefix), `"`)
		line := lineAt(data, start)
		if i := bytes.Index(data[start:], []byte(`"`+name+`"`)); i >= 0 {
			line = lineAt(data, start+i)
		}
		return fmt.Errorf("line %d: unknown member %q", line, name)
	}
	return fmt.Errorf("line %d: %w", lineAt(data, start), err)
}

func lineAt(data []byte, off int) int {
	off = min(max(off, 0), len(data))
	return 1 + bytes.Count(data[:off], []byte("\n"))
}

func skipSpace(b []byte, i int) int {
	for i < len(b) && (b[i] == ' ' || b[i] == '\t' || b[i] == '\n' || b[i] == '\r' || b[i] == ',') {
		i++
	}
	return i
}
