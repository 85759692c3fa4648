package encode

import (
	"encoding/json"
	"math"
	"regexp"
	"strconv"
	"strings"
	"testing"
)

// decimalPattern is the R4 decimal regex (datatypes.html#decimal), without
// the exponent we never write.
var decimalPattern = regexp.MustCompile(`^-?(0|[1-9][0-9]*)(\.[0-9]+)?$`)

func TestFormatDecimal(t *testing.T) {
	// Expected strings are the inputs rounded by hand; exact binary halves
	// go to the even digit (IEEE 754 round-half-even, as strconv does).
	cases := []struct {
		v    float64
		d    int
		want string
	}{
		{0.2808219178082192, 3, "0.281"},
		{0.3, 3, "0.300"},
		{162.5, 0, "162"},
		{163.5, 0, "164"},
		{-14, 1, "-14.0"},
		{-0.0004, 3, "0.000"},
		{math.Copysign(0, -1), 2, "0.00"},
		{1e21, 0, "1000000000000000000000"},
	}
	for _, tc := range cases {
		t.Run(strconv.FormatFloat(tc.v, 'g', -1, 64), func(t *testing.T) {
			got, err := formatDecimal(tc.v, tc.d)
			if err != nil || got != tc.want {
				t.Errorf("formatDecimal(%v, %d) = %q, %v; want %q", tc.v, tc.d, got, err, tc.want)
			}
		})
	}
	for _, bad := range []float64{math.NaN(), math.Inf(1), math.Inf(-1)} {
		if _, err := formatDecimal(bad, 1); err == nil {
			t.Errorf("formatDecimal(%v) accepted", bad)
		}
	}
}

// FuzzFormatDecimal: every finite value is written as an R4 decimal that
// reads back within half a unit of the last decimal.
func FuzzFormatDecimal(f *testing.F) {
	for _, v := range []float64{0, 0.2808, -14, 162.5, 1e-9, 1e300, -0.0004} {
		f.Add(v, uint8(3))
	}
	f.Fuzz(func(t *testing.T, v float64, d uint8) {
		dec := int(d % 6)
		s, err := formatDecimal(v, dec)
		if math.IsNaN(v) || math.IsInf(v, 0) {
			if err == nil {
				t.Fatalf("accepted %v", v)
			}
			return
		}
		if err != nil {
			t.Fatal(err)
		}
		if !decimalPattern.MatchString(s) {
			t.Fatalf("%q is not an R4 decimal", s)
		}
		if strings.HasPrefix(s, "-") && strings.Trim(s, "-0.") == "" {
			t.Fatalf("%q: negative zero", s)
		}
		back, err := strconv.ParseFloat(s, 64)
		if err != nil {
			t.Fatal(err)
		}
		if tol := 0.5*math.Pow(10, -float64(dec)) + math.Abs(v)*1e-15; math.Abs(back-v) > tol {
			t.Fatalf("%v written as %q", v, s)
		}
	})
}

// FuzzParseRef: a reference either fails to parse or survives the round
// trip, and its parts are FHIR ids.
func FuzzParseRef(f *testing.F) {
	for _, s := range []string{"Observation/a/_history/1", "Patient/p1", "Observation/a/_history/", "x", "Observation/a\n", "Observation/../_history/1"} {
		f.Add(s)
	}
	id := regexp.MustCompile(`^[A-Za-z0-9\-.]{1,64}$`)
	f.Fuzz(func(t *testing.T, s string) {
		r, err := parseRef(s)
		if err != nil {
			return
		}
		if r.String() != s {
			t.Fatalf("parseRef(%q).String() = %q", s, r.String())
		}
		if !id.MatchString(r.ID) || (r.Version != "" && !id.MatchString(r.Version)) {
			t.Fatalf("parseRef(%q) = %+v: parts are not ids", s, r)
		}
		if strings.ContainsAny(s, "\n\r") {
			t.Fatalf("parseRef(%q) accepted a line break", s)
		}
	})
}

// FuzzOwnProvenance: whatever a server returns for the Provenance's
// conditional create, the check answers without panicking; it finds the
// plan's Provenance only in a JSON object, and it finds it in any JSON
// object that is a Provenance once the plan's tag is added to its tags,
// whatever else the object carries.
func FuzzOwnProvenance(f *testing.F) {
	p := &Plan{tag: "dsp-0123", cfg: TxConfig{ProvenanceTagSystem: "https://example.org/tag"}}
	for _, s := range []string{
		`{"resourceType":"Provenance","meta":{"tag":[{"system":"https://example.org/tag","code":"dsp-0123"}]}}`,
		`{"resourceType":"Provenance","meta":{"tag":[{"system":"https://example.org/tag","code":"dsp-9"},{"code":1}]}}`,
		`{"resourceType":"Provenance","recorded":"2020-01-01T00:00:00Z"}`,
		`{"resourceType":"Provenance","meta":{"tag":{}}}`,
		`{"resourceType":"Provenance","META":{"tag":[]},"meta":null}`,
		`{"resourceType":"OperationOutcome"}`,
		`[]`, `null`, ``, `{`,
	} {
		f.Add([]byte(s))
	}
	f.Fuzz(func(t *testing.T, resource []byte) {
		own, err := p.OwnProvenance(resource)
		if own && err != nil {
			t.Fatalf("own and an error: %v", err)
		}
		if err == nil && !json.Valid(resource) {
			t.Fatalf("%q is not JSON, yet no error", resource)
		}
		var m map[string]any
		if own && json.Unmarshal(resource, &m) != nil {
			t.Fatalf("%q found own, yet it is not a JSON object", resource)
		}
		if json.Unmarshal(resource, &m) != nil || m == nil || m["resourceType"] != "Provenance" {
			return
		}
		// Keys that differ from the ones read only in case would stand in
		// for them (encoding/json matches names without case).
		dropFolded(m, "resourceType", "meta")
		meta, ok := m["meta"].(map[string]any)
		if !ok {
			meta = map[string]any{}
		}
		dropFolded(meta, "tag")
		tags, _ := meta["tag"].([]any)
		meta["tag"] = append(tags, map[string]any{"system": p.cfg.ProvenanceTagSystem, "code": p.tag})
		m["meta"] = meta
		tagged, err := json.Marshal(m)
		if err != nil {
			t.Fatal(err)
		}
		if own, err := p.OwnProvenance(tagged); !own || err != nil {
			t.Fatalf("%s, carrying the plan's tag, is not found own: %v", tagged, err)
		}
	})
}

// dropFolded removes the keys of m that equal one of names without case
// but not exactly.
func dropFolded(m map[string]any, names ...string) {
	for k := range m {
		for _, n := range names {
			if k != n && strings.EqualFold(k, n) {
				delete(m, k)
			}
		}
	}
}
