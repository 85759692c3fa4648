package storetest

import (
	"cmp"
	"errors"
	"fmt"
	"slices"
	"strings"
	"testing"
	"time"

	"github.com/deadspace-fhir/deadspace/api/store"
)

// A result is stored once per version, however many entries refer to it,
// and earlier versions stay readable.
func testResults(t *testing.T, open func(t *testing.T) store.Store) {
	s := open(t)
	ctx := t.Context()
	const subj = "Patient/r"
	r1 := store.Result{ID: "gas-a", Version: "v1", EffectiveAt: t0, Payload: []byte("derivation 1")}
	must(t, s.Commit(ctx, store.Change{Subject: subj, Results: []store.Result{r1, r1},
		Entries: []store.Entry{entry(subj, "s1", "k1", t0), entry(subj, "s2", "k2", t0)}}, t0))
	r2 := r1
	r2.Version, r2.Payload = "v2", []byte("derivation 2")
	must(t, s.Commit(ctx, store.Change{Subject: subj, Results: []store.Result{r2}}, t0))
	for _, want := range []store.Result{r1, r2} {
		got, err := s.Result(ctx, want.ID, want.Version)
		must(t, err)
		if string(got.Payload) != string(want.Payload) || got.Subject != subj || !got.EffectiveAt.Equal(t0) {
			t.Errorf("Result(%s) = %+v, want %+v under %s", want.Version, got, want, subj)
		}
	}
	// The same version again keeps the first payload.
	r1b := r1
	r1b.Payload = []byte("other bytes")
	must(t, s.Commit(ctx, store.Change{Subject: subj, Results: []store.Result{r1b}}, t0))
	if got, _ := s.Result(ctx, "gas-a", "v1"); string(got.Payload) != "derivation 1" {
		t.Errorf("a version was overwritten: %q", got.Payload)
	}
	_, err := s.Result(ctx, "gas-a", "v9")
	mustNotFound(t, "Result of an unknown version", err)
}

// An entry replaced under a new key is kept as it stood, for explaining
// the value it was.
func testEntryVersion(t *testing.T, open func(t *testing.T) store.Store) {
	s := open(t)
	ctx := t.Context()
	const subj = "Patient/v"
	e1 := entry(subj, "s", "k1", t0)
	must(t, s.Commit(ctx, store.Change{Subject: subj, Entries: []store.Entry{e1}}, t0))
	e2 := entry(subj, "s", "k2", t0)
	e2.Status = "amended"
	must(t, s.Commit(ctx, store.Change{Subject: subj, Entries: []store.Entry{e2}}, t0))
	e3 := e2
	e3.Status, e3.Payload = "entered-in-error", []byte("withdrawn")
	must(t, s.Commit(ctx, store.Change{Subject: subj, Entries: []store.Entry{e3}}, t0))

	old, err := s.EntryVersion(ctx, "k1")
	must(t, err)
	if old.Key != "k1" || old.Status != "final" || string(old.Payload) != "payload of k1" || old.Series != "s" {
		t.Errorf("EntryVersion(k1) = %+v, want the final entry under k1", old)
	}
	cur, err := s.EntryVersion(ctx, "k2")
	must(t, err)
	if cur.Key != "k2" || cur.Status != "entered-in-error" {
		t.Errorf("EntryVersion(k2) = %+v, want the current, withdrawn entry", cur)
	}
	_, err = s.EntryVersion(ctx, "k0")
	mustNotFound(t, "EntryVersion of an unknown key", err)
}

// PruneHistory removes what is older than each horizon, except an entry
// whose series still has a write in the outbox or in a dead letter that
// stays.
func testPruneHistory(t *testing.T, open func(t *testing.T) store.Store) {
	s := open(t)
	ctx := t.Context()
	const subj = "Patient/h"
	old, recent := t0, t0.Add(48*time.Hour)
	must(t, s.Commit(ctx, store.Change{Subject: subj,
		Results: []store.Result{{ID: "g-old", Version: "1", EffectiveAt: old, Payload: []byte("x")}, {ID: "g-new", Version: "1", EffectiveAt: recent, Payload: []byte("y")}},
		Entries: []store.Entry{entry(subj, "s-old", "k-old", old), entry(subj, "s-pending", "k-p", old), entry(subj, "s-new", "k-new", recent)},
		Writes:  []store.Write{writeFor("s-pending")}}, old))
	// A dead letter buried long ago and one buried lately, both of values
	// derived long ago: the entry of the one that stays stays with it.
	must(t, s.Commit(ctx, store.Change{Subject: subj, Entries: []store.Entry{entry(subj, "s-x", "k-x", old), entry(subj, "s-y", "k-y", old)},
		Writes: []store.Write{writeFor("s-x"), writeFor("s-y")}}, old))
	replaced := entry(subj, "s-old", "k-old2", old)
	must(t, s.Commit(ctx, store.Change{Subject: subj, Entries: []store.Entry{replaced}}, recent))
	ws, err := s.DueWrites(ctx, recent, 10)
	must(t, err)
	var buried int
	for _, w := range ws {
		switch w.Series[0] {
		case "s-x":
			must(t, s.Bury(ctx, w.ID, "refused", old))
			buried++
		case "s-y":
			must(t, s.Bury(ctx, w.ID, "refused", recent))
			buried++
		}
	}
	if buried != 2 {
		t.Fatalf("buried %d writes, want 2", buried)
	}
	lastBefore, err := s.LastEvent(ctx)
	must(t, err)

	horizon := t0.Add(24 * time.Hour)
	n, err := s.PruneHistory(ctx, horizon, horizon, horizon)
	must(t, err)
	if n.Entries != 2 || n.Results != 1 || n.DeadLetters != 1 || n.Events != 5 {
		t.Errorf("pruned %+v, want 2 entries, 1 result, 1 dead letter, 5 events (those recorded before the horizon)", n)
	}
	for _, k := range []string{"k-old", "k-old2"} {
		if _, err := s.EntryByKey(ctx, k); !errors.Is(err, store.ErrNotFound) {
			t.Errorf("EntryByKey(%s) after pruning: %v, want ErrNotFound", k, err)
		}
		if _, err := s.EntryVersion(ctx, k); !errors.Is(err, store.ErrNotFound) {
			t.Errorf("EntryVersion(%s) after pruning: %v, want ErrNotFound", k, err)
		}
	}
	if _, err := s.Entry(ctx, "s-x"); !errors.Is(err, store.ErrNotFound) {
		t.Errorf("the entry of a pruned dead letter's series: %v, want ErrNotFound", err)
	}
	for _, series := range []string{"s-pending", "s-new", "s-y"} {
		if _, err := s.Entry(ctx, series); err != nil {
			t.Errorf("entry %s was pruned: %v", series, err)
		}
	}
	if _, err := s.Result(ctx, "g-new", "1"); err != nil {
		t.Errorf("a recent result was pruned: %v", err)
	}
	dls, err := s.DeadLetters(ctx, 10)
	must(t, err)
	if len(dls) != 1 || dls[0].Series[0] != "s-y" {
		t.Errorf("dead letters after pruning: %+v, want the recent one", dls)
	}
	st, err := s.Stats(ctx)
	must(t, err)
	if st.DeadLetters != 1 {
		t.Errorf("Stats counts %d dead letters, want 1", st.DeadLetters)
	}
	evs, err := s.Events(ctx, 0, 100)
	must(t, err)
	for _, ev := range evs {
		if ev.At.Before(horizon) {
			t.Errorf("event %d recorded at %v survived", ev.Seq, ev.At)
		}
	}
	if last, _ := s.LastEvent(ctx); last != lastBefore {
		t.Errorf("LastEvent moved from %d to %d: resume tokens must never be reused", lastBefore, last)
	}
}

// A dirty mark says from when results can change, so an evaluation can
// leave older results alone, and puts patients with a new blood gas first.
func testDirtySpan(t *testing.T, open func(t *testing.T) store.Store) {
	s := open(t)
	ctx := t.Context()
	in := func(subject, logical, version string, changed, eff time.Time) store.Input {
		i := input(subject, logical, version, t0.Add(time.Duration(len(version))*time.Minute), eff, "x")
		i.ChangedAt, i.Replaced = changed, reaching(0, 0)
		return i
	}
	put(t, s, t0, in("Patient/a", "Observation/a1", "1", t0.Add(10*time.Minute), t0.Add(10*time.Minute)),
		in("Patient/a", "Observation/a2", "1", t0.Add(5*time.Minute), t0.Add(5*time.Minute)))
	d, _ := dirtyOf(t, s, "Patient/a")
	if !d.From.Equal(t0.Add(5 * time.Minute)) {
		t.Errorf("From = %v, want the earliest change, %v", d.From, t0.Add(5*time.Minute))
	}
	// A newer version that moves the reading later still changes results
	// from the time of the version it replaced.
	put(t, s, t0, in("Patient/b", "Observation/b1", "1", t0.Add(time.Hour), t0.Add(time.Hour)))
	must(t, s.Commit(ctx, store.Change{Subject: "Patient/b", Generation: mustDirty(t, s, "Patient/b").Generation}, t0))
	put(t, s, t0, in("Patient/b", "Observation/b1", "22", t0.Add(2*time.Hour), t0.Add(2*time.Hour)))
	if d := mustDirty(t, s, "Patient/b"); !d.From.Equal(t0.Add(time.Hour)) {
		t.Errorf("From = %v after a correction, want the replaced version's time %v", d.From, t0.Add(time.Hour))
	}
	// The replaced version may have reached further back than the new one
	// (another kind): Replaced says how far.
	must(t, s.Commit(ctx, store.Change{Subject: "Patient/b", Generation: mustDirty(t, s, "Patient/b").Generation}, t0))
	recoded := in("Patient/b", "Observation/b1", "333", t0.Add(170*time.Minute), t0.Add(3*time.Hour))
	recoded.Replaced = reaching(time.Hour, 0)
	put(t, s, t0, recoded)
	if d := mustDirty(t, s, "Patient/b"); !d.From.Equal(t0.Add(time.Hour)) {
		t.Errorf("From = %v after a correction with a reach of an hour, want an hour before the replaced version's time, %v", d.From, t0.Add(time.Hour))
	}
	// No ChangedAt means the whole patient, and so does MarkDirty.
	put(t, s, t0, in("Patient/a", "Observation/a3", "1", time.Time{}, t0))
	if d := mustDirty(t, s, "Patient/a"); !d.From.IsZero() {
		t.Errorf("From = %v, want zero (whole patient)", d.From)
	}
	must(t, s.MarkDirty(ctx, "Patient/b", t0))
	if d := mustDirty(t, s, "Patient/b"); !d.From.IsZero() {
		t.Errorf("From = %v after MarkDirty, want zero", d.From)
	}
	// A blood gas makes its patient urgent: listed first though newest.
	gas := in("Patient/z", "Observation/z1", "1", t0, t0)
	gas.Urgent = true
	put(t, s, t0.Add(time.Hour), gas)
	ds, err := s.DirtyPatients(ctx)
	must(t, err)
	if len(ds) == 0 || ds[0].Subject != "Patient/z" || !ds[0].Urgent {
		t.Errorf("DirtyPatients = %+v, want the urgent Patient/z first", ds)
	}
}

// A dirty mark may also say until when results can change (Until): the
// latest ChangedUntil of its changes, widened by what each version
// replaced changed (Input.Replaced); no end (zero) when a change has no
// start, or a replaced version changed the whole patient. A store may keep no
// ends at all (every Until zero, which covers everything); one that keeps
// them keeps them exactly, since a wider end only costs work.
func testDirtyEnd(t *testing.T, open func(t *testing.T) store.Store) {
	s := open(t)
	ctx := t.Context()
	reading := func(subject, logical, version string, at, until time.Time) store.Input {
		i := input(subject, logical, version, t0.Add(time.Duration(len(version))*time.Minute), at, "x")
		i.ChangedAt, i.ChangedUntil, i.Replaced = at.Add(-5*time.Minute), until, reaching(0, 0)
		return i
	}
	put(t, s, t0, reading("Patient/u", "Observation/u1", "1", t0.Add(10*time.Minute), t0.Add(30*time.Minute)),
		reading("Patient/u", "Observation/u2", "1", t0.Add(5*time.Minute), t0.Add(20*time.Minute)))
	keepsEnds := !mustDirty(t, s, "Patient/u").Until.IsZero()
	wantEnd := func(step, subject string, want time.Time) {
		t.Helper()
		d := mustDirty(t, s, subject)
		if !keepsEnds {
			want = time.Time{}
		}
		if !d.Until.Equal(want) {
			t.Errorf("%s: Until = %v, want %v (the store keeps ends: %v)", step, d.Until, want, keepsEnds)
		}
	}
	wantEnd("two readings", "Patient/u", t0.Add(30*time.Minute))
	// A later change in another call widens the mark.
	put(t, s, t0, reading("Patient/u", "Observation/u3", "1", t0.Add(40*time.Minute), t0.Add(55*time.Minute)))
	wantEnd("a later reading", "Patient/u", t0.Add(55*time.Minute))
	// A correction that moves a reading earlier still changes results until
	// as late as the replaced version did.
	clear := func(subject string) {
		t.Helper()
		must(t, s.Commit(ctx, store.Change{Subject: subject, Generation: mustDirty(t, s, subject).Generation}, t0))
	}
	clear("Patient/u")
	moved := reading("Patient/u", "Observation/u3", "22", t0.Add(15*time.Minute), t0.Add(25*time.Minute))
	moved.Replaced = reaching(0, time.Hour)
	put(t, s, t0, moved)
	wantEnd("a reading moved earlier", "Patient/u", t0.Add(40*time.Minute+time.Hour))
	// A replaced version that changed the whole patient leaves no end.
	clear("Patient/u")
	whole := reading("Patient/u", "Observation/u3", "333", t0.Add(15*time.Minute), t0.Add(25*time.Minute))
	whole.Replaced = nil
	put(t, s, t0, whole)
	if d := mustDirty(t, s, "Patient/u"); !d.Until.IsZero() || !d.From.IsZero() {
		t.Errorf("span %v – %v after replacing a version that changed the whole patient, want the whole patient", d.From, d.Until)
	}
	// After a clear, a new mark has its own end, not the cleared one's.
	clear("Patient/u")
	put(t, s, t0, reading("Patient/u", "Observation/u4", "1", t0.Add(time.Minute), t0.Add(2*time.Minute)))
	wantEnd("a new mark", "Patient/u", t0.Add(2*time.Minute))
	// A change with no start (the whole patient) has no end, and neither has
	// MarkDirty.
	put(t, s, t0, input("Patient/u", "Observation/u5", "1", t0, t0, "x"))
	if d := mustDirty(t, s, "Patient/u"); !d.Until.IsZero() || !d.From.IsZero() {
		t.Errorf("From %v, Until %v after a change to the whole patient, want neither", d.From, d.Until)
	}
	put(t, s, t0, reading("Patient/v", "Observation/v1", "1", t0, t0.Add(time.Minute)))
	must(t, s.MarkDirty(ctx, "Patient/v", t0))
	if d := mustDirty(t, s, "Patient/v"); !d.Until.IsZero() {
		t.Errorf("Until = %v after MarkDirty, want no end", d.Until)
	}
}

// A version replaced can say itself what results it changed
// (Input.Replaced): the store hands it the replaced version's effective
// time and payload, and widens the mark by the span it answers, by nothing
// when it answers none, or to the whole patient for a zero span.
func testReplacedSpan(t *testing.T, open func(t *testing.T) store.Store) {
	s := open(t)
	ctx := t.Context()
	var seen []string
	version := func(v string, eff time.Time, payload string, sp store.Span, ok bool) store.Input {
		i := input("Patient/r", "Observation/r1", v, t0.Add(time.Duration(len(v))*time.Minute), eff, payload)
		i.ChangedAt, i.ChangedUntil = eff.Add(-time.Minute), eff.Add(time.Minute)
		i.Replaced = func(at time.Time, old []byte) (store.Span, bool) {
			seen = append(seen, fmt.Sprintf("%s@%s", old, at.Sub(t0)))
			return sp, ok
		}
		return i
	}
	clear := func() {
		t.Helper()
		must(t, s.Commit(ctx, store.Change{Subject: "Patient/r", Generation: mustDirty(t, s, "Patient/r").Generation}, t0))
	}
	put(t, s, t0, version("1", t0.Add(time.Hour), "first", store.Span{}, false))
	clear()
	// The first version changed nothing: the mark is the new version's own.
	put(t, s, t0, version("22", t0.Add(2*time.Hour), "second", store.Span{}, false))
	if d := mustDirty(t, s, "Patient/r"); !d.From.Equal(t0.Add(2*time.Hour - time.Minute)) {
		t.Errorf("From = %v after replacing a version that changed nothing, want the new version's own %v", d.From, t0.Add(2*time.Hour-time.Minute))
	}
	clear()
	// The second says it changed from 10 minutes to 3 hours.
	put(t, s, t0, version("333", t0.Add(2*time.Hour), "third", store.Span{From: t0.Add(10 * time.Minute), Until: t0.Add(3 * time.Hour)}, true))
	d := mustDirty(t, s, "Patient/r")
	if !d.From.Equal(t0.Add(10 * time.Minute)) {
		t.Errorf("From = %v, want the replaced version's answer %v", d.From, t0.Add(10*time.Minute))
	}
	if !d.Until.IsZero() && !d.Until.Equal(t0.Add(3*time.Hour)) {
		t.Errorf("Until = %v, want the replaced version's answer %v (or no end)", d.Until, t0.Add(3*time.Hour))
	}
	clear()
	// The third changed the whole patient.
	put(t, s, t0, version("4444", t0.Add(2*time.Hour), "fourth", store.Span{}, true))
	if d := mustDirty(t, s, "Patient/r"); !d.From.IsZero() || !d.Until.IsZero() {
		t.Errorf("span %v – %v after replacing a version that changed the whole patient, want the whole patient", d.From, d.Until)
	}
	want := []string{"first@1h0m0s", "second@2h0m0s", "third@2h0m0s"}
	if fmt.Sprint(seen) != fmt.Sprint(want) {
		t.Errorf("Replaced was asked about %v, want %v (each replaced version once, with its effective time and payload)", seen, want)
	}
}

// reaching is an Input.Replaced saying that the replaced version changed
// the results of blood gases sampled from before ahead of its effective
// time until after it.
func reaching(before, after time.Duration) func(time.Time, []byte) (store.Span, bool) {
	return func(eff time.Time, _ []byte) (store.Span, bool) {
		return store.Span{From: eff.Add(-before), Until: eff.Add(after)}, true
	}
}

func mustDirty(t *testing.T, s store.Store, subject string) store.Dirty {
	t.Helper()
	d, ok := dirtyOf(t, s, subject)
	if !ok {
		t.Fatalf("%s is not dirty", subject)
	}
	return d
}

// An evaluation that changed nothing commits an empty change: the mark is
// cleared at once for DirtyPatients and Stats (the store may write the
// clear later, store.Store.Commit), and a change after it starts a new
// mark of its own: its Since, From and urgency, not the cleared one's.
func testEmptyCommit(t *testing.T, open func(t *testing.T) store.Store) {
	s := open(t)
	ctx := t.Context()
	gas := input("Patient/e", "Observation/e1", "1", t0, t0, "x")
	gas.ChangedAt, gas.Urgent = t0, true
	put(t, s, t0, gas)
	must(t, s.MarkDirty(ctx, "Patient/f", t0))
	d := mustDirty(t, s, "Patient/e")
	must(t, s.Commit(ctx, store.Change{Subject: "Patient/e", Generation: d.Generation, Expect: map[string]store.Expect{}}, t0.Add(time.Second)))
	if d, ok := dirtyOf(t, s, "Patient/e"); ok {
		t.Fatalf("still dirty after an empty commit of its generation: %+v", d)
	}
	wantStats(t, s, store.Stats{DirtyPatients: 1})

	later := input("Patient/e", "Observation/e2", "1", t0, t0.Add(time.Hour), "y")
	later.ChangedAt = t0.Add(time.Hour)
	put(t, s, t0.Add(time.Minute), later)
	again := mustDirty(t, s, "Patient/e")
	if !again.Since.Equal(t0.Add(time.Minute)) || !again.From.Equal(t0.Add(time.Hour)) || again.Urgent || again.Generation <= d.Generation {
		t.Errorf("after an empty commit and a new reading: %+v, want Since %v, From %v, not urgent, generation > %d",
			again, t0.Add(time.Minute), t0.Add(time.Hour), d.Generation)
	}
	wantStats(t, s, store.Stats{DirtyPatients: 2})

	// An empty commit of an older generation keeps the mark and restarts
	// its Since, as any commit does.
	must(t, s.Commit(ctx, store.Change{Subject: "Patient/e", Generation: d.Generation}, t0.Add(2*time.Minute)))
	if kept := mustDirty(t, s, "Patient/e"); kept.Generation != again.Generation || !kept.Since.Equal(t0.Add(2*time.Minute)) {
		t.Errorf("after an empty commit of an older generation: %+v, want generation %d and Since %v", kept, again.Generation, t0.Add(2*time.Minute))
	}
	// Other writes after an empty commit keep the patient clear.
	f := mustDirty(t, s, "Patient/f")
	must(t, s.Commit(ctx, store.Change{Subject: "Patient/f", Generation: f.Generation}, t0.Add(3*time.Minute)))
	must(t, s.SetCursor(ctx, "c", "v"))
	must(t, s.MarkDirty(ctx, "Patient/g", t0.Add(4*time.Minute)))
	if d, ok := dirtyOf(t, s, "Patient/f"); ok {
		t.Errorf("Patient/f dirty again after unrelated writes: %+v", d)
	}
	wantStats(t, s, store.Stats{DirtyPatients: 2})
}

// InputsFrom returns the patient's inputs effective at or after a time, in
// EffectiveAt order, with what Inputs gives for each; a newer version that
// moved an input's time moves it in or out of the range.
func testInputsFrom(t *testing.T, open func(t *testing.T) store.Store) {
	s := open(t)
	ctx := t.Context()
	put(t, s, t0,
		input("Patient/1", "Observation/d", "1", t0, t0.Add(-time.Hour), "an hour before"),
		input("Patient/1", "Observation/c", "1", t0, t0, "at"),
		input("Patient/1", "Observation/b", "1", t0, t0.Add(time.Hour), "an hour after"),
		input("Patient/1", "Observation/a", "1", t0, t0.Add(-time.Second), "a second before"),
		input("Patient/10", "Observation/x", "1", t0, t0.Add(time.Hour), "another patient"))
	list := func(from time.Time) []string {
		t.Helper()
		got, err := s.InputsFrom(ctx, "Patient/1", from)
		must(t, err)
		var out []string
		for _, in := range got {
			if in.Subject != "Patient/1" {
				t.Errorf("input of %s in Patient/1's list", in.Subject)
			}
			out = append(out, in.Logical+"="+string(in.Payload))
		}
		return out
	}
	for _, tc := range []struct {
		name string
		from time.Time
		want []string
	}{
		{"zero: every input", time.Time{}, []string{"Observation/d=an hour before", "Observation/a=a second before", "Observation/c=at", "Observation/b=an hour after"}},
		{"at an input's time: included", t0, []string{"Observation/c=at", "Observation/b=an hour after"}},
		{"after the last", t0.Add(2 * time.Hour), nil},
	} {
		if got := list(tc.from); !slices.Equal(got, tc.want) {
			t.Errorf("%s: InputsFrom = %v, want %v", tc.name, got, tc.want)
		}
	}
	put(t, s, t0, input("Patient/1", "Observation/d", "2", t0.Add(time.Minute), t0.Add(3*time.Hour), "moved later"))
	put(t, s, t0, input("Patient/1", "Observation/b", "2", t0.Add(time.Minute), t0.Add(-3*time.Hour), "moved earlier"))
	if got, want := list(t0), []string{"Observation/c=at", "Observation/d=moved later"}; !slices.Equal(got, want) {
		t.Errorf("after corrections: InputsFrom = %v, want %v", got, want)
	}
}

// InputsFrom returns exactly the inputs of Inputs whose EffectiveAt is at
// or after from, for every from at, just before and just after each
// stored time: equal times, nanosecond boundaries, times before 1970, an
// offset other than UTC, a body height stored a year ahead, versions that
// move an input's time forward, backward or not at all, an input re-filed
// to another patient (its first patient keeps the withdrawal at the new
// version's time), and what Prune leaves.
func testInputsFromExactly(t *testing.T, open func(t *testing.T) store.Store) {
	s := open(t)
	ctx := t.Context()
	y1960 := time.Date(1960, 6, 1, 12, 0, 0, 0, time.UTC)
	justBefore1970 := time.Unix(0, 0).UTC().Add(-500 * time.Millisecond)
	put(t, s, t0,
		input("Patient/1", "Observation/same-b", "1", t0, t0, "same time b"),
		input("Patient/1", "Observation/same-a", "1", t0, t0, "same time a"),
		input("Patient/1", "Observation/ns", "1", t0, t0.Add(time.Nanosecond), "a nanosecond after"),
		input("Patient/1", "Observation/1960", "1", t0, y1960, "1960"),
		input("Patient/1", "Observation/1969", "1", t0, justBefore1970, "half a second before 1970"),
		// Not the epoch itself: PostgreSQL stores a zero time as 0 ns, so an
		// input at exactly 1970-01-01T00:00:00Z reads back as the zero time.
		input("Patient/1", "Observation/epoch", "1", t0, time.Unix(1, 0).UTC(), "a second after the epoch"),
		input("Patient/1", "Observation/offset", "1", t0, t0.Add(-30*time.Minute).In(time.FixedZone("", 5*3600)), "UTC+5"),
		input("Patient/1", "Observation/height", "1", t0, t0.AddDate(1, 0, 0), "a height, a year ahead"),
		input("Patient/1", "Observation/later", "1", t0, t0.Add(time.Hour), "an hour after, moves earlier"),
		input("Patient/1", "Observation/earlier", "1", t0, t0.Add(-2*time.Hour), "two hours before, moves later"),
		input("Patient/1", "Observation/kept", "1", t0, t0.Add(-time.Hour), "an hour before, keeps its time"),
		input("Patient/1", "Observation/refiled", "1", t0, t0.Add(10*time.Minute), "re-filed to Patient/2"),
		input("Patient/10", "Observation/other", "1", t0, t0, "another patient whose reference starts the same"),
		input("Patient/0", "Observation/other0", "1", t0, t0.Add(time.Hour), "a patient sorting before"),
	)
	t1 := t0.Add(time.Minute)
	refiled := input("Patient/2", "Observation/refiled", "2", t1, t0.Add(20*time.Minute), "on Patient/2")
	refiled.Withdrawal = []byte("withdrawn from Patient/1")
	put(t, s, t1,
		input("Patient/1", "Observation/later", "2", t1, t0.Add(-3*time.Hour), "moved three hours before"),
		input("Patient/1", "Observation/earlier", "2", t1, t0.Add(2*time.Hour), "moved two hours after"),
		input("Patient/1", "Observation/kept", "2", t1, t0.Add(-time.Hour), "corrected in place"),
		refiled,
	)
	check := func(stage, subject string) {
		t.Helper()
		all, err := s.Inputs(ctx, subject)
		must(t, err)
		if len(all) == 0 {
			t.Fatalf("%s: %s has no inputs", stage, subject)
		}
		if !slices.IsSortedFunc(all, func(a, b store.Input) int {
			return cmp.Or(a.EffectiveAt.Compare(b.EffectiveAt), strings.Compare(a.Logical, b.Logical))
		}) {
			t.Errorf("%s: %s Inputs not in EffectiveAt, then Logical order: %v", stage, subject, all)
		}
		froms := []time.Time{{}}
		for _, in := range all {
			for _, d := range []time.Duration{-time.Nanosecond, 0, time.Nanosecond} {
				froms = append(froms, in.EffectiveAt.Add(d))
			}
		}
		for _, from := range froms {
			var want []string
			for _, in := range all {
				if !in.EffectiveAt.Before(from) {
					want = append(want, describe(in))
				}
			}
			got, err := s.InputsFrom(ctx, subject, from)
			must(t, err)
			var have []string
			for _, in := range got {
				if in.Subject != subject {
					t.Errorf("%s: an input of %s in %s's list", stage, in.Subject, subject)
				}
				have = append(have, describe(in))
			}
			if !slices.Equal(have, want) {
				t.Errorf("%s: %s InputsFrom(%v) =\n%v\nwant (Inputs with EffectiveAt ≥ from, in the same order)\n%v", stage, subject, from, have, want)
			}
		}
	}
	wantOne := func(stage, subject, logical, payload string, at time.Time) {
		t.Helper()
		in, err := s.Input(ctx, subject, logical)
		must(t, err)
		if string(in.Payload) != payload || !in.EffectiveAt.Equal(at) {
			t.Errorf("%s: %s %s = %q at %v, want %q at %v", stage, subject, logical, in.Payload, in.EffectiveAt, payload, at)
		}
	}
	for _, subject := range []string{"Patient/1", "Patient/2", "Patient/10", "Patient/0"} {
		check("after corrections", subject)
	}
	wantOne("after corrections", "Patient/1", "Observation/refiled", "withdrawn from Patient/1", t0.Add(20*time.Minute))
	wantOne("after corrections", "Patient/2", "Observation/refiled", "on Patient/2", t0.Add(20*time.Minute))
	wantOne("after corrections", "Patient/1", "Observation/later", "moved three hours before", t0.Add(-3*time.Hour))
	from := t0.Add(-time.Hour)
	got, err := s.InputsFrom(ctx, "Patient/1", from)
	must(t, err)
	var logical []string
	for _, in := range got {
		logical = append(logical, in.Logical)
	}
	if want := []string{"Observation/kept", "Observation/offset", "Observation/same-a", "Observation/same-b", "Observation/ns", "Observation/refiled", "Observation/earlier", "Observation/height"}; !slices.Equal(logical, want) {
		t.Errorf("InputsFrom(an hour before) = %v, want %v", logical, want)
	}

	n, err := s.Prune(ctx, t0.Add(-time.Hour))
	must(t, err)
	if n != 4 { // 1960, 1969, 1970, and the version moved three hours before
		t.Errorf("Prune = %d, want 4", n)
	}
	check("after Prune", "Patient/1")
	if _, err := s.Input(ctx, "Patient/1", "Observation/later"); !errors.Is(err, store.ErrNotFound) {
		t.Errorf("a pruned input: %v, want ErrNotFound", err)
	}
}

// describe is an input as the range tests compare it.
func describe(in store.Input) string {
	return fmt.Sprintf("%s v%s %s %q", in.Logical, in.VersionID, in.EffectiveAt.UTC().Format(time.RFC3339Nano), in.Payload)
}

// A change that retracts or alters a blood gas is urgent whatever the
// new version is: a withdrawal (inert, not urgent itself) of a version
// that Replaced calls urgent marks its patient urgent, and so does a
// newer version that moves such an input to another patient, for the
// patient it leaves. A patient's new facts are urgent; a newer version
// with the same facts is not. A device reading's correction is not.
func testUrgentChanges(t *testing.T, open func(t *testing.T) store.Store) {
	s := open(t)
	ctx := t.Context()
	urgentIfGas := func(_ time.Time, payload []byte) (store.Span, bool) {
		return store.Span{Urgent: string(payload) == "gas"}, true
	}
	clear := func(subject string) {
		t.Helper()
		must(t, s.Commit(ctx, store.Change{Subject: subject, Generation: mustDirty(t, s, subject).Generation}, t0))
	}
	urgent := func(what, subject string, want bool) {
		t.Helper()
		if d := mustDirty(t, s, subject); d.Urgent != want {
			t.Errorf("%s: Urgent = %v, want %v", what, d.Urgent, want)
		}
	}
	gas := input("Patient/a", "Observation/g", "1", t0, t0, "gas")
	gas.Urgent = true
	etco2 := input("Patient/a", "Observation/e", "1", t0, t0, "etco2")
	put(t, s, t0, gas, etco2)
	clear("Patient/a")

	withdrawn := input("Patient/a", "Observation/g", "2", t0.Add(time.Minute), t0, "withdrawn")
	withdrawn.Inert, withdrawn.Replaced = true, urgentIfGas
	put(t, s, t0, withdrawn)
	urgent("a withdrawal of a blood gas", "Patient/a", true)
	clear("Patient/a")

	corrected := input("Patient/a", "Observation/e", "2", t0.Add(time.Minute), t0, "etco2")
	corrected.Replaced = urgentIfGas
	put(t, s, t0, corrected)
	urgent("a device reading's correction", "Patient/a", false)
	clear("Patient/a")

	gas2 := input("Patient/a", "Observation/g2", "1", t0, t0, "gas")
	gas2.Urgent = true
	put(t, s, t0, gas2)
	clear("Patient/a")
	moved := input("Patient/b", "Observation/g2", "2", t0.Add(time.Minute), t0, "reading")
	moved.Replaced, moved.Withdrawal = urgentIfGas, []byte("withdrawn")
	if res := put(t, s, t0, moved); res[0] != store.PutMoved {
		t.Fatalf("re-filed blood gas: %v, want PutMoved", res[0])
	}
	urgent("the patient a blood gas was moved away from", "Patient/a", true)
	clear("Patient/a")
	clear("Patient/b")

	p := store.Patient{Subject: "Patient/c", VersionID: "1", LastUpdated: t0, Payload: []byte("male 1960")}
	_, err := s.PutPatient(ctx, p, t0)
	must(t, err)
	urgent("a patient's first facts", "Patient/c", true)
	clear("Patient/c")
	p.VersionID, p.LastUpdated = "2", t0.Add(time.Minute)
	_, err = s.PutPatient(ctx, p, t0)
	must(t, err)
	urgent("a patient's newer version with the same facts", "Patient/c", false)
	clear("Patient/c")
	p.VersionID, p.LastUpdated, p.Payload = "3", t0.Add(2*time.Minute), []byte("female 1960")
	_, err = s.PutPatient(ctx, p, t0)
	must(t, err)
	urgent("a patient's changed facts", "Patient/c", true)
}
