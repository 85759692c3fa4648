package decode

import (
	"encoding/json"
	"errors"
	"math"
	"testing"

	"github.com/deadspace-fhir/deadspace/derive"
)

func jsonValid(b []byte) bool { return json.Valid(b) }

func FuzzDecode(f *testing.F) {
	for _, fx := range fixtures(f) {
		if fx.opts == (Options{}) {
			f.Add(fx.line)
		}
	}
	f.Fuzz(func(t *testing.T, line []byte) {
		fast, full, fastErr, fullErr := decodeBoth(Options{}, line)
		if (fastErr == nil) != (fullErr == nil) || !sameItem(fast, full) {
			t.Fatalf("prefilter and full decode differ:\n%+v, %v\n%+v, %v", fast, fastErr, full, fullErr)
		}
		if valid := json.Valid(line); valid == errors.Is(fastErr, ErrNotJSON) {
			t.Fatalf("json.Valid = %v but err = %v", valid, fastErr)
		}
		if fastErr != nil {
			if !errors.Is(fastErr, ErrNotJSON) && !errors.Is(fastErr, ErrNotResource) {
				t.Fatalf("unexpected error %v", fastErr)
			}
			return
		}
		switch fast.Type {
		case ItemReading:
			r := fast.Reading
			if math.IsNaN(r.Value) || math.IsInf(r.Value, 0) {
				t.Fatalf("reading value %v", r.Value)
			}
			if ok, _, _ := derive.Plausible(r.Kind, r.Value); !ok {
				t.Fatalf("implausible reading %+v", r)
			}
			if r.Ref == "" || fast.Subject == "" || r.Ref != fast.Ref {
				t.Fatalf("reading without reference or subject: %+v", fast)
			}
		case ItemOmitted:
			if fast.Omission.Reason == "" || fast.Omission.Detail == "" {
				t.Fatalf("omission without reason: %+v", fast)
			}
		case ItemPatient:
			if fast.Patient.Ref == "" {
				t.Fatalf("patient without reference: %+v", fast)
			}
		case ItemUnrelated:
			if fast.ResourceType == "" {
				t.Fatalf("unrelated item without resourceType")
			}
		default:
			t.Fatalf("item type %v", fast.Type)
		}
	})
}

// FuzzScan checks the prefilter's JSON validation against encoding/json.
func FuzzScan(f *testing.F) {
	for _, s := range []string{`{}`, `[]`, `{"a":1}`, `"\u00e9"`, `-0.5e+3`, `01`, `{"a":}`, "\"\x01\"", `[1,]`, `nul`, `{"code":"2019-8"}`, " \t\r\n1 "} {
		f.Add([]byte(s))
	}
	f.Fuzz(func(t *testing.T, b []byte) {
		_, err := scan(b, map[string]struct{}{"2019-8": {}})
		if (err == nil) != json.Valid(b) {
			t.Fatalf("scan err = %v, json.Valid = %v for %q", err, json.Valid(b), b)
		}
	})
}
