package encode_test

import (
	"encoding/json"
	"slices"
	"strconv"
	"testing"

	"github.com/deadspace-fhir/deadspace/fhir/encode"
)

// TestValueDiff: what a server holds of a derived Observation is the
// service's value when it says what the service wrote, however the server
// reformatted it; any change a reader acts on is named.
func TestValueDiff(t *testing.T) {
	enc := newEncoder(t)
	d := fullDerivation()
	b, err := enc.Derivation("Patient/p1", d)
	if err != nil {
		t.Fatal(err)
	}
	var s string
	for _, o := range b.Observations {
		if o.Interpretation != nil && o.ValueQuantity != nil {
			s = series(o)
			break
		}
	}
	if s == "" {
		t.Fatal("the fixture has no flagged value")
	}
	w := encode.Write{Subject: "Patient/p1", Derivation: &d, Why: "an input was withdrawn"}
	wrote, err := enc.ValueJSON(w, s, "final")
	if err != nil {
		t.Fatal(err)
	}
	withdrawn, err := enc.ValueJSON(w, s, "entered-in-error")
	if err != nil {
		t.Fatal(err)
	}
	o := encode.DefaultOptions()
	o.SoftwareVersion = "0.9.1"
	o.Issued = issuedTime
	older, err := encode.New(o)
	if err != nil {
		t.Fatal(err)
	}
	withdrawnByOlder, err := older.ValueJSON(w, s, "entered-in-error")
	if err != nil {
		t.Fatal(err)
	}

	edit := func(base json.RawMessage, fn func(m map[string]any)) json.RawMessage {
		var m map[string]any
		if err := json.Unmarshal(base, &m); err != nil {
			t.Fatal(err)
		}
		fn(m)
		raw, err := json.Marshal(m)
		if err != nil {
			t.Fatal(err)
		}
		return raw
	}
	vq := func(m map[string]any) map[string]any { return m["valueQuantity"].(map[string]any) }

	for _, tc := range []struct {
		name  string
		held  json.RawMessage
		wrote json.RawMessage
		want  []string
	}{
		{"as written", wrote, wrote, nil},
		{"as a server stores it", edit(wrote, func(m map[string]any) {
			m["id"] = "srv-1"
			m["meta"] = map[string]any{"versionId": "4", "lastUpdated": "2030-01-01T00:00:00.000Z"}
			m["text"] = map[string]any{"status": "generated", "div": "<div/>"}
			m["issued"] = "2030-01-01T00:00:00Z"
			m["device"] = map[string]any{"reference": "Device/srv-d"}
			m["subject"] = map[string]any{"reference": "Patient/p1", "display": "someone"}
			vq(m)["value"] = json.Number(strconv.FormatFloat(vq(m)["value"].(float64), 'f', 6, 64)) // trailing zeros
		}), wrote, nil},
		{"effective time in another zone", edit(wrote, func(m map[string]any) {
			m["effectiveDateTime"] = "2024-03-01T09:15:00.000+01:00"
		}), edit(wrote, func(m map[string]any) { m["effectiveDateTime"] = "2024-03-01T08:15:00Z" }), nil},
		{"withdrawn by an earlier build", withdrawnByOlder, withdrawn, nil},
		{"marked entered-in-error by someone else", edit(wrote, func(m map[string]any) {
			m["status"] = "entered-in-error"
			m["note"] = append(m["note"].([]any), map[string]any{"text": "wrong patient, per ICU nurse"})
		}), withdrawn, []string{"note"}},
		{"status changed", edit(wrote, func(m map[string]any) { m["status"] = "corrected" }), wrote, []string{"status"}},
		{"value corrected", edit(wrote, func(m map[string]any) { vq(m)["value"] = 1.0 }), wrote, []string{"value"}},
		{"unit changed", edit(wrote, func(m map[string]any) { vq(m)["code"] = "kPa" }), wrote, []string{"value"}},
		{"value replaced by a string", edit(wrote, func(m map[string]any) {
			delete(m, "valueQuantity")
			m["valueString"] = "see note"
		}), wrote, []string{"value"}},
		{"a note added", edit(wrote, func(m map[string]any) {
			m["note"] = append(m["note"].([]any), map[string]any{"text": "checked"})
		}), wrote, []string{"note"}},
		{"interpretation removed", edit(wrote, func(m map[string]any) { delete(m, "interpretation") }), wrote, []string{"interpretation"}},
		{"effective time moved", edit(wrote, func(m map[string]any) { m["effectiveDateTime"] = "2001-01-01T00:00:00Z" }), wrote, []string{"effective"}},
		{"another patient", edit(wrote, func(m map[string]any) { m["subject"] = map[string]any{"reference": "Patient/p2"} }), wrote, []string{"subject"}},
		{"another code", edit(wrote, func(m map[string]any) {
			m["code"] = map[string]any{"coding": []any{map[string]any{"system": "http://loinc.org", "code": "1-8"}}}
		}), wrote, []string{"code"}},
	} {
		t.Run(tc.name, func(t *testing.T) {
			got, err := encode.ValueDiff(tc.held, tc.wrote)
			if err != nil {
				t.Fatal(err)
			}
			if !slices.Equal(got, tc.want) {
				t.Errorf("ValueDiff = %v, want %v", got, tc.want)
			}
		})
	}
	if _, err := encode.ValueDiff([]byte("{"), wrote); err == nil {
		t.Error("a body that is not JSON was compared")
	}
}
