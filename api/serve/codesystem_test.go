package serve_test

import (
	"encoding/json"
	"testing"

	"github.com/deadspace-fhir/deadspace/fhir/encode"
	"github.com/deadspace-fhir/deadspace/fhir/fhirtest/fakefhir"
)

// The CodeSystem of the derived codes is published once, whatever the
// server does with the url and version of the conditional create: a
// server that ignores them answers 200 with any one CodeSystem it holds
// (or 412 with several), and the service must not take another
// terminology's CodeSystem for its own (consumers could not resolve the
// derived codes), nor create its own again when it is there.
func TestFakeCodeSystemPublishedOnce(t *testing.T) {
	other := json.RawMessage(`{"resourceType":"CodeSystem","url":"urn:example:other-codes","version":"1","status":"active","content":"complete"}`)
	for _, tc := range []struct {
		name   string
		ignore bool
		// ours: the server already holds this build's CodeSystem.
		ours   bool
		others int
	}{
		{name: "a server that honours url and version", ignore: false},
		{name: "ignores them and holds one other CodeSystem", ignore: true, others: 1},
		{name: "ignores them and holds two others", ignore: true, others: 2},
		{name: "ignores them and holds this build's and another", ignore: true, ours: true, others: 1},
	} {
		t.Run(tc.name, func(t *testing.T) {
			f := fakefhir.Start(t)
			for range tc.others {
				if _, err := f.Put(other); err != nil {
					t.Fatal(err)
				}
			}
			if tc.ours {
				enc, err := encode.New(encode.DefaultOptions())
				if err != nil {
					t.Fatal(err)
				}
				cs, err := enc.CodeSystem()
				if err != nil {
					t.Fatal(err)
				}
				if _, err := f.Put(cs); err != nil {
					t.Fatal(err)
				}
			}
			if tc.ignore {
				f.Ignore("CodeSystem", "url")
				f.Ignore("CodeSystem", "version")
			}
			startOnFake(t, f, nil)
			count := func() (ours, others int) {
				for _, raw := range f.Current("CodeSystem") {
					var m struct{ URL string }
					_ = json.Unmarshal(raw, &m)
					if m.URL == encode.DefaultCodeSystem {
						ours++
					} else {
						others++
					}
				}
				return ours, others
			}
			waitFor(t, "the CodeSystem of the derived codes on the server", func() bool { n, _ := count(); return n > 0 })
			if ours, others := count(); ours != 1 || others != tc.others {
				t.Errorf("the server holds %d CodeSystems of the derived codes and %d others, want 1 and %d", ours, others, tc.others)
			}
		})
	}
}
