package webhook

import (
	"bytes"
	"encoding/json"
	"errors"
	"net/http"
	"reflect"
	"testing"
)

// oldClassify is classify as it was before it read the body with
// fhir/jsonscan: encoding/json decoded the whole body into a map. It stays
// as the reference FuzzClassifyAgainstOld compares with.
func oldClassify(body []byte) (h head, empty bool, err error) {
	t := bytes.TrimSpace(body)
	if len(t) == 0 {
		return head{}, true, nil
	}
	var m map[string]json.RawMessage
	if err := json.Unmarshal(t, &m); err != nil {
		if _, ok := errors.AsType[*json.SyntaxError](err); ok {
			return head{}, false, &requestError{status: http.StatusBadRequest, code: "structure", msg: "body is not valid JSON"}
		}
		return head{}, false, &requestError{status: http.StatusBadRequest, code: "structure", msg: "body is not a JSON object"}
	}
	if t[0] != '{' {
		return head{}, false, &requestError{status: http.StatusBadRequest, code: "structure", msg: "body is not a JSON object"}
	}
	if len(m) == 0 {
		return head{}, true, nil
	}
	var rt string
	if raw, ok := m["resourceType"]; !ok || json.Unmarshal(raw, &rt) != nil || rt == "" {
		return head{}, false, errNoResourceType
	}
	h.ResourceType = &rt
	if raw, ok := m["id"]; ok {
		var id string
		if json.Unmarshal(raw, &id) != nil {
			return head{}, false, &requestError{status: http.StatusBadRequest, code: "structure",
				msg: "body is not a FHIR resource: id is not a string"}
		}
		h.ID = &id
	}
	return h, false, nil
}

// FuzzClassifyAgainstOld holds classify to the encoding/json version it
// replaced: the same resourceType and id, the same emptiness, the same
// answer to a bad body.
func FuzzClassifyAgainstOld(f *testing.F) {
	for _, s := range []string{``, ` `, `{}`, ` { } `, `null`, `[]`, `"x"`, `{`, `{} x`, `{"a":1}`,
		`{"resourceType":5}`, `{"resourceType":null}`, `{"resourceType":""}`, `{"resourceType":"Observation"}`,
		`{"resourceType":"Observation","id":"o-1"}`, `{"resourceType":"Observation","id":null}`,
		`{"resourceType":"Observation","id":7}`, `{"resourceType":"A","resourceType":"B","id":"1","id":"2"}`,
		`{"resource\u0054ype":"Patient","i\u0064":"p\u00e9"}`, "\v{\"resourceType\":\"X\"}\u00a0"} {
		f.Add([]byte(s))
	}
	f.Fuzz(func(t *testing.T, body []byte) {
		got, gotEmpty, gotErr := classify(body)
		want, wantEmpty, wantErr := oldClassify(body)
		if gotEmpty != wantEmpty || !reflect.DeepEqual(got, want) {
			t.Fatalf("classify = %s, %v; old %s, %v", show(got), gotEmpty, show(want), wantEmpty)
		}
		if (gotErr == nil) != (wantErr == nil) || gotErr != nil && gotErr.Error() != wantErr.Error() {
			t.Fatalf("classify error %v, old %v", gotErr, wantErr)
		}
	})
}

func show(h head) string {
	s := "rt="
	if h.ResourceType != nil {
		s += *h.ResourceType
	}
	s += " id="
	if h.ID != nil {
		s += *h.ID
	}
	return s
}

// BenchmarkClassify reads the head of a single Observation, as a classic
// rest-hook PUTs it, with the encoding/json version as the baseline.
func BenchmarkClassify(b *testing.B) {
	body := []byte(`{"resourceType":"Observation","id":"abg-1","status":"final",
 "code":{"coding":[{"system":"http://loinc.org","code":"2019-8"}]},
 "subject":{"reference":"Patient/p1"},"effectiveDateTime":"2025-03-01T10:15:00Z",
 "valueQuantity":{"value":41,"unit":"mm[Hg]","system":"http://unitsofmeasure.org","code":"mm[Hg]"}}`)
	for _, c := range []struct {
		name string
		fn   func([]byte) (head, bool, error)
	}{{"baseline=encoding-json", oldClassify}, {"jsonscan", classify}} {
		b.Run(c.name, func(b *testing.B) {
			b.ReportAllocs()
			for b.Loop() {
				if _, _, err := c.fn(body); err != nil {
					b.Fatal(err)
				}
			}
		})
	}
}
