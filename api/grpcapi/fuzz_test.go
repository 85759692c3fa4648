package grpcapi

import (
	"bytes"
	"errors"
	"regexp"
	"strings"
	"testing"
)

// FuzzPageToken: any token either decodes to the series it was made from
// or is refused as a bad request; none panics.
func FuzzPageToken(f *testing.F) {
	f.Add(encodePageToken("0011223344556677", "sha256:ab"), "0011223344556677")
	f.Add("forged", "q")
	f.Add("", "")
	f.Fuzz(func(t *testing.T, tok, query string) {
		after, err := decodePageToken(tok, query)
		if err != nil {
			if !errors.Is(err, errBadRequest) {
				t.Fatalf("error %v is not a bad request", err)
			}
			return
		}
		if after == "" {
			t.Fatal("accepted a token with no position")
		}
		if again, err := decodePageToken(encodePageToken(query, after), query); err != nil || again != after {
			t.Fatalf("round trip of %q: %q, %v", after, again, err)
		}
	})
}

// FuzzResources: NDJSON splitting returns every non-blank line, untouched
// but for a trailing CR, with its zero-based line number.
func FuzzResources(f *testing.F) {
	f.Add([]byte("{\"resourceType\":\"Patient\"}\n\n{}\r\n"))
	f.Add([]byte("\n\n"))
	f.Add([]byte("x"))
	f.Fuzz(func(t *testing.T, ndjson []byte) {
		res, lines, err := resources(nil, ndjson)
		if err != nil {
			if !errors.Is(err, errBadRequest) {
				t.Fatalf("error %v is not a bad request", err)
			}
			if len(bytes.TrimSpace(ndjson)) > 0 {
				t.Fatalf("refused input with content: %q", ndjson)
			}
			return
		}
		all := bytes.Split(ndjson, []byte{'\n'})
		if len(res) != len(lines) {
			t.Fatalf("%d resources, %d line numbers", len(res), len(lines))
		}
		for i, r := range res {
			if want := bytes.TrimRight(all[lines[i]], "\r"); !bytes.Equal(r, want) || len(bytes.TrimSpace(r)) == 0 {
				t.Fatalf("resource %d = %q, line %d = %q", i, r, lines[i], want)
			}
		}
	})
}

// fhirID is the R4 id type's pattern (datatypes.html#id), written out here
// as an oracle independent of fhir/ref.
var fhirID = regexp.MustCompile(`^[A-Za-z0-9\-.]{1,64}$`)

// FuzzObservationRef: an accepted id is a FHIR id and the reference is
// Observation/ and what was given, less any Observation/ prefix.
func FuzzObservationRef(f *testing.F) {
	for _, s := range []string{"abc", "Observation/abc/_history/2", "Observation/", "a/_history/", "ds-0"} {
		f.Add(s)
	}
	f.Fuzz(func(t *testing.T, s string) {
		ref, id, err := observationRef(s)
		if err != nil {
			return
		}
		if !fhirID.MatchString(id) || !strings.HasPrefix(ref, "Observation/"+id) {
			t.Fatalf("observationRef(%q) = %q, %q", s, ref, id)
		}
	})
}
