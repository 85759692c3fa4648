package engine_test

import (
	"encoding/json"
	"net/http"
	"strings"
	"testing"
	"time"
)

// Edits made on the server by someone else keep the derived Observation's
// identifiers, as any edit of a resource does. When the service next
// writes the value (a revision whose If-Match fails, or a create sent
// again whose condition matches), what it reads is its own only if it says
// what the service wrote for that key and status; a revision it did not
// write is never overwritten: the write goes to the dead letters, with the
// reason. A new version that changes nothing a reader acts on (a server
// re-saving the resource with a tag) is still the service's value, and is
// revised.
func TestForeignEditKeepingIdentifiersIsNeverOverwritten(t *testing.T) {
	note := func(m map[string]any, text string) {
		notes, _ := m["note"].([]any)
		m["note"] = append(notes, map[string]any{"text": text})
	}
	value := func(m map[string]any, v float64) {
		vq, _ := m["valueQuantity"].(map[string]any)
		vq["value"] = v
	}
	for _, tc := range []struct {
		name string
		// create: the value is edited after the create landed but before
		// its lost answer is retried; otherwise before a revision.
		create  bool
		edit    func(m map[string]any)
		foreign bool
	}{
		{"revision meets: marked entered-in-error with a note", false, func(m map[string]any) {
			m["status"] = "entered-in-error"
			note(m, "wrong patient, per ICU nurse")
		}, true},
		{"revision meets: value corrected", false, func(m map[string]any) {
			m["status"] = "corrected"
			value(m, 1)
			note(m, "corrected by hand")
		}, true},
		{"revision meets: value changed, status and notes kept", false, func(m map[string]any) { value(m, 1) }, true},
		{"revision meets: a note added, status kept", false, func(m map[string]any) { note(m, "discussed on the ward round") }, true},
		{"revision meets: re-saved with a tag, nothing else changed", false, func(m map[string]any) {
			m["meta"] = map[string]any{"tag": []any{map[string]any{"system": "https://example.org/tags", "code": "audited"}}}
		}, false},
		{"create sent again meets: marked entered-in-error with a note", true, func(m map[string]any) {
			m["status"] = "entered-in-error"
			note(m, "wrong patient, per ICU nurse")
		}, true},
		{"create sent again meets: value changed, status kept", true, func(m map[string]any) { value(m, 1) }, true},
		{"create sent again meets: re-saved with a tag, nothing else changed", true, func(m map[string]any) {
			m["meta"] = map[string]any{"tag": []any{map[string]any{"system": "https://example.org/tags", "code": "audited"}}}
		}, false},
	} {
		t.Run(tc.name, func(t *testing.T) {
			r := newWriteRig(t, 0)
			r.open()
			if tc.create {
				r.fake.Drop(http.MethodPost, "", 1)
			}
			r.ingest(append(r.inputs, r.gas(1, 44))...)
			if tc.create {
				r.eng.FlushNow(t.Context()) // the create lands, its answer is lost
			} else {
				r.mustDrain(5)
			}
			target := r.anyValue()
			r.editOnServer(target, tc.edit)
			edited := r.fake.History("Observation", target.id)
			if !tc.create {
				r.ingest(r.gas(2, 47))
			}
			r.drain(10)
			after := r.fake.History("Observation", target.id)
			reasons := r.deadLetters()
			if !tc.foreign {
				if len(reasons) != 0 {
					t.Fatalf("dead letters %q for a value only re-saved on the server", reasons)
				}
				r.wantCurrent(2)
				return
			}
			if len(after) != len(edited) || string(after[len(after)-1]) != string(edited[len(edited)-1]) {
				t.Errorf("the edit on the server was overwritten (%d versions, was %d); the server now holds: %.300s", len(after), len(edited), after[len(after)-1])
			}
			if len(reasons) != 1 || !strings.Contains(reasons[0], "did not write") {
				t.Errorf("dead letters %q, want the write buried because the server holds a revision this service did not write", reasons)
			}
		})
	}
}

// A create whose condition matches a value of the series that another
// store of this service wrote (serve from fewer readings, before a
// backfill with a ledger of its own) is updated to the create's value: the
// ledger cannot compare that value with what it wrote, but it holds a live
// status this service writes. The derivation keeps one Provenance each.
func TestCreateMatchingAnotherStoresValueIsUpdated(t *testing.T) {
	r := newWriteRig(t, 0)
	r.openAndCreate()
	// Another store, which never saw version 1 of the blood gas.
	r.path = r.path + ".other"
	r.restart()
	r.ingest(append(r.inputs, r.gas(2, 47))...)
	r.mustDrain(5)
	r.wantCurrent(2)
	if got := len(r.provenances()); got != 2 {
		t.Errorf("%d Provenances on the server, want 2", got)
	}
	// Withdrawn by the other store, its value is no longer one this store
	// may take over: a third store's create leaves it to an operator.
	r.ingest(obs("gas", "3", "entered-in-error", "2019-8", "mm[Hg]", 47, r.at, r.updated.Add(3*time.Minute)))
	r.mustDrain(5)
	r.path = r.path + ".third"
	r.restart()
	r.ingest(append(r.inputs, r.gas(4, 50))...)
	r.drain(5)
	if reasons := r.deadLetters(); len(reasons) != 1 || !strings.Contains(reasons[0], "no record") {
		t.Errorf("dead letters %q, want the create buried: the withdrawn value is not one it can compare", reasons)
	}
	for _, vs := range r.values() {
		var o struct{ Status string }
		_ = json.Unmarshal(vs[0].raw, &o)
		if o.Status != "entered-in-error" {
			t.Errorf("a withdrawn value of another store was overwritten: status %s", o.Status)
		}
	}
}
