package replay

import (
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

// tableColumns are the values shown in the table, in order.
var tableColumns = []struct {
	code   derive.Code
	header string
	digits int
}{
	{derive.CodeGradient, "Pa-etCO2", 1},
	{derive.CodeAlveolarFraction, "VDalv/VT", 3},
	{derive.CodePhysiologic, "VD/VT", 3},
	{derive.CodeEstimatedFraction, "VD/VT est", 3},
	{derive.CodeAirwayFraction, "VDaw/VT", 3},
	{derive.CodeDeadSpaceVolume, "VD mL", 0},
	{derive.CodeAlveolarVent, "VA L/min", 2},
	{derive.CodeVentilatoryRatio, "VR", 2},
}

// WriteTable prints one row per blood gas and per fall finding: the time,
// the patient, the inputs' medians, the values, and why anything was left
// out. It is for people; the NDJSON output is for systems.
func WriteTable(w io.Writer, out Outcome) error {
	tw := tabwriter.NewWriter(w, 0, 0, 2, ' ', 0)
	head := []string{"sample time (UTC)", "patient", "PaCO2", "EtCO2"}
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
			row = append(row, fmt.Sprintf("EtCO2 fall %+.1f mm[Hg] from baseline, confirmed %s", r.Fall.Change, r.Fall.Confirmed.Format("15:04")))
			fmt.Fprintln(tw, strings.Join(row, "\t"))
			continue
		}
		d := r.Derivation
		row = append(row, strconv.FormatFloat(d.Gas.Value, 'f', 1, 64), median(d, derive.KindEtCO2))
		values := make(map[derive.Code]derive.Value)
		for _, v := range d.Values {
			values[v.Code] = v
		}
		for _, c := range tableColumns {
			if v, ok := values[c.code]; ok {
				row = append(row, strconv.FormatFloat(v.Value, 'f', c.digits, 64)+flag(v.Flag))
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
	return tw.Flush()
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
	var gases, falls, values int
	for _, r := range out.Report.Results {
		if r.Fall != nil {
			falls++
		} else {
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
	fmt.Fprintf(w, "derived: %d blood gases, %d end-tidal CO2 falls; wrote %d Observations, %d Provenance, 1 Device\n", gases, falls, values, len(out.Report.Results))
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
