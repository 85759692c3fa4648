package engine_test

import (
	"net/http"
	"testing"
	"time"

	"github.com/deadspace-fhir/deadspace/fhir/fhirtest/fakefhir"
)

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
