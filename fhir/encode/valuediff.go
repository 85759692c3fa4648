package encode

import (
	"encoding/json"
	"fmt"
	"reflect"
	"regexp"
	"slices"
	"strings"
	"time"
)

// ValueDiff compares held, a derived Observation as a FHIR server holds
// it, with wrote, the Observation as this service wrote it (or would write
// it), in what a reader acts on: status, code, subject, effective time,
// value (and dataAbsentReason, components), interpretation and notes. It
// returns the names of the elements that differ, none when held says what
// wrote.
//
// Servers may rewrite what they store without changing its meaning, so
// numbers are compared as numbers, times as instants, codings by system
// and code, references by their reference; and the software version in
// the notes this package writes ("Calculated by deadspace 1.2.0 …",
// "Withdrawn by deadspace 1.2.0: …") is left out, so a value written by an
// earlier build still matches. What a server sets on its own (id, meta,
// text, issued) and what only addresses other resources (device,
// derivedFrom, encounter) are not compared.
func ValueDiff(held, wrote []byte) ([]string, error) {
	var h, w map[string]any
	if err := json.Unmarshal(held, &h); err != nil {
		return nil, fmt.Errorf("encode: value diff: the server's Observation: %w", err)
	}
	if err := json.Unmarshal(wrote, &w); err != nil {
		return nil, fmt.Errorf("encode: value diff: the written Observation: %w", err)
	}
	var diff []string
	for _, el := range clinicalElements {
		if !reflect.DeepEqual(el.get(h), el.get(w)) {
			diff = append(diff, el.name)
		}
	}
	return diff, nil
}

// clinicalElements are the elements [ValueDiff] compares, each reduced to
// what a server keeps of its meaning.
var clinicalElements = []struct {
	name string
	get  func(map[string]any) any
}{
	{"status", func(o map[string]any) any { return o["status"] }},
	{"code", func(o map[string]any) any { return codings(o["code"]) }},
	{"subject", func(o map[string]any) any { return reference(o["subject"]) }},
	{"effective", func(o map[string]any) any { return normalised(prefixed(o, "effective")) }},
	{"value", func(o map[string]any) any { return normalised(prefixed(o, "value")) }},
	{"dataAbsentReason", func(o map[string]any) any { return codings(o["dataAbsentReason"]) }},
	{"component", func(o map[string]any) any { return normalised(o["component"]) }},
	{"interpretation", func(o map[string]any) any {
		var out [][]string
		for _, cc := range list(o["interpretation"]) {
			out = append(out, codings(cc))
		}
		return out
	}},
	{"note", func(o map[string]any) any {
		var out []string
		for _, n := range list(o["note"]) {
			m, _ := n.(map[string]any)
			text, _ := m["text"].(string)
			out = append(out, ownNoteVersion.ReplaceAllString(strings.TrimSpace(text), "$1 by deadspace"))
		}
		return out
	}},
}

// ownNoteVersion matches the software version in the notes this package
// writes (see [Encoder.Caution] and [Encoder.Withdrawal]).
var ownNoteVersion = regexp.MustCompile(`^(Calculated|Withdrawn) by deadspace [A-Za-z0-9.+_~-]{1,50}`)

func list(v any) []any {
	l, _ := v.([]any)
	return l
}

// codings returns a CodeableConcept's codings as sorted "system|code".
func codings(cc any) []string {
	m, _ := cc.(map[string]any)
	var out []string
	for _, c := range list(m["coding"]) {
		cm, _ := c.(map[string]any)
		system, _ := cm["system"].(string)
		code, _ := cm["code"].(string)
		out = append(out, system+"|"+code)
	}
	slices.Sort(out)
	return out
}

func reference(r any) string {
	m, _ := r.(map[string]any)
	ref, _ := m["reference"].(string)
	return ref
}

// prefixed returns the elements of a choice type (name + type) that o has.
func prefixed(o map[string]any, name string) map[string]any {
	out := map[string]any{}
	for k, v := range o {
		if strings.HasPrefix(k, name) && len(k) > len(name) && k[len(name)] >= 'A' && k[len(name)] <= 'Z' {
			out[k] = v
		}
	}
	return out
}

// normalised returns v with every date-time string as its instant in UTC
// and without displays (numbers are float64 already, so 47 and 47.0 are
// equal).
func normalised(v any) any {
	switch x := v.(type) {
	case map[string]any:
		out := make(map[string]any, len(x))
		for k, e := range x {
			if k == "display" {
				continue
			}
			out[k] = normalised(e)
		}
		return out
	case []any:
		out := make([]any, len(x))
		for i, e := range x {
			out[i] = normalised(e)
		}
		return out
	case string:
		if t, err := time.Parse(time.RFC3339Nano, x); err == nil {
			return t.UTC().Format(time.RFC3339Nano)
		}
		return x
	}
	return v
}
