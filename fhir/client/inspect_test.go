package client

import (
	"encoding/json"
	"fmt"
	"reflect"
	"strings"
	"testing"
)

func errString(err error) string {
	if err == nil {
		return ""
	}
	return err.Error()
}

// inspectSeeds are request Bundles plain and otherwise.
var inspectSeeds = []string{
	`{"resourceType":"Bundle","type":"transaction","entry":[{"fullUrl":"urn:uuid:1","resource":{"resourceType":"Observation","status":"final"},"request":{"method":"POST","url":"Observation","ifNoneExist":"identifier=s%7Cx"}}]}`,
	`{"resourceType":"Bundle","type":"batch","entry":[{"request":{"method":"PUT","url":"Observation/1","ifMatch":"W/\"2\""}},{"request":{"method":"POST","url":"Provenance"}}]}`,
	`{"resourceType":"Bundle","type":"transaction","entry":[]}`,
	`{"resourceType":"Bundle","type":"transaction"}`,
	`{"resourceType":"Bundle","type":"transaction","entry":null}`,
	`{"resourceType":"Bundle","type":"transaction","entry":[null]}`,
	`{"resourceType":"Bundle","type":"transaction","entry":[{"request":null}]}`,
	`{"resourceType":"Bundle","type":"transaction","entry":[{"request":{"method":null}}]}`,
	`{"resourceType":"Bundle","type":"transaction","entry":[{"Request":{"method":"GET"}}]}`,
	`{"resourceType":"Bundle","type":"transaction","entry":[{"request":{"METHOD":"GET"}}]}`,
	`{"resourceType":"Bundle","type":"transaction","entry":[{"request":{"method":"GET"},"request":{"ifNoneExist":"x"}}]}`,
	`{"resourceType":"Bundle","resourcetype":"Patient","type":"transaction"}`,
	`{"resourceType":"Bundle","type":"transaction","type":"batch"}`,
	`{"resourceType":"Bundle","type":"transaction","entry":[{"request":{"method":1}}]}`,
	`{"resourceType":"Bundle","type":"collection"}`,
	`{"resourceType":"Patient"}`,
	`{"resourceType":"Bundle","type":"tr\u0061nsaction","entry":[{"request":{"method":"P\u004fST"}}]}`,
	`{"resourceType":"Bundle","type":"transaction","entry":[{"request":{"method":"PATCH"}}]}`,
	`{"resourceType":"Bundle","type":"transaction","ſtatus":1}`,
	`[]`,
	`"Bundle"`,
	`{"resourceType":"Bundle","type":"transaction"`,
	`{"resourceType":"Bundle","type":"transaction"} x`,
	``,
}

// compareInspect holds inspectRequestBundle to its encoding/json path,
// and the fast fill, when it succeeds, to encoding/json's fill.
func compareInspect(t *testing.T, body []byte) {
	t.Helper()
	got, gerr := inspectRequestBundle(body)
	noInspectFast = true
	want, werr := inspectRequestBundle(body)
	noInspectFast = false
	if got != want || errString(gerr) != errString(werr) {
		t.Fatalf("inspectRequestBundle(%q) = %+v, %v; encoding/json gives %+v, %v", body, got, gerr, want, werr)
	}
	var fast requestBundleJSON
	if inspectFast(body, &fast) {
		var slow requestBundleJSON
		if err := json.Unmarshal(body, &slow); err != nil {
			t.Fatalf("the fast fill took %q, encoding/json refuses it: %v", body, err)
		}
		if !reflect.DeepEqual(fast, slow) {
			t.Fatalf("fill of %q: fast %+v, encoding/json %+v", body, fast, slow)
		}
	}
}

// TestInspectRequestBundleFastAsJSON: the one-pass reading gives what
// encoding/json's gives, and leaves every unusual Bundle to it.
func TestInspectRequestBundleFastAsJSON(t *testing.T) {
	for i, s := range inspectSeeds {
		t.Run(fmt.Sprint(i), func(t *testing.T) { compareInspect(t, []byte(s)) })
	}
}

// FuzzInspectRequestBundleAgainstJSON holds the one-pass reading of a
// request Bundle to encoding/json.
func FuzzInspectRequestBundleAgainstJSON(f *testing.F) {
	for _, s := range inspectSeeds {
		f.Add([]byte(s))
	}
	f.Fuzz(func(t *testing.T, body []byte) { compareInspect(t, body) })
}

// BenchmarkInspectRequestBundle reads a transaction of eight conditional
// creates of about 1.5 KB each, as the outbox writer sends, with the
// encoding/json reading as the baseline in the same run.
func BenchmarkInspectRequestBundle(b *testing.B) {
	var entries []string
	for i := range 8 {
		entries = append(entries, fmt.Sprintf(`{"fullUrl":"urn:uuid:%08d-0000-5000-8000-000000000000","resource":{"resourceType":"Observation","identifier":[{"system":"https://example.org/key","value":"sha256:%064d"},{"system":"https://example.org/series","value":"sha256:%064d"}],"status":"final","code":{"coding":[{"system":"https://example.org/cs","code":"v%d","display":"a derived value"}],"text":"a derived value"},"subject":{"reference":"Patient/p1"},"effectiveDateTime":"2025-03-01T10:15:00Z","issued":"2025-03-01T10:15:07Z","valueQuantity":{"value":0.25,"unit":"1","system":"http://unitsofmeasure.org","code":"1"},"note":[{"text":"%s"}],"device":{"reference":"Device/d"},"derivedFrom":[%s]},"request":{"method":"POST","url":"Observation","ifNoneExist":"identifier=https%%3A%%2F%%2Fexample.org%%2Fseries%%7Csha256%%3A%064d"}}`,
			i, i, i, i, strings.Repeat("a calculated value; read it with the clinical picture. ", 4),
			strings.TrimSuffix(strings.Repeat(`{"reference":"Observation/r/_history/1"},`, 12), ","), i))
	}
	body := []byte(`{"resourceType":"Bundle","type":"transaction","entry":[` + strings.Join(entries, ",") + `]}`)
	if !inspectFast(body, new(requestBundleJSON)) {
		b.Fatal("the benchmark's Bundle is not read by the fast path")
	}
	for _, bc := range []struct {
		name string
		slow bool
	}{{"baseline=encoding-json", true}, {"one-pass", false}} {
		b.Run(bc.name, func(b *testing.B) {
			noInspectFast = bc.slow
			defer func() { noInspectFast = false }()
			b.SetBytes(int64(len(body)))
			b.ReportAllocs()
			for b.Loop() {
				if _, err := inspectRequestBundle(body); err != nil {
					b.Fatal(err)
				}
			}
		})
	}
}

// compareMeta holds resourceTypeOf to its encoding/json path, and the
// fast fill, when it succeeds, to encoding/json's fill.
func compareMeta(t *testing.T, body []byte) {
	t.Helper()
	typ, id, gerr := resourceTypeOf(body)
	noInspectFast = true
	wtyp, wid, werr := resourceTypeOf(body)
	noInspectFast = false
	if typ != wtyp || id != wid || errString(gerr) != errString(werr) {
		t.Fatalf("resourceTypeOf(%q) = %q, %q, %v; encoding/json gives %q, %q, %v", body, typ, id, gerr, wtyp, wid, werr)
	}
	var fast wireMeta
	if metaFast(body, &fast) {
		var slow wireMeta
		if err := json.Unmarshal(body, &slow); err != nil {
			t.Fatalf("the fast fill took %q, encoding/json refuses it: %v", body, err)
		}
		if !reflect.DeepEqual(fast, slow) {
			t.Fatalf("fill of %q: fast %+v, encoding/json %+v", body, fast, slow)
		}
	}
}

var metaSeeds = []string{
	`{"resourceType":"Provenance","id":"p1","meta":{"versionId":"1","lastUpdated":"2025-03-01T10:15:07Z","tag":[{"system":"s","code":"c"}]},"target":[{"reference":"Observation/1"}]}`,
	`{"resourceType":"Observation"}`,
	`{"resourceType":"Observation","id":null}`,
	`{"resourceType":"Observation","meta":null}`,
	`{"resourceType":"Observation","meta":{"versionId":2}}`,
	`{"resourceType":"Observation","meta":{"VersionId":"2"}}`,
	`{"resourceType":"Observation","meta":{"versionId":"2"},"meta":{"lastUpdated":"x"}}`,
	`{"resourceType":"Observation","ID":"x"}`,
	`{"resourceType":"Observation","id":"a","id":"b"}`,
	`{"resourceType":"Observ\u0061tion","id":"\u00e9"}`,
	`{"resourceType":7}`,
	`{"resourceType":"Observation"} {}`,
	`[]`,
	`null`,
	``,
}

// TestResourceTypeOfFastAsJSON: the one-pass reading of a resource's type
// and id gives what encoding/json's gives.
func TestResourceTypeOfFastAsJSON(t *testing.T) {
	for i, s := range metaSeeds {
		t.Run(fmt.Sprint(i), func(t *testing.T) { compareMeta(t, []byte(s)) })
	}
}

// FuzzResourceTypeOfAgainstJSON holds the one-pass reading of a
// resource's type and id to encoding/json.
func FuzzResourceTypeOfAgainstJSON(f *testing.F) {
	for _, s := range append(metaSeeds, inspectSeeds...) {
		f.Add([]byte(s))
	}
	f.Fuzz(func(t *testing.T, body []byte) { compareMeta(t, body) })
}

// BenchmarkResourceTypeOf reads the type and id of a Provenance citing
// forty inputs, as the writer's conditional create checks it, with the
// encoding/json reading as the baseline in the same run.
func BenchmarkResourceTypeOf(b *testing.B) {
	body := []byte(`{"resourceType":"Provenance","meta":{"tag":[{"system":"https://example.org/provenance","code":"abc"}]},"target":[` +
		strings.TrimSuffix(strings.Repeat(`{"reference":"Observation/ds-0123456789abcdef0123456789abcdef"},`, 9), ",") +
		`],"recorded":"2025-03-01T10:15:07Z","activity":{"coding":[{"system":"http://terminology.hl7.org/CodeSystem/v3-DataOperation","code":"CREATE"}]},"agent":[{"who":{"reference":"Device/d"}}],"entity":[` +
		strings.TrimSuffix(strings.Repeat(`{"role":"source","what":{"reference":"Observation/r-1-2-3/_history/1"}},`, 40), ",") + `]}`)
	for _, bc := range []struct {
		name string
		slow bool
	}{{"baseline=encoding-json", true}, {"one-pass", false}} {
		b.Run(bc.name, func(b *testing.B) {
			noInspectFast = bc.slow
			defer func() { noInspectFast = false }()
			b.SetBytes(int64(len(body)))
			b.ReportAllocs()
			for b.Loop() {
				if typ, _, err := resourceTypeOf(body); err != nil || typ != "Provenance" {
					b.Fatal(typ, err)
				}
			}
		})
	}
}
