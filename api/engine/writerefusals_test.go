package engine_test

import (
	"context"
	"encoding/json"
	"strings"
	"testing"
	"time"

	"github.com/deadspace-fhir/deadspace/api/deadletters"
)

// A revision or withdrawal whose Provenance's create, conditional on its
// tag, matches more than one resource is refused with 412 however often it
// is sent: the server ignores _tag in the condition (R4 http.html#ccreate;
// two Provenances of any tag are then "several matches"). In one
// transaction, with every If-Match still current, the 412 can only be the
// Provenance's, and nothing of the write was written; sent on its own after
// the values, the values are on the server without it. Either way the write
// goes to the dead letters at once with the server's answer and says which
// it was; once the server is fixed, the dead letter retried writes the
// Provenance, and the server ends with this service's values and one
// Provenance per write.
func TestProvenanceMatchingSeveralIsBuried(t *testing.T) {
	for _, tc := range []struct {
		name        string
		maxEntries  int
		change      func(r *writeRig) []json.RawMessage
		wantLetters int
		wantReason  string
		// valuesMoved: the values reached the server before the refusal.
		valuesMoved bool
		wantAfter   map[string]int // Provenances by activity after the retry
	}{
		{"revision in one transaction", 0, func(r *writeRig) []json.RawMessage { return []json.RawMessage{r.gas(2, 47)} },
			1, "nothing of this write was written", false, map[string]int{"CREATE": 1, "UPDATE": 1}},
		{"withdrawal in one transaction", 0, func(r *writeRig) []json.RawMessage {
			return []json.RawMessage{obs("gas", "2", "entered-in-error", "2019-8", "mm[Hg]", 44, r.at, r.updated.Add(2*time.Minute))}
		}, 2, "nothing of this write was written", false, map[string]int{"CREATE": 1, "NULLIFY": 2}},
		{"revision split, the Provenance on its own", 2, func(r *writeRig) []json.RawMessage { return []json.RawMessage{r.gas(2, 47)} },
			1, "the values were written without their Provenance", true, map[string]int{"CREATE": 1, "UPDATE": 1}},
	} {
		t.Run(tc.name, func(t *testing.T) {
			ctx := context.Background()
			r := newWriteRig(t, tc.maxEntries)
			r.openAndCreate()
			before := r.values()
			// A Provenance another system wrote: with the create's, two
			// Provenances match a condition the server does not read.
			if _, err := r.fake.Put([]byte(`{"resourceType":"Provenance","recorded":"2020-01-01T00:00:00Z","target":[{"reference":"Observation/other"}],"agent":[{"who":{"display":"another system"}}]}`)); err != nil {
				t.Fatal(err)
			}
			r.fake.Ignore("Provenance", "_tag")
			r.ingest(tc.change(r)...)
			r.eng.FlushNow(ctx)

			h := r.health()
			if h.Stats.OutboxDepth != 0 || h.Stats.DeadLetters != tc.wantLetters {
				var last string
				if ws := r.outbox(); len(ws) > 0 {
					last = ws[0].LastError
				}
				t.Fatalf("after one attempt: %d writes in the outbox (last error %q), %d dead letters; want %d buried", h.Stats.OutboxDepth, last, h.Stats.DeadLetters, tc.wantLetters)
			}
			for _, reason := range r.deadLetters() {
				for _, want := range []string{"Provenance", "matched more than one resource", tc.wantReason, "If-None-Exist matches more than one resource"} {
					if !strings.Contains(reason, want) {
						t.Errorf("dead letter reason %q does not say %q", reason, want)
					}
				}
			}
			moved := false
			for series, vs := range r.values() {
				if vs[0].version != before[series][0].version {
					moved = true
				}
			}
			if moved != tc.valuesMoved {
				t.Errorf("values on the server moved: %v, want %v", moved, tc.valuesMoved)
			}

			r.fake.ClearFaults() // the operator fixes the server
			dls, err := r.st.DeadLetters(ctx, 10)
			if err != nil {
				t.Fatal(err)
			}
			for _, dl := range dls {
				if _, err := deadletters.Local(r.st).Retry(ctx, dl.ID); err != nil {
					t.Fatal(err)
				}
			}
			r.mustDrain(5)
			r.wantCurrent(2)
			got := r.activities()
			for act, n := range tc.wantAfter {
				if got[act] != n {
					t.Errorf("after the retry the server holds Provenances %v, want %v (and the other system's)", got, tc.wantAfter)
					break
				}
			}
		})
	}
}
