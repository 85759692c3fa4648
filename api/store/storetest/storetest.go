// Package storetest is the contract every [store.Store] implementation
// must pass, as a reusable suite: the embedded store runs it today, and a
// PostgreSQL one can run the same checks later.
//
// The expected values come from the documented contract in package store
// (its comments are the specification), and, for version ordering, from
// FHIR R4's rules for meta.versionId and meta.lastUpdated.
package storetest

import (
	"bytes"
	"context"
	"errors"
	"fmt"
	"slices"
	"sync"
	"testing"
	"time"

	"github.com/deadspace-fhir/deadspace/api/store"
)

// Run runs the contract against stores made by open. Every call of open
// must return a new, empty store, and arrange for its Close with
// t.Cleanup.
func Run(t *testing.T, open func(t *testing.T) store.Store) {
	t.Helper()
	tests := []struct {
		name string
		fn   func(t *testing.T, open func(t *testing.T) store.Store)
	}{
		{"PutInputs/VersionOrder", testVersionOrder},
		{"PutInputs/Batch", testPutBatch},
		{"PutInputs/Invalid", testPutInvalid},
		{"Inputs/PrefixAndOrder", testInputsOrder},
		{"PutPatient/VersionOrder", testPatientVersionOrder},
		{"PutPatient/NotFound", testPatientNotFound},
		{"MarkDirty/SinceAndGeneration", testMarkDirty},
		{"DirtyPatients/OldestFirst", testDirtyOrder},
		{"Commit/GenerationRace", testGenerationRace},
		{"Commit/ClearsDirty", testCommitClears},
		{"Commit/Atomic", testCommitAtomic},
		{"Commit/VisibleTogether", testCommitVisibleTogether},
		{"Ledger/SeriesOrder", testLedger},
		{"Entry/ReplaceKeepsIdentity", testEntryReplace},
		{"EntryByKey/PreviousKey", testEntryByKey},
		{"EntriesBetween/Paging", testEntriesBetween},
		{"Outbox/Lifecycle", testOutboxLifecycle},
		{"Outbox/UnknownWrite", testOutboxUnknown},
		{"Cursor", testCursor},
		{"SeenEvent", testSeenEvent},
		{"RestartEvents", testRestartEvents},
		{"PutNotified", testPutNotified},
		{"Events/OrderAndResume", testEvents},
		{"Prune", testPrune},
		{"Prune/KeepsTheNewestVersion", testPruneKeepsNewestVersion},
		{"Context/Canceled", testCanceled},
		{"Concurrent", testConcurrent},
		{"PutInputs/VersionOrderAcrossPatients", testVersionOrderAcrossPatients},
		{"PutInputs/OnlyReplaces", testOnlyReplaces},
		{"PutInputs/VersionTies", testVersionTies},
		{"PutInputs/Inert", testInert},
		{"Commit/ConflictAppliesNothing", testCommitConflict},
		{"Commit/OverlappingWritersOneWins", testOverlappingWriters},
		{"Result/OnePerVersion", testResults},
		{"EntryVersion/Superseded", testEntryVersion},
		{"PruneHistory", testPruneHistory},
		{"Dirty/SpanAndUrgency", testDirtySpan},
		{"Dirty/End", testDirtyEnd},
		{"Dirty/ReplacedSpan", testReplacedSpan},
		{"Dirty/UrgentChanges", testUrgentChanges},
		{"Commit/EmptyClearsMark", testEmptyCommit},
		{"InputsFrom/Range", testInputsFrom},
		{"InputsFrom/Exactly", testInputsFromExactly},
	}
	for _, tc := range tests {
		t.Run(tc.name, func(t *testing.T) {
			t.Parallel()
			tc.fn(t, open)
		})
	}
}

// t0 is an arbitrary instant; only differences from it matter.
var t0 = time.Date(2024, 3, 14, 2, 0, 0, 0, time.UTC)

func input(subject, logical, version string, lastUpdated, effective time.Time, payload string) store.Input {
	return store.Input{
		Subject: subject, Logical: logical, VersionID: version,
		LastUpdated: lastUpdated, EffectiveAt: effective, Payload: []byte(payload),
	}
}

func must(t *testing.T, err error) {
	t.Helper()
	if err != nil {
		t.Fatal(err)
	}
}

func mustNotFound(t *testing.T, what string, err error) {
	t.Helper()
	if !errors.Is(err, store.ErrNotFound) {
		t.Fatalf("%s: err = %v, want store.ErrNotFound", what, err)
	}
}

func put(t *testing.T, s store.Store, now time.Time, in ...store.Input) []store.PutResult {
	t.Helper()
	res, err := s.PutInputs(t.Context(), in, now)
	must(t, err)
	if len(res) != len(in) {
		t.Fatalf("PutInputs returned %d results for %d inputs", len(res), len(in))
	}
	return res
}

func dirtyOf(t *testing.T, s store.Store, subject string) (store.Dirty, bool) {
	t.Helper()
	ds, err := s.DirtyPatients(t.Context())
	must(t, err)
	for _, d := range ds {
		if d.Subject == subject {
			return d, true
		}
	}
	return store.Dirty{}, false
}

func sameInput(t *testing.T, got, want store.Input) {
	t.Helper()
	if got.Subject != want.Subject || got.Logical != want.Logical || got.VersionID != want.VersionID ||
		!got.LastUpdated.Equal(want.LastUpdated) || !got.EffectiveAt.Equal(want.EffectiveAt) ||
		!bytes.Equal(got.Payload, want.Payload) {
		t.Errorf("input = %+v\nwant    %+v", got, want)
	}
}

// versionCases are the ordering rule of store.Store.PutInputs. FHIR R4
// says there is "no fixed order for version ids" (quoted in
// FHIR R4 http.html), which is why LastUpdated decides first and ids
// only break ties. HAPI FHIR counts versions "1", "2", … (common practice,
// from memory), so "10" must beat "9"; Medplum writes UUIDs (measured with
// @medplum/fhir-router 5.2.13, measured), so ids that are
// not numbers fall back to string order.
var versionCases = []struct {
	name                   string
	oldVersion, newVersion string
	oldUpdated, newUpdated time.Time
	want                   store.PutResult
	wantNewStored          bool
}{
	{name: "LaterTimeWinsOverSmallerID", oldVersion: "5", newVersion: "4",
		oldUpdated: t0, newUpdated: t0.Add(time.Second), want: store.PutNewer, wantNewStored: true},
	{name: "EarlierTimeLosesToLargerID", oldVersion: "4", newVersion: "5",
		oldUpdated: t0, newUpdated: t0.Add(-time.Second), want: store.PutOlder},
	{name: "EqualTimeNumeric10After9", oldVersion: "9", newVersion: "10",
		oldUpdated: t0, newUpdated: t0, want: store.PutNewer, wantNewStored: true},
	{name: "EqualTimeNumeric9Before10", oldVersion: "10", newVersion: "9",
		oldUpdated: t0, newUpdated: t0, want: store.PutOlder},
	{name: "EqualTimeNumbersBeyond64Bits", oldVersion: "18446744073709551615", newVersion: "18446744073709551616",
		oldUpdated: t0, newUpdated: t0, want: store.PutNewer, wantNewStored: true},
	{name: "EqualTimeLexicalWhenOneIsNotANumber", oldVersion: "9", newVersion: "10a",
		oldUpdated: t0, newUpdated: t0, want: store.PutOlder},
	{name: "EqualTimeLexicalUUIDs", oldVersion: "3f2b9c1e-0000-4000-8000-000000000001", newVersion: "a04c1d2e-0000-4000-8000-000000000001",
		oldUpdated: t0, newUpdated: t0, want: store.PutNewer, wantNewStored: true},
	{name: "EqualTimeLexicalUUIDsOlder", oldVersion: "a04c1d2e-0000-4000-8000-000000000001", newVersion: "3f2b9c1e-0000-4000-8000-000000000001",
		oldUpdated: t0, newUpdated: t0, want: store.PutOlder},
	// The second put carries other bytes: a same version is still the
	// same version, because the server's versionId changes with every
	// change of content (FHIR R4 Resource.meta.versionId), so the stored
	// bytes stay.
	{name: "SameVersionAgain", oldVersion: "3", newVersion: "3",
		oldUpdated: t0, newUpdated: t0, want: store.PutSame},
	// The same instant written in another zone is the same time.
	{name: "SameInstantOtherZone", oldVersion: "3", newVersion: "3",
		oldUpdated: t0, newUpdated: t0.In(time.FixedZone("+01:00", 3600)), want: store.PutSame},
}

func testVersionOrder(t *testing.T, open func(t *testing.T) store.Store) {
	for _, tc := range versionCases {
		t.Run(tc.name, func(t *testing.T) {
			s := open(t)
			const subj = "Patient/v"
			old := input(subj, "Observation/1", tc.oldVersion, tc.oldUpdated, t0, "old")
			if got := put(t, s, t0, old); got[0] != store.PutNew {
				t.Fatalf("first put = %v, want PutNew", got[0])
			}
			d1, ok := dirtyOf(t, s, subj)
			if !ok {
				t.Fatal("patient not dirty after a new input")
			}
			nw := input(subj, "Observation/1", tc.newVersion, tc.newUpdated, t0.Add(time.Minute), "new")
			if got := put(t, s, t0.Add(time.Hour), nw); got[0] != tc.want {
				t.Fatalf("second put = %v, want %v", got[0], tc.want)
			}
			got, err := s.Input(t.Context(), subj, "Observation/1")
			must(t, err)
			if tc.wantNewStored {
				sameInput(t, got, nw)
			} else {
				sameInput(t, got, old)
			}
			d2, _ := dirtyOf(t, s, subj)
			if changed := d2.Generation != d1.Generation; changed != tc.wantNewStored {
				t.Errorf("generation %d → %d: changed = %v, want %v", d1.Generation, d2.Generation, changed, tc.wantNewStored)
			}
			if tc.wantNewStored && d2.Generation < d1.Generation {
				t.Errorf("generation went down: %d → %d", d1.Generation, d2.Generation)
			}
			if !d2.Since.Equal(t0) {
				t.Errorf("Since = %v, want the first mark %v", d2.Since, t0)
			}
		})
	}
}

func testPutBatch(t *testing.T, open func(t *testing.T) store.Store) {
	s := open(t)
	put(t, s, t0,
		input("Patient/a", "Observation/1", "2", t0, t0, "a1"),
		input("Patient/a", "Observation/2", "1", t0, t0, "a2"))
	got := put(t, s, t0.Add(time.Minute),
		input("Patient/a", "Observation/1", "2", t0, t0, "a1"),                    // same
		input("Patient/a", "Observation/2", "0", t0.Add(-time.Hour), t0, "old"),   // older
		input("Patient/b", "Observation/3", "1", t0, t0, "b3"),                    // new
		input("Patient/b", "Observation/3", "2", t0.Add(time.Second), t0, "b3v2"), // newer than the one just above
		input("Patient/b", "Observation/3", "1", t0, t0, "b3"),                    // older than the one just above
	)
	want := []store.PutResult{store.PutSame, store.PutOlder, store.PutNew, store.PutNewer, store.PutOlder}
	if !slices.Equal(got, want) {
		t.Fatalf("results = %v, want %v (in input order, each against what the batch stored before it)", got, want)
	}
	b3, err := s.Input(t.Context(), "Patient/b", "Observation/3")
	must(t, err)
	if b3.VersionID != "2" {
		t.Errorf("Patient/b Observation/3 version = %q, want 2", b3.VersionID)
	}
	// Patient/a had nothing new in the second batch: its mark keeps its
	// generation; Patient/b is dirty.
	if _, ok := dirtyOf(t, s, "Patient/b"); !ok {
		t.Error("Patient/b not dirty")
	}
	res, err := s.PutInputs(t.Context(), nil, t0)
	must(t, err)
	if len(res) != 0 {
		t.Errorf("empty batch gave %v", res)
	}
}

// An input without a subject or a logical reference cannot be keyed; the
// whole batch is refused, not half stored.
func testPutInvalid(t *testing.T, open func(t *testing.T) store.Store) {
	s := open(t)
	for _, tc := range []struct {
		name string
		bad  store.Input
	}{
		{"NoSubject", input("", "Observation/1", "1", t0, t0, "x")},
		{"NoLogical", input("Patient/a", "", "1", t0, t0, "x")},
	} {
		t.Run(tc.name, func(t *testing.T) {
			good := input("Patient/ok", "Observation/ok", "1", t0, t0, "x")
			if _, err := s.PutInputs(t.Context(), []store.Input{good, tc.bad}, t0); err == nil {
				t.Fatal("no error")
			}
			_, err := s.Input(t.Context(), "Patient/ok", "Observation/ok")
			mustNotFound(t, "valid input of a refused batch", err)
		})
	}
}

func testInputsOrder(t *testing.T, open func(t *testing.T) store.Store) {
	s := open(t)
	// Patient/1 is a prefix of Patient/10: a scan for one must not see
	// the other's inputs. (One logical reference names one resource,
	// filed under one patient at a time: see
	// testVersionOrderAcrossPatients.)
	// The order is EffectiveAt's, then Logical's among inputs of one
	// instant.
	put(t, s, t0,
		input("Patient/10", "Observation/a10", "1", t0, t0, "ten"),
		input("Patient/1", "Observation/c", "1", t0, t0, "c"),
		input("Patient/1", "Observation/a", "1", t0, t0, "a"),
		input("Patient/1", "Observation/d", "1", t0, t0.Add(-time.Nanosecond), "d, earlier"),
		input("Patient/1", "Observation/b", "1", t0, t0, "b"),
		input("Patient/1", "Observation/0", "1", t0, t0.Add(time.Hour), "0, later"),
		input("Patient/0", "Observation/z", "1", t0, t0, "zero"))
	got, err := s.Inputs(t.Context(), "Patient/1")
	must(t, err)
	var logical []string
	for _, in := range got {
		if in.Subject != "Patient/1" {
			t.Errorf("input of %s in Patient/1's list", in.Subject)
		}
		logical = append(logical, in.Logical+"="+string(in.Payload))
	}
	if want := []string{"Observation/d=d, earlier", "Observation/a=a", "Observation/b=b", "Observation/c=c", "Observation/0=0, later"}; !slices.Equal(logical, want) {
		t.Errorf("Inputs = %v, want %v (EffectiveAt, then Logical order)", logical, want)
	}
	none, err := s.Inputs(t.Context(), "Patient/none")
	must(t, err)
	if len(none) != 0 {
		t.Errorf("unknown patient has %d inputs", len(none))
	}
	_, err = s.Input(t.Context(), "Patient/1", "Observation/zz")
	mustNotFound(t, "Input", err)
	// The same logical reference under another subject is another record.
	_, err = s.Input(t.Context(), "Patient/10", "Observation/c")
	mustNotFound(t, "Input under another subject", err)
}

// patientTieCases add to versionCases what breaks a tie of a Patient's
// versions: its facts (the payload), compared as bytes, so that which of
// two copies without meta is kept does not depend on the order they
// arrive in (ref.Compare's Content, as replay orders them). A same
// version with the same facts is the same version.
var patientTieCases = []struct {
	name                   string
	oldPayload, newPayload string
	want                   store.PutResult
}{
	{name: "TieGreaterFactsWin", oldPayload: "a", newPayload: "b", want: store.PutNewer},
	{name: "TieSmallerFactsLose", oldPayload: "b", newPayload: "a", want: store.PutOlder},
}

func testPatientVersionOrder(t *testing.T, open func(t *testing.T) store.Store) {
	for _, tc := range patientTieCases {
		t.Run(tc.name, func(t *testing.T) {
			for _, meta := range []struct {
				version string
				updated time.Time
			}{{"", time.Time{}}, {"3", t0}} {
				s := open(t)
				put := func(payload string) store.PutResult {
					res, err := s.PutPatient(t.Context(), store.Patient{Subject: "Patient/p", VersionID: meta.version, LastUpdated: meta.updated, Payload: []byte(payload)}, t0)
					must(t, err)
					return res
				}
				put(tc.oldPayload)
				if got := put(tc.newPayload); got != tc.want {
					t.Fatalf("version %q: second put = %v, want %v", meta.version, got, tc.want)
				}
				got, err := s.Patient(t.Context(), "Patient/p")
				must(t, err)
				if want := max(tc.oldPayload, tc.newPayload); string(got.Payload) != want {
					t.Errorf("version %q: stored %q, want %q", meta.version, got.Payload, want)
				}
			}
		})
	}
	for _, tc := range versionCases {
		t.Run(tc.name, func(t *testing.T) {
			s := open(t)
			subj := "Patient/p"
			newPayload := "new"
			if tc.want == store.PutSame {
				newPayload = "old" // the same version, read again: the same facts
			}
			old := store.Patient{Subject: subj, VersionID: tc.oldVersion, LastUpdated: tc.oldUpdated, Payload: []byte("old"), FetchedAt: t0}
			res, err := s.PutPatient(t.Context(), old, t0)
			must(t, err)
			if res != store.PutNew {
				t.Fatalf("first put = %v, want PutNew", res)
			}
			d1, ok := dirtyOf(t, s, subj)
			if !ok {
				t.Fatal("patient not dirty after new facts")
			}
			nw := store.Patient{Subject: subj, VersionID: tc.newVersion, LastUpdated: tc.newUpdated, Payload: []byte(newPayload), FetchedAt: t0.Add(time.Hour)}
			res, err = s.PutPatient(t.Context(), nw, t0.Add(time.Hour))
			must(t, err)
			if res != tc.want {
				t.Fatalf("second put = %v, want %v", res, tc.want)
			}
			got, err := s.Patient(t.Context(), subj)
			must(t, err)
			wantPayload := "old"
			if tc.wantNewStored {
				wantPayload = "new"
			}
			if string(got.Payload) != wantPayload || got.Subject != subj {
				t.Errorf("stored %s payload %q, want %q", got.Subject, got.Payload, wantPayload)
			}
			d2, _ := dirtyOf(t, s, subj)
			if changed := d2.Generation != d1.Generation; changed != tc.wantNewStored {
				t.Errorf("generation %d → %d: changed = %v, want %v", d1.Generation, d2.Generation, changed, tc.wantNewStored)
			}
		})
	}
}

func testPatientNotFound(t *testing.T, open func(t *testing.T) store.Store) {
	s := open(t)
	_, err := s.Patient(t.Context(), "Patient/none")
	mustNotFound(t, "Patient", err)
}

func testMarkDirty(t *testing.T, open func(t *testing.T) store.Store) {
	s := open(t)
	must(t, s.MarkDirty(t.Context(), "Patient/a", t0))
	d1, ok := dirtyOf(t, s, "Patient/a")
	if !ok || !d1.Since.Equal(t0) {
		t.Fatalf("after MarkDirty: %+v, %v; want Since %v", d1, ok, t0)
	}
	// A second mark before any evaluation keeps the first Since: the
	// settle delay counts from the first change (store.Dirty.Since).
	must(t, s.MarkDirty(t.Context(), "Patient/a", t0.Add(time.Minute)))
	d2, _ := dirtyOf(t, s, "Patient/a")
	if !d2.Since.Equal(t0) {
		t.Errorf("Since = %v after a second mark, want %v", d2.Since, t0)
	}
	if d2.Generation <= d1.Generation {
		t.Errorf("generation %d → %d, want an increase", d1.Generation, d2.Generation)
	}
	// An input that changes nothing does not count as a change.
	put(t, s, t0, input("Patient/a", "Observation/1", "1", t0, t0, "x"))
	d3, _ := dirtyOf(t, s, "Patient/a")
	put(t, s, t0.Add(2*time.Minute), input("Patient/a", "Observation/1", "1", t0, t0, "x"))
	d4, _ := dirtyOf(t, s, "Patient/a")
	if d4.Generation != d3.Generation {
		t.Errorf("PutSame changed the generation %d → %d", d3.Generation, d4.Generation)
	}
}

func testDirtyOrder(t *testing.T, open func(t *testing.T) store.Store) {
	s := open(t)
	must(t, s.MarkDirty(t.Context(), "Patient/c", t0.Add(2*time.Minute)))
	must(t, s.MarkDirty(t.Context(), "Patient/a", t0.Add(3*time.Minute)))
	must(t, s.MarkDirty(t.Context(), "Patient/b", t0.Add(time.Minute)))
	must(t, s.MarkDirty(t.Context(), "Patient/c", t0.Add(4*time.Minute))) // keeps its earlier Since
	ds, err := s.DirtyPatients(t.Context())
	must(t, err)
	var got []string
	for _, d := range ds {
		got = append(got, d.Subject)
	}
	if want := []string{"Patient/b", "Patient/c", "Patient/a"}; !slices.Equal(got, want) {
		t.Errorf("DirtyPatients = %v, want %v (oldest Since first)", got, want)
	}
}

// The race the generation exists for (store.Dirty.Generation): an input
// arriving between DirtyPatients and Commit must not be lost.
func testGenerationRace(t *testing.T, open func(t *testing.T) store.Store) {
	s := open(t)
	const subj = "Patient/r"
	put(t, s, t0, input(subj, "Observation/1", "1", t0, t0, "x"))
	read, ok := dirtyOf(t, s, subj)
	if !ok {
		t.Fatal("not dirty")
	}
	// The evaluation is running; a new input arrives.
	put(t, s, t0.Add(time.Second), input(subj, "Observation/2", "1", t0, t0, "y"))
	must(t, s.Commit(t.Context(), store.Change{Subject: subj, Generation: read.Generation}, t0.Add(2*time.Second)))
	after, ok := dirtyOf(t, s, subj)
	if !ok {
		t.Fatal("patient no longer dirty: the input that arrived during the evaluation was lost")
	}
	if after.Generation <= read.Generation {
		t.Errorf("generation %d after a change during evaluation of %d, want larger", after.Generation, read.Generation)
	}
	// Since restarts at the commit: the patient has been dirty "since the
	// last evaluation" only from then, so a steady feed still settles.
	if want := t0.Add(2 * time.Second); !after.Since.Equal(want) {
		t.Errorf("Since = %v, want the commit time %v", after.Since, want)
	}
	// The next evaluation reads the newer generation and clears it.
	must(t, s.Commit(t.Context(), store.Change{Subject: subj, Generation: after.Generation}, t0.Add(3*time.Second)))
	if d, ok := dirtyOf(t, s, subj); ok {
		t.Errorf("still dirty after a commit of the current generation: %+v", d)
	}
	// Once cleared, the next change starts a new Since.
	put(t, s, t0.Add(time.Hour), input(subj, "Observation/3", "1", t0, t0, "z"))
	if d, _ := dirtyOf(t, s, subj); !d.Since.Equal(t0.Add(time.Hour)) || d.Generation <= after.Generation {
		t.Errorf("after clearing and a new input: %+v, want Since %v and generation > %d", d, t0.Add(time.Hour), after.Generation)
	}
}

func testCommitClears(t *testing.T, open func(t *testing.T) store.Store) {
	s := open(t)
	must(t, s.MarkDirty(t.Context(), "Patient/a", t0))
	must(t, s.MarkDirty(t.Context(), "Patient/b", t0))
	da, _ := dirtyOf(t, s, "Patient/a")
	must(t, s.Commit(t.Context(), store.Change{Subject: "Patient/a", Generation: da.Generation}, t0))
	if _, ok := dirtyOf(t, s, "Patient/a"); ok {
		t.Error("Patient/a still dirty")
	}
	if _, ok := dirtyOf(t, s, "Patient/b"); !ok {
		t.Error("a commit of Patient/a cleared Patient/b")
	}
	st, err := s.Stats(t.Context())
	must(t, err)
	if st.DirtyPatients != 1 {
		t.Errorf("Stats.DirtyPatients = %d, want 1", st.DirtyPatients)
	}
	// A commit for a patient that is not dirty is allowed (a forced
	// evaluation) and marks nothing.
	must(t, s.Commit(t.Context(), store.Change{Subject: "Patient/c", Generation: 0}, t0))
	if _, ok := dirtyOf(t, s, "Patient/c"); ok {
		t.Error("commit made Patient/c dirty")
	}
}

func entry(subject, series, key string, eff time.Time) store.Entry {
	return store.Entry{
		Series: series, Subject: subject, Key: key, Status: "final",
		EffectiveAt: eff, UpdatedAt: t0, Payload: []byte("payload of " + key),
	}
}

func writeFor(series ...string) store.Write {
	return store.Write{Series: series, Body: []byte(fmt.Sprint("bundle for ", series))}
}

// A failure inside Commit leaves nothing of it: the ledger, the outbox,
// the feed and the dirty mark are as before. The failure used is an entry
// without a Series, which can have no identity in the ledger.
func testCommitAtomic(t *testing.T, open func(t *testing.T) store.Store) {
	s := open(t)
	const subj = "Patient/x"
	must(t, s.MarkDirty(t.Context(), subj, t0))
	d, _ := dirtyOf(t, s, subj)
	bad := store.Change{
		Subject: subj, Generation: d.Generation,
		Entries: []store.Entry{entry(subj, "s1", "k1", t0), entry(subj, "", "k2", t0)},
		Writes:  []store.Write{writeFor("s1")},
	}
	if err := s.Commit(t.Context(), bad, t0); err == nil {
		t.Fatal("Commit with an entry without Series succeeded")
	}
	_, err := s.Entry(t.Context(), "s1")
	mustNotFound(t, "entry of a failed commit", err)
	if ws, _ := s.DueWrites(t.Context(), t0.Add(time.Hour), 10); len(ws) != 0 {
		t.Errorf("failed commit left %d writes", len(ws))
	}
	if evs, _ := s.Events(t.Context(), 0, 10); len(evs) != 0 {
		t.Errorf("failed commit left %d events", len(evs))
	}
	if _, ok := dirtyOf(t, s, subj); !ok {
		t.Error("failed commit cleared the dirty mark")
	}
	st, err := s.Stats(t.Context())
	must(t, err)
	if st.OutboxDepth != 0 {
		t.Errorf("Stats.OutboxDepth = %d after a failed commit", st.OutboxDepth)
	}
	if last, _ := s.LastEvent(t.Context()); last != 0 {
		t.Errorf("LastEvent = %d after a failed commit", last)
	}

	// The same change without the bad entry applies whole.
	good := bad
	good.Entries = good.Entries[:1]
	must(t, s.Commit(t.Context(), good, t0))
	en, err := s.Entry(t.Context(), "s1")
	must(t, err)
	if en.Key != "k1" || en.Subject != subj || string(en.Payload) != "payload of k1" || !en.EffectiveAt.Equal(t0) {
		t.Errorf("entry = %+v", en)
	}
	ws, err := s.DueWrites(t.Context(), t0, 10)
	must(t, err)
	if len(ws) != 1 || !slices.Equal(ws[0].Series, []string{"s1"}) {
		t.Errorf("writes = %+v", ws)
	}
	evs, err := s.Events(t.Context(), 0, 10)
	must(t, err)
	if len(evs) != 1 || evs[0].Series != "s1" || evs[0].Key != "k1" || evs[0].Subject != subj || evs[0].Status != "final" {
		t.Errorf("events = %+v", evs)
	}
	if _, ok := dirtyOf(t, s, subj); ok {
		t.Error("patient still dirty")
	}
}

// Readers never see part of a commit: whenever a feed event is visible,
// its entry and its write are too. Reading the event first and the rest
// afterwards makes the check valid for any store whose commits are
// atomic, without a shared snapshot.
func testCommitVisibleTogether(t *testing.T, open func(t *testing.T) store.Store) {
	s := open(t)
	const n = 40
	done := make(chan struct{})
	var wg sync.WaitGroup
	wg.Go(func() {
		defer close(done)
		for i := range n {
			series := fmt.Sprintf("s%03d", i)
			subj := fmt.Sprintf("Patient/%d", i%3)
			err := s.Commit(t.Context(), store.Change{
				Subject: subj,
				Entries: []store.Entry{entry(subj, series, "k-"+series, t0)},
				Writes:  []store.Write{writeFor(series)},
			}, t0)
			if err != nil {
				t.Error(err)
				return
			}
		}
	})
	check := func() int {
		evs, err := s.Events(t.Context(), 0, 1000)
		must(t, err)
		if len(evs) == 0 {
			return 0
		}
		ws, err := s.DueWrites(t.Context(), t0.Add(time.Hour), 1000)
		must(t, err)
		written := map[string]bool{}
		for _, w := range ws {
			for _, se := range w.Series {
				written[se] = true
			}
		}
		for _, ev := range evs {
			en, err := s.Entry(t.Context(), ev.Series)
			if err != nil || en.Key != ev.Key {
				t.Fatalf("event %d visible but entry %s: %+v, %v", ev.Seq, ev.Series, en, err)
			}
			if !written[ev.Series] {
				t.Fatalf("event %d visible but no write for %s", ev.Seq, ev.Series)
			}
		}
		return len(evs)
	}
	for running := true; running; {
		select {
		case <-done:
			running = false
		default:
		}
		check()
	}
	wg.Wait()
	if got := check(); got != n {
		t.Errorf("%d events after %d commits", got, n)
	}
}

func testLedger(t *testing.T, open func(t *testing.T) store.Store) {
	s := open(t)
	must(t, s.Commit(t.Context(), store.Change{Subject: "Patient/1", Entries: []store.Entry{
		entry("Patient/1", "s-c", "k1", t0), entry("Patient/1", "s-a", "k2", t0.Add(time.Hour)), entry("Patient/1", "s-b", "k3", t0),
	}}, t0))
	must(t, s.Commit(t.Context(), store.Change{Subject: "Patient/10", Entries: []store.Entry{entry("Patient/10", "s-0", "k4", t0)}}, t0))
	got, err := s.Ledger(t.Context(), "Patient/1")
	must(t, err)
	var series []string
	for _, en := range got {
		series = append(series, en.Series)
	}
	if want := []string{"s-a", "s-b", "s-c"}; !slices.Equal(series, want) {
		t.Errorf("Ledger = %v, want %v (Series order, this patient only)", series, want)
	}
	_, err = s.Entry(t.Context(), "s-none")
	mustNotFound(t, "Entry", err)
}

// Replacing an entry (a correction of an input) keeps its series and
// server identity and moves its EffectiveAt.
func testEntryReplace(t *testing.T, open func(t *testing.T) store.Store) {
	s := open(t)
	const subj = "Patient/e"
	must(t, s.Commit(t.Context(), store.Change{Subject: subj, Entries: []store.Entry{entry(subj, "s1", "k1", t0)}, Writes: []store.Write{writeFor("s1")}}, t0))
	ws, err := s.DueWrites(t.Context(), t0, 10)
	must(t, err)
	must(t, s.Acknowledge(t.Context(), ws[0].ID, map[string][2]string{"s1": {"obs-1", "1"}}))
	en, err := s.Entry(t.Context(), "s1")
	must(t, err)
	en.Key, en.Status, en.EffectiveAt = "k2", "amended", t0.Add(time.Hour)
	en.Revisions = []string{"k1"}
	must(t, s.Commit(t.Context(), store.Change{Subject: subj, Entries: []store.Entry{en}}, t0.Add(time.Hour)))
	got, err := s.Entry(t.Context(), "s1")
	must(t, err)
	if got.Key != "k2" || got.Status != "amended" || got.ServerID != "obs-1" || !got.EffectiveAt.Equal(t0.Add(time.Hour)) ||
		!slices.Equal(got.Revisions, []string{"k1"}) {
		t.Errorf("replaced entry = %+v", got)
	}
	all, err := s.Ledger(t.Context(), subj)
	must(t, err)
	if len(all) != 1 {
		t.Errorf("ledger has %d entries after a replacement, want 1", len(all))
	}
	old, err := s.EntriesBetween(t.Context(), subj, t0, t0.Add(time.Minute), "", 10)
	must(t, err)
	if len(old) != 0 {
		t.Errorf("entry still listed at its old EffectiveAt: %+v", old)
	}
}

func testEntryByKey(t *testing.T, open func(t *testing.T) store.Store) {
	s := open(t)
	const subj = "Patient/k"
	must(t, s.Commit(t.Context(), store.Change{Subject: subj, Entries: []store.Entry{entry(subj, "s1", "k1", t0), entry(subj, "s2", "k9", t0)}}, t0))
	e2 := entry(subj, "s1", "k2", t0)
	e2.Revisions = []string{"k1"}
	must(t, s.Commit(t.Context(), store.Change{Subject: subj, Entries: []store.Entry{e2}}, t0))
	e3 := entry(subj, "s1", "k3", t0)
	e3.Revisions = []string{"k1", "k2"}
	must(t, s.Commit(t.Context(), store.Change{Subject: subj, Entries: []store.Entry{e3}}, t0))
	for _, tc := range []struct{ key, wantSeries string }{
		{"k1", "s1"}, {"k2", "s1"}, {"k3", "s1"}, {"k9", "s2"},
	} {
		t.Run(tc.key, func(t *testing.T) {
			en, err := s.EntryByKey(t.Context(), tc.key)
			must(t, err)
			if en.Series != tc.wantSeries {
				t.Errorf("EntryByKey(%s).Series = %s, want %s", tc.key, en.Series, tc.wantSeries)
			}
			if tc.wantSeries == "s1" && (en.Key != "k3" || !slices.Equal(en.Revisions, []string{"k1", "k2"})) {
				t.Errorf("EntryByKey(%s) = key %s revisions %v, want the current entry k3 [k1 k2]", tc.key, en.Key, en.Revisions)
			}
		})
	}
	_, err := s.EntryByKey(t.Context(), "k-none")
	mustNotFound(t, "EntryByKey", err)
}

func testEntriesBetween(t *testing.T, open func(t *testing.T) store.Store) {
	s := open(t)
	const subj = "Patient/a"
	must(t, s.Commit(t.Context(), store.Change{Subject: subj, Entries: []store.Entry{
		entry(subj, "s-c", "k1", t0),
		entry(subj, "s-a", "k2", t0),
		entry(subj, "s-b", "k3", t0.Add(time.Minute)),
		entry(subj, "s-d", "k4", t0.Add(2*time.Minute)),
		entry(subj, "s-e", "k5", t0.Add(3*time.Minute)), // at `to`: excluded
		entry(subj, "s-0", "k6", t0.Add(-time.Nanosecond)),
	}}, t0))
	must(t, s.Commit(t.Context(), store.Change{Subject: "Patient/b", Entries: []store.Entry{entry("Patient/b", "s-x", "k7", t0.Add(time.Minute))}}, t0))
	from, to := t0, t0.Add(3*time.Minute)
	// Expected order: EffectiveAt, then Series (store.Store.EntriesBetween).
	want := []string{"s-a", "s-c", "s-b", "s-d"}
	for _, limit := range []int{1, 2, 3, 10} {
		t.Run(fmt.Sprint("limit", limit), func(t *testing.T) {
			var got []string
			after := ""
			for page := 0; page < 10; page++ {
				es, err := s.EntriesBetween(t.Context(), subj, from, to, after, limit)
				must(t, err)
				if len(es) > limit {
					t.Fatalf("page of %d, limit %d", len(es), limit)
				}
				if len(es) == 0 {
					break
				}
				for _, en := range es {
					got = append(got, en.Series)
				}
				after = es[len(es)-1].Series
			}
			if !slices.Equal(got, want) {
				t.Errorf("pages = %v, want %v", got, want)
			}
		})
	}
	t.Run("FromLater", func(t *testing.T) {
		es, err := s.EntriesBetween(t.Context(), subj, t0.Add(time.Minute), to, "", 10)
		must(t, err)
		if len(es) != 2 || es[0].Series != "s-b" || es[1].Series != "s-d" {
			t.Errorf("got %+v", es)
		}
	})
	t.Run("EmptyRange", func(t *testing.T) {
		es, err := s.EntriesBetween(t.Context(), subj, to, from, "", 10)
		must(t, err)
		if len(es) != 0 {
			t.Errorf("got %d entries for to < from", len(es))
		}
	})
	t.Run("MovedEntry", func(t *testing.T) {
		moved := entry(subj, "s-d", "k4b", t0.Add(4*time.Minute))
		moved.Revisions = []string{"k4"}
		must(t, s.Commit(t.Context(), store.Change{Subject: subj, Entries: []store.Entry{moved}}, t0))
		es, err := s.EntriesBetween(t.Context(), subj, from, to, "", 10)
		must(t, err)
		var got []string
		for _, en := range es {
			got = append(got, en.Series)
		}
		if w := []string{"s-a", "s-c", "s-b"}; !slices.Equal(got, w) {
			t.Errorf("after moving s-d out of range: %v, want %v", got, w)
		}
	})
}

func testOutboxLifecycle(t *testing.T, open func(t *testing.T) store.Store) {
	s := open(t)
	ctx := t.Context()
	const subj = "Patient/o"
	later := writeFor("s2")
	later.NotBefore = t0.Add(time.Hour)
	must(t, s.Commit(ctx, store.Change{Subject: subj,
		Entries: []store.Entry{entry(subj, "s1", "k1", t0), entry(subj, "s2", "k2", t0)},
		Writes:  []store.Write{writeFor("s1"), later},
	}, t0))

	due, err := s.DueWrites(ctx, t0, 10)
	must(t, err)
	if len(due) != 1 {
		t.Fatalf("due now: %d writes, want 1 (the other waits an hour)", len(due))
	}
	w1 := due[0]
	if w1.ID == 0 || !w1.CreatedAt.Equal(t0) || !w1.NotBefore.Equal(t0) || w1.Subject != subj || w1.Attempts != 0 ||
		!slices.Equal(w1.Series, []string{"s1"}) || string(w1.Body) != "bundle for [s1]" {
		t.Errorf("write = %+v; want an id, CreatedAt = NotBefore = commit time", w1)
	}
	due, err = s.DueWrites(ctx, t0.Add(time.Hour), 10)
	must(t, err)
	if len(due) != 2 || due[0].ID != w1.ID || due[1].ID <= w1.ID {
		t.Fatalf("due in an hour: %+v, want both, oldest first", due)
	}
	w2 := due[1]
	if due, _ := s.DueWrites(ctx, t0.Add(time.Hour), 1); len(due) != 1 || due[0].ID != w1.ID {
		t.Errorf("limit 1: %+v", due)
	}
	wantStats(t, s, store.Stats{OutboxDepth: 2, OldestWrite: t0})

	must(t, s.Reschedule(ctx, w1.ID, t0.Add(2*time.Hour), "503 Service Unavailable"))
	due, err = s.DueWrites(ctx, t0.Add(time.Hour), 10)
	must(t, err)
	if len(due) != 1 || due[0].ID != w2.ID {
		t.Errorf("after rescheduling w1 two hours out: due %+v, want only w2", due)
	}
	due, err = s.DueWrites(ctx, t0.Add(2*time.Hour), 10)
	must(t, err)
	if len(due) != 2 || due[0].ID != w1.ID || due[0].Attempts != 1 || due[0].LastError != "503 Service Unavailable" ||
		!due[0].NotBefore.Equal(t0.Add(2*time.Hour)) || !bytes.Equal(due[0].Body, w1.Body) {
		t.Errorf("rescheduled: %+v", due)
	}
	must(t, s.Reschedule(ctx, w1.ID, t0.Add(3*time.Hour), "timeout"))
	if due, _ := s.DueWrites(ctx, t0.Add(3*time.Hour), 1); len(due) != 1 || due[0].Attempts != 2 || due[0].LastError != "timeout" {
		t.Errorf("second reschedule: %+v", due)
	}

	must(t, s.Acknowledge(ctx, w2.ID, map[string][2]string{"s2": {"obs-2", "1"}}))
	en, err := s.Entry(ctx, "s2")
	must(t, err)
	if en.ServerID != "obs-2" || en.ServerVersion != "1" {
		t.Errorf("acknowledged entry: ServerID %q ServerVersion %q", en.ServerID, en.ServerVersion)
	}
	if en, _ := s.Entry(ctx, "s1"); en.ServerID != "" {
		t.Errorf("unacknowledged entry has ServerID %q", en.ServerID)
	}
	wantStats(t, s, store.Stats{OutboxDepth: 1, OldestWrite: t0})
	err = s.Acknowledge(ctx, w2.ID, nil)
	mustNotFound(t, "second Acknowledge", err)

	// A later commit: OldestWrite stays the oldest remaining write.
	must(t, s.Commit(ctx, store.Change{Subject: subj, Writes: []store.Write{writeFor("s1")}}, t0.Add(30*time.Minute)))
	wantStats(t, s, store.Stats{OutboxDepth: 2, OldestWrite: t0})

	must(t, s.Bury(ctx, w1.ID, "422: rejected by the server", t0.Add(4*time.Hour)))
	dls, err := s.DeadLetters(ctx, 10)
	must(t, err)
	if len(dls) != 1 || dls[0].ID != w1.ID || dls[0].Reason != "422: rejected by the server" || !dls[0].At.Equal(t0.Add(4*time.Hour)) ||
		dls[0].Attempts != 3 || !bytes.Equal(dls[0].Body, w1.Body) || dls[0].Subject != subj {
		t.Errorf("dead letters = %+v, want 3 attempts: two rescheduled and the refused one", dls)
	}
	wantStats(t, s, store.Stats{OutboxDepth: 1, OldestWrite: t0.Add(30 * time.Minute), DeadLetters: 1})
	due, err = s.DueWrites(ctx, t0.Add(24*time.Hour), 10)
	must(t, err)
	if len(due) != 1 || due[0].ID == w1.ID {
		t.Errorf("buried write still due: %+v", due)
	}
	must(t, s.Bury(ctx, due[0].ID, "second", t0.Add(5*time.Hour)))
	dls, err = s.DeadLetters(ctx, 10)
	must(t, err)
	if len(dls) != 2 || dls[0].ID != w1.ID || dls[1].Reason != "second" {
		t.Errorf("dead letters, oldest first: %+v", dls)
	}
	if dls, _ := s.DeadLetters(ctx, 1); len(dls) != 1 || dls[0].ID != w1.ID {
		t.Errorf("dead letters, limit 1: %+v", dls)
	}
	wantStats(t, s, store.Stats{DeadLetters: 2})
}

func wantStats(t *testing.T, s store.Store, want store.Stats) {
	t.Helper()
	got, err := s.Stats(t.Context())
	must(t, err)
	if got.OutboxDepth != want.OutboxDepth || !got.OldestWrite.Equal(want.OldestWrite) ||
		got.DeadLetters != want.DeadLetters || got.DirtyPatients != want.DirtyPatients {
		t.Errorf("Stats = %+v, want %+v", got, want)
	}
}

func testOutboxUnknown(t *testing.T, open func(t *testing.T) store.Store) {
	s := open(t)
	ctx := t.Context()
	mustNotFound(t, "Acknowledge", s.Acknowledge(ctx, 42, nil))
	mustNotFound(t, "Reschedule", s.Reschedule(ctx, 42, t0, "x"))
	mustNotFound(t, "Bury", s.Bury(ctx, 42, "x", t0))
	wantStats(t, s, store.Stats{})
}

func testCursor(t *testing.T, open func(t *testing.T) store.Store) {
	s := open(t)
	ctx := t.Context()
	if v, err := s.Cursor(ctx, "poll"); err != nil || v != "" {
		t.Errorf("unset cursor = %q, %v; want \"\"", v, err)
	}
	must(t, s.SetCursor(ctx, "poll", "2024-03-14T02:00:00Z"))
	must(t, s.SetCursor(ctx, "other", "x"))
	must(t, s.SetCursor(ctx, "poll", "2024-03-14T03:00:00Z"))
	if v, _ := s.Cursor(ctx, "poll"); v != "2024-03-14T03:00:00Z" {
		t.Errorf("cursor = %q after overwrite", v)
	}
	if v, _ := s.Cursor(ctx, "other"); v != "x" {
		t.Errorf("other cursor = %q", v)
	}
}

func testSeenEvent(t *testing.T, open func(t *testing.T) store.Store) {
	s := open(t)
	steps := []struct {
		sub          string
		number, prev uint64
	}{
		{"sub-a", 5, 0},
		{"sub-a", 7, 5},
		{"sub-b", 1, 0}, // per subscription
		{"sub-a", 6, 7}, // a late redelivery does not lower the highest
		{"sub-a", 7, 7},
		{"sub-a", 8, 7},
		// A drop within what reordering explains stays a late delivery.
		{"sub-c", 150, 0},
		{"sub-c", 90, 150},
		{"sub-c", 151, 150},
		// A numbering that started again from 1 (store.EventsRestarted):
		// the highest follows it.
		{"sub-c", 1, 151},
		{"sub-c", 2, 1},
		{"sub-c", 1, 2},
	}
	for i, st := range steps {
		prev, err := s.SeenEvent(t.Context(), st.sub, st.number)
		must(t, err)
		if prev != st.prev {
			t.Errorf("step %d: SeenEvent(%s, %d) = %d, want %d", i, st.sub, st.number, prev, st.prev)
		}
	}
}

// testRestartEvents checks that a restart (a handshake) sets the highest
// event number whatever it was, per subscription, and that the numbering
// goes on from there.
func testRestartEvents(t *testing.T, open func(t *testing.T) store.Store) {
	s := open(t)
	ctx := t.Context()
	must(t, func() error { _, err := s.SeenEvent(ctx, "sub-a", 40); return err }())
	must(t, func() error { _, err := s.SeenEvent(ctx, "sub-b", 9); return err }())
	steps := []struct {
		name         string
		restart      bool
		sub          string
		number, prev uint64
	}{
		{"a restart to 0 lowers the highest", true, "sub-a", 0, 40},
		{"the new numbering is new", false, "sub-a", 1, 0},
		{"and goes on", false, "sub-a", 3, 1},
		{"a restart with a count sets it", true, "sub-a", 2, 3},
		{"a restart may raise it", true, "sub-a", 5, 2},
		{"a restart of a subscription never seen", true, "sub-c", 0, 0},
		{"other subscriptions keep theirs", false, "sub-b", 9, 9},
	}
	for _, st := range steps {
		call := s.SeenEvent
		if st.restart {
			call = s.RestartEvents
		}
		prev, err := call(ctx, st.sub, st.number)
		must(t, err)
		if prev != st.prev {
			t.Errorf("%s: previous %d, want %d", st.name, prev, st.prev)
		}
	}
	if _, err := s.RestartEvents(ctx, "", 0); err == nil {
		t.Error("RestartEvents took an empty subscription")
	}
}

func testEvents(t *testing.T, open func(t *testing.T) store.Store) {
	s := open(t)
	ctx := t.Context()
	if last, err := s.LastEvent(ctx); err != nil || last != 0 {
		t.Errorf("empty feed LastEvent = %d, %v", last, err)
	}
	if evs, err := s.Events(ctx, 0, 10); err != nil || len(evs) != 0 {
		t.Errorf("empty feed Events = %v, %v", evs, err)
	}
	must(t, s.Commit(ctx, store.Change{Subject: "Patient/1", Entries: []store.Entry{
		entry("Patient/1", "s-z", "k1", t0), entry("Patient/1", "s-a", "k2", t0), entry("Patient/1", "s-m", "k3", t0),
	}}, t0))
	amended := entry("Patient/2", "s-b", "k4", t0)
	amended.Status = "entered-in-error"
	must(t, s.Commit(ctx, store.Change{Subject: "Patient/2", Entries: []store.Entry{entry("Patient/2", "s-a2", "k5", t0), amended}}, t0.Add(time.Minute)))
	evs, err := s.Events(ctx, 0, 10)
	must(t, err)
	var got []string
	for i, ev := range evs {
		got = append(got, ev.Series)
		if i > 0 && ev.Seq <= evs[i-1].Seq {
			t.Errorf("Seq %d after %d: not increasing", ev.Seq, evs[i-1].Seq)
		}
	}
	// Commit order, and entry order within a commit.
	if want := []string{"s-z", "s-a", "s-m", "s-a2", "s-b"}; !slices.Equal(got, want) {
		t.Fatalf("feed = %v, want %v", got, want)
	}
	if e := evs[4]; e.Status != "entered-in-error" || e.Subject != "Patient/2" || e.Key != "k4" || !e.At.Equal(t0.Add(time.Minute)) {
		t.Errorf("event = %+v", e)
	}
	last, err := s.LastEvent(ctx)
	must(t, err)
	if last != evs[4].Seq {
		t.Errorf("LastEvent = %d, want %d", last, evs[4].Seq)
	}
	// Resume from a token, in pages.
	page, err := s.Events(ctx, evs[1].Seq, 2)
	must(t, err)
	if len(page) != 2 || page[0].Seq != evs[2].Seq || page[1].Seq != evs[3].Seq {
		t.Errorf("resume after %d: %+v", evs[1].Seq, page)
	}
	if rest, _ := s.Events(ctx, last, 10); len(rest) != 0 {
		t.Errorf("events after the last: %+v", rest)
	}
}

func testPrune(t *testing.T, open func(t *testing.T) store.Store) {
	s := open(t)
	ctx := t.Context()
	horizon := t0
	put(t, s, t0,
		input("Patient/a", "Observation/old2", "1", t0, horizon.Add(-2*time.Hour), ""),
		input("Patient/a", "Observation/old1", "1", t0, horizon.Add(-time.Nanosecond), ""),
		input("Patient/a", "Observation/at", "1", t0, horizon, ""), // not before the horizon: kept
		input("Patient/b", "Observation/new", "1", t0, horizon.Add(time.Hour), ""),
		input("Patient/b", "Observation/moved", "1", t0, horizon.Add(-3*time.Hour), ""),
	)
	// A newer version moved past the horizon: the old EffectiveAt must
	// not prune it.
	put(t, s, t0, input("Patient/b", "Observation/moved", "2", t0.Add(time.Second), horizon.Add(2*time.Hour), ""))
	n, err := s.Prune(ctx, horizon)
	must(t, err)
	if n != 2 {
		t.Errorf("Prune = %d, want 2", n)
	}
	for _, tc := range []struct {
		subject, logical string
		kept             bool
	}{
		{"Patient/a", "Observation/old2", false},
		{"Patient/a", "Observation/old1", false},
		{"Patient/a", "Observation/at", true},
		{"Patient/b", "Observation/new", true},
		{"Patient/b", "Observation/moved", true},
	} {
		_, err := s.Input(ctx, tc.subject, tc.logical)
		if tc.kept && err != nil {
			t.Errorf("%s: %v, want kept", tc.logical, err)
		}
		if !tc.kept && !errors.Is(err, store.ErrNotFound) {
			t.Errorf("%s: err = %v, want pruned", tc.logical, err)
		}
	}
	if n, _ := s.Prune(ctx, horizon); n != 0 {
		t.Errorf("second Prune = %d, want 0", n)
	}
	if ins, _ := s.Inputs(ctx, "Patient/a"); len(ins) != 1 {
		t.Errorf("Patient/a has %d inputs after Prune, want 1", len(ins))
	}
}

// pruneKeptCases: a version that superseded others is remembered after
// its row is pruned, for as long as a late copy of what it superseded
// could still be within the retention: until the latest of the times of
// the rows it replaced and the time it arrived (the now of its put), so
// a correction that moved the sample time earlier, or the input to
// another patient, is not undone by a late copy of the first version
// once the correction's row is gone.
var pruneKeptCases = []struct {
	name     string
	versions []store.Input // put in order at t0 (the horizon below is after every one's row but the first's)
	late     store.Input   // a copy of the first version, after the prune
	horizon  time.Time
	want     store.PutResult
}{
	{name: "CorrectedToAnEarlierTime",
		versions: []store.Input{
			input("Patient/a", "Observation/g", "1", t0.Add(-time.Hour), t0.Add(-time.Hour), "v1"),
			input("Patient/a", "Observation/g", "2", t0, t0.Add(-24*time.Hour), "v2, sampled a day earlier"),
		},
		late:    input("Patient/a", "Observation/g", "1", t0.Add(-time.Hour), t0.Add(-time.Hour), "v1"),
		horizon: t0.Add(-2 * time.Hour), want: store.PutOlder},
	{name: "RefiledToAnotherPatientAtAnEarlierTime",
		versions: []store.Input{
			input("Patient/a", "Observation/g", "1", t0.Add(-time.Hour), t0.Add(-time.Hour), "v1"),
			withWithdrawal(input("Patient/b", "Observation/g", "2", t0, t0.Add(-24*time.Hour), "v2 under b")),
		},
		late:    input("Patient/a", "Observation/g", "1", t0.Add(-time.Hour), t0.Add(-time.Hour), "v1"),
		horizon: t0.Add(-2 * time.Hour), want: store.PutOlder},
	{name: "WithdrawnAndPruned",
		versions: []store.Input{
			input("Patient/a", "Observation/g", "1", t0.Add(-time.Hour), t0.Add(-30*time.Minute), "v1"),
			input("Patient/a", "Observation/g", "2", t0.Add(-40*time.Minute), t0.Add(-40*time.Minute), "withdrawal kept by its last-updated time"),
		},
		late:    input("Patient/a", "Observation/g", "1", t0.Add(-time.Hour), t0.Add(-30*time.Minute), "v1"),
		horizon: t0.Add(-35 * time.Minute), want: store.PutOlder},
	{name: "ForgottenOnceItsTimeIsPast",
		versions: []store.Input{
			input("Patient/a", "Observation/g", "1", t0.Add(-time.Hour), t0.Add(-time.Hour), "v1"),
			input("Patient/a", "Observation/g", "2", t0, t0.Add(-24*time.Hour), "v2"),
		},
		late:    input("Patient/a", "Observation/g", "1", t0.Add(-time.Hour), t0.Add(-time.Hour), "v1"),
		horizon: t0.Add(time.Nanosecond), want: store.PutNew},
	{name: "ANewerVersionAfterThePrune",
		versions: []store.Input{
			input("Patient/a", "Observation/g", "1", t0.Add(-time.Hour), t0.Add(-time.Hour), "v1"),
			input("Patient/a", "Observation/g", "2", t0, t0.Add(-24*time.Hour), "v2"),
		},
		late:    input("Patient/a", "Observation/g", "3", t0.Add(time.Minute), t0.Add(-time.Hour), "v3"),
		horizon: t0.Add(-2 * time.Hour), want: store.PutNew},
}

func testPruneKeepsNewestVersion(t *testing.T, open func(t *testing.T) store.Store) {
	for _, tc := range pruneKeptCases {
		t.Run(tc.name, func(t *testing.T) {
			s := open(t)
			ctx := t.Context()
			for _, in := range tc.versions {
				put(t, s, t0, in)
			}
			if _, err := s.Prune(ctx, tc.horizon); err != nil {
				t.Fatal(err)
			}
			if got := put(t, s, t0, tc.late); got[0] != tc.want {
				t.Fatalf("late version %s: %v, want %v", tc.late.VersionID, got[0], tc.want)
			}
			_, err := s.Input(ctx, tc.late.Subject, tc.late.Logical)
			if stored := err == nil; stored != (tc.want == store.PutNew) {
				t.Errorf("late version stored = %v (%v), want %v", stored, err, tc.want == store.PutNew)
			}
			// Nothing kept counts as an input pruned, and every row kept
			// goes once its time is past.
			if n, err := s.Prune(ctx, t0.Add(48*time.Hour)); err != nil || n != btoi(tc.want == store.PutNew) {
				t.Errorf("final Prune = %d, %v; want %d", n, err, btoi(tc.want == store.PutNew))
			}
			if got := put(t, s, t0.Add(49*time.Hour), tc.versions[0]); got[0] != store.PutNew {
				t.Errorf("the first version after everything was pruned: %v, want PutNew", got[0])
			}
		})
	}
}

func btoi(b bool) int {
	if b {
		return 1
	}
	return 0
}

// Every method checks its context before it starts.
func testCanceled(t *testing.T, open func(t *testing.T) store.Store) {
	s := open(t)
	ctx, cancel := context.WithCancel(t.Context())
	cancel()
	_, err := s.PutInputs(ctx, []store.Input{input("Patient/a", "Observation/1", "1", t0, t0, "")}, t0)
	if !errors.Is(err, context.Canceled) {
		t.Errorf("PutInputs on a canceled context: %v", err)
	}
	if !errors.Is(s.Commit(ctx, store.Change{Subject: "Patient/a", Entries: []store.Entry{entry("Patient/a", "s", "k", t0)}}, t0), context.Canceled) {
		t.Error("Commit on a canceled context did not fail with context.Canceled")
	}
	if _, err := s.Inputs(ctx, "Patient/a"); !errors.Is(err, context.Canceled) {
		t.Errorf("Inputs on a canceled context: %v", err)
	}
	_, err = s.Input(t.Context(), "Patient/a", "Observation/1")
	mustNotFound(t, "input put with a canceled context", err)
	_, err = s.Entry(t.Context(), "s")
	mustNotFound(t, "entry committed with a canceled context", err)
}

// Implementations are safe for concurrent use (store.Store); run with
// -race for this to mean much.
func testConcurrent(t *testing.T, open func(t *testing.T) store.Store) {
	s := open(t)
	const workers, rounds = 4, 25
	var wg sync.WaitGroup
	for w := range workers {
		wg.Go(func() {
			subj := fmt.Sprintf("Patient/%d", w)
			for i := range rounds {
				in := input(subj, fmt.Sprintf("Observation/%d-%03d", w, i), "1", t0, t0.Add(time.Duration(i)*time.Minute), "x")
				if _, err := s.PutInputs(t.Context(), []store.Input{in}, t0); err != nil {
					t.Error(err)
					return
				}
				if _, err := s.Inputs(t.Context(), subj); err != nil {
					t.Error(err)
					return
				}
				if _, err := s.DirtyPatients(t.Context()); err != nil {
					t.Error(err)
					return
				}
			}
		})
	}
	wg.Wait()
	for w := range workers {
		ins, err := s.Inputs(t.Context(), fmt.Sprintf("Patient/%d", w))
		must(t, err)
		if len(ins) != rounds {
			t.Errorf("worker %d: %d inputs, want %d", w, len(ins), rounds)
		}
	}
	st, err := s.Stats(t.Context())
	must(t, err)
	if st.DirtyPatients != workers {
		t.Errorf("Stats.DirtyPatients = %d, want %d", st.DirtyPatients, workers)
	}
}
