package engine_test

import (
	"encoding/json"
	"net/http"
	"slices"
	"strings"
	"testing"
	"time"

	"github.com/deadspace-fhir/deadspace/fhir/encode"
	"github.com/deadspace-fhir/deadspace/fhir/fhirtest/fakefhir"
)

// wantOneRevisionProvenance: the server holds one Provenance with activity
// UPDATE, and it cites as revised exactly the versions in before (the
// values as they stood before the revision).
func (r *writeRig) wantOneRevisionProvenance(before map[string][]serverValue) {
	r.t.Helper()
	if got := r.activities(); got["UPDATE"] != 1 {
		r.t.Errorf("the server holds Provenances %v, want one with activity UPDATE", got)
		return
	}
	var want []string
	for _, vs := range before {
		want = append(want, "Observation/"+vs[0].id+"/_history/"+vs[0].version)
	}
	slices.Sort(want)
	got := r.revisedVersions()
	slices.Sort(got)
	if !slices.Equal(got, want) {
		r.t.Errorf("the revision's Provenance cites %v as revised, want the versions the revision was made to replace, %v", got, want)
	}
}

// A revision whose Observations landed while the write did not finish (the
// Provenance sent on its own was refused with a 500, or the answer to the
// Observations' transaction was lost) is sent again; its updates fail their
// If-Match, the engine finds this write's values on the server and counts
// them as written, and still sends the Provenance, which cites the versions
// the revision replaced.
func TestRevisionProvenanceIsWrittenAfterItsObservationsLanded(t *testing.T) {
	for _, tc := range []struct {
		name       string
		maxEntries int
		fault      fakefhir.Fault
		restart    bool
	}{
		{"split, the Provenance refused", 2, fakefhir.Fault{Method: http.MethodPost, Path: "Provenance", Status: http.StatusInternalServerError, Times: 1}, false},
		{"split, the Provenance refused, restart before the retry", 2, fakefhir.Fault{Method: http.MethodPost, Path: "Provenance", Status: http.StatusInternalServerError, Times: 1}, true},
		{"split, the Observations' answer lost", 2, fakefhir.Fault{Method: http.MethodPost, Path: "", Drop: true, Times: 1}, false},
		{"split, the Observations' answer lost, restart before the retry", 2, fakefhir.Fault{Method: http.MethodPost, Path: "", Drop: true, Times: 1}, true},
		{"one transaction, its answer lost", 0, fakefhir.Fault{Method: http.MethodPost, Path: "", Drop: true, Times: 1}, false},
	} {
		t.Run(tc.name, func(t *testing.T) {
			r := newWriteRig(t, tc.maxEntries) // 2: two values and a Provenance do not fit one transaction
			r.openAndCreate()
			if got := r.activities(); got["CREATE"] != 1 {
				t.Fatalf("after the create the server holds Provenances %v, want one CREATE", got)
			}
			before := r.values()
			r.fake.Inject(tc.fault)
			r.ingest(r.gas(2, 47))
			r.eng.FlushNow(t.Context()) // the Observations land, the write fails
			if tc.restart {
				r.restart()
			}
			r.mustDrain(10)
			r.wantCurrent(2)
			r.wantOneRevisionProvenance(before)
			if got := r.activities(); got["CREATE"] != 1 || len(r.provenances()) != 2 {
				t.Errorf("the server holds Provenances %v, want one CREATE and one UPDATE", got)
			}
		})
	}
}

// A value re-saved on the server without a change (a tag added) makes the
// revision's If-Match fail; the revision is sent again against the version
// read. Its Provenance lands but its answer is lost, so the whole write is
// sent again from the outbox, against the versions the ledger knows: every
// attempt's Provenance cites the versions the revision was made to replace,
// so it is one Provenance, found again by its tag.
func TestRevisionSentAgainstAReSavedValueKeepsOneProvenance(t *testing.T) {
	r := newWriteRig(t, 2)
	r.openAndCreate()
	before := r.values()
	r.editOnServer(r.anyValue(), func(m map[string]any) {
		m["meta"] = map[string]any{"tag": []any{map[string]any{"system": "https://example.org/tags", "code": "audited"}}}
	})
	r.fake.Inject(fakefhir.Fault{Method: http.MethodPost, Path: "Provenance", Drop: true, Times: 1})
	r.ingest(r.gas(2, 47))
	r.mustDrain(10)
	r.wantCurrent(2)
	r.wantOneRevisionProvenance(before)
}

// A create too large for one transaction whose Provenance, sent on its
// own, is refused after the Observations landed: after a restart, the
// retry's conditional creates match (200) and the Provenance is sent again,
// once.
func TestCreateProvenanceIsWrittenAfterItsObservationsLanded(t *testing.T) {
	r := newWriteRig(t, 2)
	r.open()
	r.fake.Inject(fakefhir.Fault{Method: http.MethodPost, Path: "Provenance", Status: http.StatusInternalServerError, Times: 1})
	r.ingest(append(r.inputs, r.gas(1, 44))...)
	r.eng.FlushNow(t.Context())
	r.restart()
	r.mustDrain(10)
	r.wantCurrent(2)
	if got := r.activities(); got["CREATE"] != 1 || len(r.provenances()) != 1 {
		t.Errorf("the server holds Provenances %v, want one CREATE", got)
	}
}

// Answers lost after the server committed (a create, then a revision),
// with and without a restart before the retry, in one transaction or
// split: one value per series, one Provenance per write.
func TestLostAnswersAreWrittenOnce(t *testing.T) {
	for _, tc := range []struct {
		name       string
		maxEntries int
		restart    bool
	}{
		{"one transaction", 0, false},
		{"one transaction, restart before each retry", 0, true},
		{"split", 2, false},
		{"split, restart before each retry", 2, true},
	} {
		t.Run(tc.name, func(t *testing.T) {
			r := newWriteRig(t, tc.maxEntries)
			r.open()
			r.fake.Drop(http.MethodPost, "", 1)
			r.ingest(append(r.inputs, r.gas(1, 44))...)
			r.eng.FlushNow(t.Context())
			if tc.restart {
				r.restart()
			}
			r.mustDrain(10)
			r.wantCurrent(2)
			before := r.values()
			r.fake.Drop(http.MethodPost, "", 1)
			r.ingest(r.gas(2, 47))
			r.eng.FlushNow(t.Context())
			if tc.restart {
				r.restart()
			}
			r.mustDrain(10)
			r.wantCurrent(2)
			if got := r.activities(); got["CREATE"] != 1 || got["UPDATE"] != 1 {
				t.Errorf("Provenances %v, want one CREATE and one UPDATE", got)
			}
			r.wantOneRevisionProvenance(before)
		})
	}
}

// A revision split over transactions of one value each: the first lands,
// the second fails with a 500. The retry finds the first value there and
// sends only the second; the first is not written a second time, and the
// revision's one Provenance cites, as revised, the versions that held the
// previous values (not the version the first value landed as).
func TestSplitRevisionThatPartlyLanded(t *testing.T) {
	for _, restart := range []bool{false, true} {
		name := "retried at once"
		if restart {
			name = "retried after a restart"
		}
		t.Run(name, func(t *testing.T) {
			r := newWriteRig(t, 1)
			fail := newFailTransactions(r)
			r.openAndCreate()
			before := r.values()
			fail.failNext(2) // the revision's second Observation transaction
			r.ingest(r.gas(2, 47))
			r.eng.FlushNow(t.Context())
			if restart {
				r.restart()
			}
			r.mustDrain(10)
			r.wantCurrent(2)
			for series, vs := range before {
				if n := len(r.fake.History("Observation", vs[0].id)); n != 2 {
					t.Errorf("series %s: %d versions on the server, want 2 (created, revised once)", series, n)
				}
			}
			r.wantOneRevisionProvenance(before)
		})
	}
}

// A request made only of conditional creates that the server refuses with
// 412 (its condition matched more than one resource, R4 http.html#ccreate)
// goes to the dead letters with the server's answer at once: no retry can
// change it, and in the outbox it would block its series for ever, out of
// an operator's reach.
func TestConditionalCreateMatchingSeveralIsBuried(t *testing.T) {
	for _, tc := range []struct {
		name       string
		maxEntries int
		setup      func(r *writeRig)
		wantReason string
	}{
		{"two Observations of a series on the server", 0, func(r *writeRig) {
			// Say two backfills against a server that did not honour the
			// condition; the series identifier is the ledger's.
			ws := r.outbox()
			if len(ws) != 1 {
				r.t.Fatalf("%d writes in the outbox, want the create", len(ws))
			}
			for range 2 {
				dup, _ := json.Marshal(map[string]any{"resourceType": "Observation", "status": "final",
					"code":       map[string]any{"text": "x"},
					"identifier": []any{map[string]any{"system": encode.DefaultOptions().SeriesSystem, "value": ws[0].Series[0]}}})
				if _, err := r.fake.Put(dup); err != nil {
					r.t.Fatal(err)
				}
			}
		}, "If-None-Exist matches more than one resource"},
		{"two Provenances with the write's tag", 2, func(r *writeRig) {
			r.fake.Inject(fakefhir.Fault{Method: http.MethodPost, Path: "Provenance", Status: http.StatusPreconditionFailed, Text: "tag matches 2 Provenances", Times: 1})
		}, "tag matches 2 Provenances"},
	} {
		t.Run(tc.name, func(t *testing.T) {
			r := newWriteRig(t, tc.maxEntries)
			r.open()
			r.ingest(append(r.inputs, r.gas(1, 44))...)
			tc.setup(r)
			r.eng.FlushNow(t.Context())
			h := r.health()
			if h.Stats.OutboxDepth != 0 || h.Stats.DeadLetters != 1 {
				var last string
				if ws := r.outbox(); len(ws) > 0 {
					last = ws[0].LastError
				}
				t.Fatalf("after one attempt: %d writes in the outbox (last error %q), %d dead letters; want the write buried", h.Stats.OutboxDepth, last, h.Stats.DeadLetters)
			}
			reasons := r.deadLetters()
			if len(reasons) != 1 || !strings.Contains(reasons[0], tc.wantReason) || !strings.Contains(reasons[0], "matched more than one resource") {
				t.Errorf("dead letter reasons %q, want the server's answer %q and what to do", reasons, tc.wantReason)
			}
		})
	}
}

// A correction arrives while the create of the old value waits in the
// outbox (after a 503), and the process restarts: the server ends with the
// corrected value, amended, and one Provenance per write.
func TestCorrectionWhileTheOldWriteWaits(t *testing.T) {
	r := newWriteRig(t, 0)
	r.open()
	r.fake.Fail(http.MethodPost, "", http.StatusServiceUnavailable, "", 1)
	r.ingest(append(r.inputs, r.gas(1, 44))...)
	r.eng.FlushNow(t.Context())
	r.ingest(r.gas(2, 47))
	r.restart()
	r.mustDrain(10)
	r.wantCurrent(2)
	for _, vs := range r.values() {
		if vs[0].status != "amended" {
			t.Errorf("server status %s, want amended", vs[0].status)
		}
	}
	if got := r.activities(); got["CREATE"] != 1 || got["UPDATE"] != 1 {
		t.Errorf("Provenances %v, want one CREATE and one UPDATE", got)
	}
}

// A 5xx storm while a value is created, revised twice and withdrawn, with
// a restart during it: every write waits in order, and once the server
// recovers it ends withdrawn.
func TestServerErrorStormThenRecovery(t *testing.T) {
	r := newWriteRig(t, 2)
	r.open()
	r.fake.Fail(http.MethodPost, "", http.StatusInternalServerError, "", 0)
	r.ingest(append(r.inputs, r.gas(1, 44))...)
	r.drain(3)
	r.ingest(r.gas(2, 47))
	r.drain(3)
	r.restart()
	r.ingest(r.gas(3, 49))
	r.ingest(obs("gas", "4", "entered-in-error", "2019-8", "mm[Hg]", 49, r.at, r.updated.Add(4*time.Minute)))
	r.drain(3)
	if d := r.health().Stats.OutboxDepth; d != 5 { // the create, two revisions, a withdrawal per value
		t.Fatalf("the outbox holds %d writes during the storm, want 5", d)
	}
	r.fake.ClearFaults()
	r.mustDrain(20)
	r.wantCurrent(2)
	for _, vs := range r.values() {
		if vs[0].status != "entered-in-error" {
			t.Errorf("server status %s, want entered-in-error", vs[0].status)
		}
	}
}

// A derived Observation deleted on the server: its revision is refused
// with 410 and goes to the dead letters (404 and 410 are permanent).
func TestRevisionOfADeletedObservationIsBuried(t *testing.T) {
	r := newWriteRig(t, 0)
	r.openAndCreate()
	gone := r.anyValue()
	r.fake.Inject(fakefhir.Fault{Method: http.MethodPost, Path: "", Status: http.StatusGone, Text: "Observation/" + gone.id + " is deleted"})
	r.ingest(r.gas(2, 47))
	left := r.drain(5)
	if h := r.health(); left != 0 || h.Stats.DeadLetters != 1 {
		t.Errorf("after 410: %d writes left, %d dead letters; want 0 and 1", left, h.Stats.DeadLetters)
	}
}
