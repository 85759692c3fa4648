package replay

import (
	"encoding/json"
	"fmt"
	"io"
	"sort"
	"strconv"
	"strings"
	"text/tabwriter"

	"github.com/deadspace-fhir/deadspace/derive"
	"github.com/deadspace-fhir/deadspace/fhir/encode"
)

// WriteNDJSON writes the software Device once, then each result's
// Observations followed by its Provenance, one resource a line.
func WriteNDJSON(w io.Writer, out Outcome) error {
	if err := encode.MarshalNDJSON(w, out.Device); err != nil {
		return fmt.Errorf("replay: write device: %w", err)
	}
	for _, r := range out.Report.Results {
		if err := encode.MarshalNDJSON(w, r.Bundle.Resources()...); err != nil {
			return fmt.Errorf("replay: write results: %w", err)
		}
	}
	return nil
}

// decimalsOf is how many decimals the encoder writes for code, so the
// table shows each value as the record holds it.
func decimalsOf(code derive.Code) int {
	p, _ := encode.PrecisionOf(code)
	return p.Decimals
}

// tableColumns are the values shown in the table, in order.
var tableColumns = []struct {
	code   derive.Code
	header string
}{
	{derive.CodeGradient, "Pa-etCO2 mmHg"},
	{derive.CodeAlveolarFraction, "VDalv/VT"},
	{derive.CodePhysiologic, "VD/VT"},
	{derive.CodeEstimatedFraction, "VD/VT est"},
	{derive.CodeAirwayFraction, "VDaw/VT"},
	{derive.CodeDeadSpaceVolume, "VD mL"},
	{derive.CodeAlveolarVent, "VA L/min"},
	{derive.CodeVentilatoryRatio, "VR"},
}

// tableLegend explains the table's marks; each threshold is in the
// README's thresholds table with its source and population.
const tableLegend = `
Fractions (VDalv/VT, VD/VT, VDaw/VT, VR) have no unit; pressures are in mm[Hg] (mmHg).
Flags: H high, L low, N is not shown; no flag means no published threshold applies.
  Pa-etCO2 H: above 5 mm[Hg] (Malley 2005, adults). VD/VT H: 0.60 or more (Kallet 2014, ventilated adults with ARDS).
  VR H: above 2 (ROSE trial secondary analysis, adults with ARDS). A negative Pa-etCO2 is never flagged.
PaCO2 T: the value at the patient's temperature (reported, or adjusted from 37 °C); the record's note says which.
Rows: each patient's blood gases and end-tidal CO2 findings in time order.
`

// WriteTable prints one row per blood gas and per fall finding: the time,
// the patient, the inputs' medians, the values, and why anything was left
// out. It is for people; the NDJSON output is for systems.
func WriteTable(w io.Writer, out Outcome) error {
	tw := tabwriter.NewWriter(w, 0, 0, 2, ' ', 0)
	head := []string{"sample time (UTC)", "patient", "PaCO2 mmHg", "EtCO2 mmHg"}
	for _, c := range tableColumns {
		head = append(head, c.header)
	}
	head = append(head, "notes")
	fmt.Fprintln(tw, strings.Join(head, "\t"))

	omittedByGas := make(map[string][]derive.Omission)
	for _, o := range out.Report.Values {
		omittedByGas[o.Ref] = append(omittedByGas[o.Ref], o)
	}
	for _, r := range out.Report.Results {
		row := []string{r.Time().Format("2006-01-02 15:04"), strings.TrimPrefix(r.Subject, "Patient/")}
		if r.Fall != nil {
			row = append(row, "-", fmt.Sprintf("%.1f→%.1f", r.Fall.Baseline, r.Fall.Level))
			for range tableColumns {
				row = append(row, "")
			}
			what := "fall"
			if r.Fall.Rise {
				what = "rise"
			}
			row = append(row, fmt.Sprintf("EtCO2 %s %+.1f mm[Hg] from baseline, confirmed %s", what, r.Fall.Change, r.Fall.Confirmed.Format("15:04")))
			fmt.Fprintln(tw, strings.Join(row, "\t"))
			continue
		}
		d := r.Derivation
		pa := strconv.FormatFloat(d.PaCO2, 'f', 1, 64)
		if d.PaCO2 != d.Gas.Value {
			pa += " T"
		}
		row = append(row, pa, median(d, derive.KindEtCO2))
		values := make(map[derive.Code]derive.Value)
		for _, v := range d.Values {
			values[v.Code] = v
		}
		for _, c := range tableColumns {
			if v, ok := values[c.code]; ok {
				row = append(row, strconv.FormatFloat(v.Value, 'f', decimalsOf(c.code), 64)+flag(v.Flag))
			} else {
				row = append(row, "-")
			}
		}
		row = append(row, notes(omittedByGas[d.Gas.Ref]))
		fmt.Fprintln(tw, strings.Join(row, "\t"))
	}
	// Blood gases that produced nothing at all still get a row, so the
	// table accounts for every arterial sample.
	for _, ref := range gasesWithoutResult(out) {
		fmt.Fprintf(tw, "%s\t%s\t%s\n", "-", ref, "no values: "+notes(omittedByGas[ref]))
	}
	if err := tw.Flush(); err != nil {
		return err
	}
	if len(out.Report.Results) == 0 && len(out.Report.Values) == 0 {
		_, err := fmt.Fprintln(w, "\nNothing to derive: no arterial blood gas in the input (see the summary for what was read and left out).")
		return err
	}
	_, err := fmt.Fprint(w, tableLegend)
	return err
}

func gasesWithoutResult(out Outcome) []string {
	have := make(map[string]bool)
	for _, r := range out.Report.Results {
		if r.Derivation != nil {
			have[r.Derivation.Gas.Ref] = true
		}
	}
	var refs []string
	seen := make(map[string]bool)
	for _, o := range out.Report.Values {
		if !have[o.Ref] && !seen[o.Ref] {
			seen[o.Ref] = true
			refs = append(refs, o.Ref)
		}
	}
	sort.Strings(refs)
	return refs
}

func median(d *derive.Derivation, k derive.Kind) string {
	for _, s := range d.Used {
		if s.Kind == k {
			return strconv.FormatFloat(s.Median, 'f', 1, 64)
		}
	}
	return "-"
}

func flag(f derive.Flag) string {
	switch f {
	case derive.FlagHigh:
		return " H"
	case derive.FlagLow:
		return " L"
	}
	return ""
}

// notes summarises omitted values by reason, leaving out the expected
// "not applicable" of the estimate when a measured VD/VT exists. The NDJSON
// output and the explain API carry the detail; a table row stays readable.
func notes(om []derive.Omission) string {
	var order []derive.Reason
	byReason := make(map[derive.Reason][]string)
	for _, o := range om {
		if o.Reason == derive.ReasonNotApplicable {
			continue
		}
		if _, ok := byReason[o.Reason]; !ok {
			order = append(order, o.Reason)
		}
		byReason[o.Reason] = append(byReason[o.Reason], string(o.Code))
	}
	parts := make([]string, 0, len(order))
	for _, r := range order {
		parts = append(parts, fmt.Sprintf("%s (%d): %s", r, len(byReason[r]), strings.Join(shortCodes(byReason[r]), ", ")))
	}
	return strings.Join(parts, "; ")
}

// shortCodes drops the words every dead-space code shares, so a row of
// omissions fits a terminal.
func shortCodes(cs []string) []string {
	out := make([]string, len(cs))
	for i, c := range cs {
		c = strings.TrimSuffix(c, "-dead-space-fraction")
		c = strings.TrimPrefix(c, "physiologic-dead-space-")
		out[i] = c
	}
	return out
}

// WriteSummary prints the counts a reviewer needs to see that nothing was
// lost: lines and resources read, results written, and every input and
// value left out, by reason.
func WriteSummary(w io.Writer, out Outcome) error {
	var gases, falls, rises, values int
	for _, r := range out.Report.Results {
		switch {
		case r.Fall != nil && r.Fall.Rise:
			rises++
		case r.Fall != nil:
			falls++
		default:
			gases++
		}
		values += len(r.Bundle.Observations)
	}
	types := make([]string, 0, len(out.Resources))
	for t := range out.Resources {
		types = append(types, t)
	}
	sort.Strings(types)
	var read []string
	for _, t := range types {
		read = append(read, fmt.Sprintf("%s %d", t, out.Resources[t]))
	}
	fmt.Fprintf(w, "read %d lines (%s), skipped %d\n", out.Lines, strings.Join(read, ", "), len(out.Skipped))
	fmt.Fprintf(w, "derived: %d blood gases, end-tidal CO2 falls %d and rises %d; wrote %d Observations, %d Provenance, 1 Device\n", gases, falls, rises, values, len(out.Report.Results))
	if gases == 0 && len(out.Report.Values) == 0 {
		fmt.Fprintln(w, "nothing to derive: the input holds no usable arterial blood gas")
	}
	if d := out.Report.Deletions; d.Listed > 0 {
		fmt.Fprintf(w, "deleted: %d listed in Bundles of DELETE entries; %d applied (the resource is left out), %d older than a version read (kept), %d never read (nothing to do)\n",
			d.Listed, d.Applied, d.Older, d.NotHeld)
	}
	rc := ReasonCounts(out.Report.Inputs)
	if n := out.Report.Unrecognised; n > 0 {
		rc = append([]ReasonCount{{derive.ReasonUnrecognised, n}}, rc...)
	}
	if len(rc) > 0 {
		fmt.Fprintln(w, "inputs left out:")
		for _, c := range rc {
			fmt.Fprintf(w, "  %-26s %d\n", c.Reason, c.N)
		}
	}
	if rc := ReasonCounts(out.Report.Values); len(rc) > 0 {
		fmt.Fprintln(w, "values not emitted:")
		for _, c := range rc {
			fmt.Fprintf(w, "  %-26s %d\n", c.Reason, c.N)
		}
	}
	for _, s := range out.Skipped {
		fmt.Fprintf(w, "skipped %s\n", s)
	}
	return nil
}

// omissionLine is one line of the omissions listing.
type omissionLine struct {
	// Kind is "input" for an input left out, "value" for a value not
	// emitted.
	Kind string `json:"kind"`
	// Reference is the input left out, or the blood gas whose value was
	// not emitted.
	Reference string `json:"reference,omitempty"`
	// Code is the value not emitted; absent for inputs.
	Code   string `json:"code,omitempty"`
	Reason string `json:"reason"`
	Detail string `json:"detail,omitempty"`
}

// WriteOmissions writes every input left out and every value not emitted,
// one JSON object a line: {"kind", "reference", "code", "reason",
// "detail"}, inputs first in reference order, then values in the order of
// the blood gases. Observations with no code this service uses are counted
// in the summary only: a bulk export is mostly such lines.
func WriteOmissions(w io.Writer, out Outcome) error {
	enc := json.NewEncoder(w)
	enc.SetEscapeHTML(false)
	for _, set := range []struct {
		kind string
		om   []derive.Omission
	}{{"input", out.Report.Inputs}, {"value", out.Report.Values}} {
		for _, o := range set.om {
			if err := enc.Encode(omissionLine{Kind: set.kind, Reference: o.Ref, Code: string(o.Code), Reason: string(o.Reason), Detail: o.Detail}); err != nil {
				return fmt.Errorf("replay: write omissions: %w", err)
			}
		}
	}
	return nil
}

// WriteCodeSystem writes the project's CodeSystem resource, as JSON on one
// line, for the encoder options of the run.
func WriteCodeSystem(w io.Writer, opts encode.Options) error {
	enc, err := encode.New(opts)
	if err != nil {
		return fmt.Errorf("replay: %w", err)
	}
	b, err := enc.CodeSystem()
	if err != nil {
		return fmt.Errorf("replay: %w", err)
	}
	if _, err := w.Write(append(b, '\n')); err != nil {
		return fmt.Errorf("replay: write code system: %w", err)
	}
	return nil
}
