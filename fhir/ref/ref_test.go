package ref

import (
	"testing"
	"time"
)

func TestParse(t *testing.T) {
	for _, tc := range []struct {
		name, in string
		want     Ref
		bad      bool
	}{
		{name: "logical", in: "Observation/x1", want: Ref{Type: "Observation", ID: "x1"}},
		{name: "versioned", in: "Observation/x1/_history/2", want: Ref{Type: "Observation", ID: "x1", Version: "2"}},
		{name: "uuid version", in: "Patient/a.b-c/_history/0f8a-11", want: Ref{Type: "Patient", ID: "a.b-c", Version: "0f8a-11"}},
		{name: "lower-case type", in: "observation/x", bad: true},
		{name: "no id", in: "Observation/", bad: true},
		{name: "empty version", in: "Observation/x/_history/", bad: true},
		{name: "extra segment", in: "Observation/x/y", bad: true},
		{name: "absolute", in: "https://h/fhir/Observation/x", bad: true},
		{name: "id too long", in: "Observation/" + string(make([]byte, 65)), bad: true},
		{name: "conditional", in: "Observation?code=x", bad: true},
	} {
		t.Run(tc.name, func(t *testing.T) {
			got, err := Parse(tc.in)
			if tc.bad {
				if err == nil {
					t.Fatalf("Parse(%q) = %+v, want an error", tc.in, got)
				}
				return
			}
			if err != nil || got != tc.want {
				t.Fatalf("Parse(%q) = %+v, %v; want %+v", tc.in, got, err, tc.want)
			}
			if got.String() != tc.in {
				t.Fatalf("String() = %q, want %q", got.String(), tc.in)
			}
			l, v := Split(tc.in)
			if l != got.Logical() || v != got.Version {
				t.Fatalf("Split(%q) = %q, %q", tc.in, l, v)
			}
		})
	}
}

func TestParseAny(t *testing.T) {
	for _, tc := range []struct {
		name, in, base string
		want           Ref
		bad            bool
	}{
		{name: "relative", in: "Patient/p1", want: Ref{Type: "Patient", ID: "p1"}},
		{name: "relative versioned", in: "Observation/o1/_history/2", want: Ref{Type: "Observation", ID: "o1", Version: "2"}},
		{name: "absolute", in: "https://ehr.example/fhir/Patient/p1", base: "https://ehr.example/fhir/", want: Ref{Type: "Patient", ID: "p1"}},
		{name: "absolute versioned", in: "http://h/r4/a/Observation/o1/_history/7", base: "http://h/r4/a/", want: Ref{Type: "Observation", ID: "o1", Version: "7"}},
		{name: "base without path", in: "https://h/Device/d-1", base: "https://h/", want: Ref{Type: "Device", ID: "d-1"}},
		{name: "relative with a prefix", in: "fhir/Patient/p1", bad: true},
		{name: "contained", in: "#p1", bad: true},
		{name: "conditional", in: "Patient?identifier=x", bad: true},
		{name: "urn", in: "urn:uuid:0f8a11aa-0000-4000-8000-000000000000", bad: true},
		{name: "no host", in: "https:///Patient/p1", bad: true},
		{name: "only a host", in: "https://h", bad: true},
		{name: "lower-case type", in: "https://h/fhir/patient/p1", bad: true},
		{name: "bad version", in: "https://h/fhir/Patient/p1/_history/a_b", bad: true},
		{name: "trailing slash", in: "https://h/fhir/Patient/p1/", bad: true},
		{name: "white space", in: "Patient/p 1", bad: true},
	} {
		t.Run(tc.name, func(t *testing.T) {
			got, base, err := ParseAny(tc.in)
			if tc.bad {
				if err == nil {
					t.Fatalf("ParseAny(%q) = %+v, %q; want an error", tc.in, got, base)
				}
				return
			}
			if err != nil || got != tc.want || base != tc.base {
				t.Fatalf("ParseAny(%q) = %+v, %q, %v; want %+v, %q", tc.in, got, base, err, tc.want, tc.base)
			}
		})
	}
}

// An absolute literal reference is allowed (FHIR R4 references.html,
// literal references: "a relative URL ... or an absolute URL"). Under the
// service's own server it is the same resource as the relative one; under
// another server it is another resource, whatever its id.
func TestKey(t *testing.T) {
	const own = "https://ehr.example/fhir"
	for _, tc := range []struct {
		name, in, own, key string
		bad                bool
	}{
		{name: "relative", in: "Patient/p1", own: own, key: "Patient/p1"},
		{name: "relative versioned", in: "Patient/p1/_history/3", own: own, key: "Patient/p1"},
		{name: "own server", in: "https://ehr.example/fhir/Patient/p1", own: own, key: "Patient/p1"},
		{name: "own server, versioned", in: "https://ehr.example/fhir/Patient/p1/_history/3", own: own, key: "Patient/p1"},
		{name: "own server, host in capitals and default port", in: "https://EHR.example:443/fhir/Patient/p1", own: own + "/", key: "Patient/p1"},
		{name: "another server", in: "https://other.example/fhir/Patient/p1", own: own, key: "https://other.example/fhir/Patient/p1"},
		{name: "another server spelt otherwise", in: "https://OTHER.example:443/%66hir/Patient/p1/_history/4", own: own, key: "https://other.example/fhir/Patient/p1"},
		{name: "another path on the same host", in: "https://ehr.example/fhir2/Patient/p1", own: own, key: "https://ehr.example/fhir2/Patient/p1"},
		{name: "http is not https", in: "http://ehr.example/fhir/Patient/p1", own: own, key: "http://ehr.example/fhir/Patient/p1"},
		{name: "no server known: absolute kept", in: "https://ehr.example/fhir/Patient/p1/_history/2", key: "https://ehr.example/fhir/Patient/p1"},
		{name: "not a literal reference", in: "#p1", own: own, bad: true},
	} {
		t.Run(tc.name, func(t *testing.T) {
			_, key, err := Key(tc.in, tc.own)
			if tc.bad != (err != nil) || key != tc.key {
				t.Fatalf("Key(%q, %q) = %q, %v; want %q (error %v)", tc.in, tc.own, key, err, tc.key, tc.bad)
			}
		})
	}
}

func TestSameBase(t *testing.T) {
	for _, tc := range []struct {
		a, b string
		same bool
	}{
		{"https://h/fhir/", "https://h/fhir", true},
		{"https://H:443/fhir", "https://h/fhir/", true},
		{"http://h:80/fhir", "http://h/fhir", true},
		{"http://h:8080/fhir", "http://h/fhir", false},
		{"https://h/fhir", "https://h/FHIR", false},
		{"", "", false},
		{"https://h/fhir", "", false},
	} {
		if got := SameBase(tc.a, tc.b); got != tc.same {
			t.Errorf("SameBase(%q, %q) = %v, want %v", tc.a, tc.b, got, tc.same)
		}
	}
}

func TestCompare(t *testing.T) {
	t0 := time.Date(2026, 1, 2, 3, 4, 5, 0, time.UTC)
	v := func(at time.Time, id string) Version { return Version{LastUpdated: at, ID: id} }
	for _, tc := range []struct {
		name string
		a, b Version
		want int
	}{
		{"later time wins", v(t0.Add(time.Nanosecond), "1"), v(t0, "2"), 1},
		{"nanoseconds count", v(t0, "9"), v(t0.Add(time.Nanosecond), "1"), -1},
		{"numbers as numbers", v(t0, "10"), v(t0, "9"), 1},
		{"numbers past 64 bits", v(t0, "100000000000000000000"), v(t0, "99999999999999999999"), 1},
		{"leading zeros", v(t0, "007"), v(t0, "7"), 0},
		{"strings as strings", v(t0, "b"), v(t0, "a"), 1},
		{"same", v(t0, "x"), v(t0, "x"), 0},
		// Ties of time and id: copies without meta, or a server that
		// reuses a version id.
		{"unusable wins a tie", Version{ID: "", Unusable: true, Content: "a"}, Version{ID: "", Content: "b"}, 1},
		{"unusable does not beat a later time", Version{LastUpdated: t0, Unusable: true}, v(t0.Add(time.Nanosecond), ""), -1},
		{"unusable does not beat a larger id", Version{LastUpdated: t0, ID: "1", Unusable: true}, v(t0, "2"), -1},
		{"then the greater content", Version{LastUpdated: t0, Content: "b"}, Version{LastUpdated: t0, Content: "a"}, 1},
		{"both unusable: the greater content", Version{Unusable: true, Content: "deleted"}, Version{Unusable: true, Content: "cancelled"}, 1},
		{"same content", Version{Content: "a"}, Version{Content: "a"}, 0},
		{"content does not beat a larger id", Version{LastUpdated: t0, ID: "1", Content: "z"}, v(t0, "2"), -1},
	} {
		t.Run(tc.name, func(t *testing.T) {
			if got := Compare(tc.a, tc.b); got != tc.want {
				t.Fatalf("Compare = %d, want %d", got, tc.want)
			}
			if got := Compare(tc.b, tc.a); got != -tc.want {
				t.Fatalf("reversed Compare = %d, want %d", got, -tc.want)
			}
		})
	}
}

func FuzzParse(f *testing.F) {
	for _, s := range []string{"Observation/x", "Observation/x/_history/2", "Patient/", "A/b/_history/c/d"} {
		f.Add(s)
	}
	f.Fuzz(func(t *testing.T, s string) {
		r, err := Parse(s)
		if err != nil {
			return
		}
		if r.String() != s {
			t.Fatalf("Parse(%q).String() = %q", s, r.String())
		}
		if back, err := Parse(r.String()); err != nil || back != r {
			t.Fatalf("round trip of %q: %+v, %v", s, back, err)
		}
	})
}

func FuzzParseAny(f *testing.F) {
	for _, s := range []string{"Observation/x", "https://h/fhir/Observation/x/_history/2", "http://h/Patient/p", "https://h", "#x"} {
		f.Add(s)
	}
	f.Fuzz(func(t *testing.T, s string) {
		r, base, err := ParseAny(s)
		if err != nil {
			return
		}
		if base+r.String() != s {
			t.Fatalf("ParseAny(%q) = %+v, %q: base and reference do not make the input", s, r, base)
		}
		if back, err := Parse(r.String()); err != nil || back != r {
			t.Fatalf("the reference part of %q does not parse on its own: %+v, %v", s, back, err)
		}
		// Key agrees with ParseAny: relative under the reference's own
		// base, absolute and unversioned under any other.
		if _, k, err := Key(s, base); err != nil || (base != "" && SameBase(base, base) && k != r.Logical()) {
			t.Fatalf("Key(%q, its own base %q) = %q, %v; want %q", s, base, k, err, r.Logical())
		}
		// With no server known an absolute reference keeps its base,
		// normalised (as SameBase compares bases), so two spellings of one
		// base key alike.
		want := base + r.Logical()
		if cb, ok := canonicalBase(base); ok {
			want = cb + "/" + r.Logical()
		}
		_, k, err := Key(s, "")
		if err != nil || k != want {
			t.Fatalf("Key(%q, \"\") = %q, %v; want %q", s, k, err, want)
		}
		if base != "" {
			if _, k2, err := Key(k, ""); err != nil || k2 != want {
				t.Fatalf("the key %q of %q is not its own key: %q, %v", want, s, k2, err)
			}
		}
	})
}

// A DELETE entry names its resource by request.url, relative or absolute,
// or, for a conditional delete (FHIR R4 http.html#3.1.0.7.1), by its
// fullUrl; a version is dropped, and an entry naming none gives nothing.
func TestDeleteTarget(t *testing.T) {
	for _, tc := range []struct {
		name, url, fullURL string
		want               Ref
		ok                 bool
	}{
		{"relative url", "Observation/o1", "", Ref{Type: "Observation", ID: "o1"}, true},
		{"absolute url", "https://ehr.example/fhir/Patient/p1", "", Ref{Type: "Patient", ID: "p1"}, true},
		{"versioned url", "Observation/o1/_history/3", "", Ref{Type: "Observation", ID: "o1"}, true},
		{"conditional url, fullUrl names it", "Observation?identifier=a|b", "https://ehr.example/fhir/Observation/o2", Ref{Type: "Observation", ID: "o2"}, true},
		{"url wins over fullUrl", "Observation/o1", "https://ehr.example/fhir/Observation/o2", Ref{Type: "Observation", ID: "o1"}, true},
		{"conditional, urn fullUrl", "Observation?identifier=a|b", "urn:uuid:0f8a11aa-0000-4000-8000-000000000000", Ref{}, false},
		{"nothing", "", "", Ref{}, false},
	} {
		t.Run(tc.name, func(t *testing.T) {
			got, ok := DeleteTarget(tc.url, tc.fullURL)
			if got != tc.want || ok != tc.ok {
				t.Errorf("DeleteTarget(%q, %q) = %+v, %v; want %+v, %v", tc.url, tc.fullURL, got, ok, tc.want, tc.ok)
			}
		})
	}
}
