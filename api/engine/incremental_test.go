package engine_test

import (
	"cmp"
	"context"
	"encoding/json"
	"fmt"
	"math/rand/v2"
	"slices"
	"strings"
	"sync/atomic"
	"testing"
	"time"

	"github.com/deadspace-fhir/deadspace/api/engine"
	"github.com/deadspace-fhir/deadspace/api/engine/enginetest"
	"github.com/deadspace-fhir/deadspace/api/store"
	"github.com/deadspace-fhir/deadspace/api/store/boltstore"
	"github.com/deadspace-fhir/deadspace/derive"
	"github.com/deadspace-fhir/deadspace/fhir/decode"
)

// rangeCounting counts the evaluations (commits) and the reads of a range
// of inputs (copied or scanned in place), which only an evaluation that
// resumed the fall detector makes.
type rangeCounting struct {
	*boltstore.Store
	ranged, commits atomic.Int64
	// wholeLedgers counts the reads of a patient's whole ledger, parts the
	// reads of its entries from a time on, and entriesRead the entries
	// either returned or Entry found.
	wholeLedgers, parts, entriesRead atomic.Int64
}

func (r *rangeCounting) Ledger(ctx context.Context, subject string) ([]store.Entry, error) {
	r.wholeLedgers.Add(1)
	l, err := r.Store.Ledger(ctx, subject)
	r.entriesRead.Add(int64(len(l)))
	return l, err
}

func (r *rangeCounting) EntriesBetween(ctx context.Context, subject string, from, to time.Time, after string, limit int) ([]store.Entry, error) {
	r.parts.Add(1)
	l, err := r.Store.EntriesBetween(ctx, subject, from, to, after, limit)
	r.entriesRead.Add(int64(len(l)))
	return l, err
}

func (r *rangeCounting) Entry(ctx context.Context, series string) (store.Entry, error) {
	en, err := r.Store.Entry(ctx, series)
	if err == nil {
		r.entriesRead.Add(1)
	}
	return en, err
}

func (r *rangeCounting) InputsFrom(ctx context.Context, subject string, from time.Time) ([]store.Input, error) {
	r.ranged.Add(1)
	return r.Store.InputsFrom(ctx, subject, from)
}

func (r *rangeCounting) ScanInputsFrom(ctx context.Context, subject string, from time.Time, fn func(store.InputRow) error) error {
	if !from.IsZero() {
		r.ranged.Add(1)
	}
	return r.Store.ScanInputsFrom(ctx, subject, from, fn)
}

func (r *rangeCounting) Commit(ctx context.Context, c store.Change, now time.Time) error {
	r.commits.Add(1)
	return r.Store.Commit(ctx, c, now)
}

// TestIncrementalAgreesWithReplay: readings arrive roughly in time order,
// some late by minutes and a few by over an hour (a change before the
// saved detector state), and the engine evaluates after every few. Its
// values (falls and rises included, found by a detector resumed from its
// saved state) must be replay's, for several arrival orders.
func TestIncrementalAgreesWithReplay(t *testing.T) {
	t.Parallel()
	items, base, subjects := fallsAndRises()
	agreesWithReplay(t, items, base, subjects, 4, 3)
}

// fallsAndRises is two patients' six hours of end-tidal readings with a
// fall and a rise each (the second's last fall does not end), and four
// blood gases each that come back from the laboratory 20 minutes late.
func fallsAndRises() (items []arrival, base time.Time, subjects []string) {
	base = time.Date(2026, 1, 10, 0, 0, 0, 0, time.UTC)
	add := func(raw json.RawMessage, at time.Duration) { items = append(items, arrival{raw, at}) }
	for p := 1; p <= 2; p++ {
		subj := fmt.Sprintf("Patient/inc%d", p)
		subjects = append(subjects, subj)
		for m := range 6 * 60 {
			at := base.Add(time.Duration(m) * time.Minute)
			v := 37 + float64(m%4)/2
			switch {
			case m >= 100 && m < 130: // a fall
				v = 22 + float64(m%3)/2
			case m >= 200 && m < 215: // a rise
				v = 52 + float64(m%2)
			case p == 2 && m >= 300: // a fall that does not end
				v = 18
			}
			add(obsOf(subj, fmt.Sprintf("inc%d-et%d", p, m), "1", "final", "19891-1", "mm[Hg]", v, at, at.Add(time.Minute)), time.Duration(m)*time.Minute)
		}
		for g, m := range []int{60, 125, 240, 320} {
			at := base.Add(time.Duration(m) * time.Minute)
			// Blood gases come back from the laboratory 20 minutes later.
			add(obsOf(subj, fmt.Sprintf("inc%d-gas%d", p, g), "1", "final", "2019-8", "mm[Hg]", 40+float64(g), at, at.Add(20*time.Minute)), time.Duration(m+20)*time.Minute)
		}
	}
	return items, base, subjects
}

// TestIncrementalAgreesWithReplayDuringOpenEpisodes: the detector's saved
// state holds an open episode, its level and a candidate opened against
// that level; resumed from it, the live engine must find the further fall,
// the rise and the fall below the baseline that replay finds.
func TestIncrementalAgreesWithReplayDuringOpenEpisodes(t *testing.T) {
	t.Parallel()
	items, base, subjects := changesDuringOpenEpisodes()
	agreesWithReplay(t, items, base, subjects, 4, 3)
}

// changesDuringOpenEpisodes is one patient's six hours of end-tidal
// readings: 38, a fall to a level of 29 that never recovers, a fall to 2
// from it (a disconnection), back to 29, a rise to 45 that never recovers,
// a single reading of 20, then a fall to 20, below the baseline of the
// rise; and three blood gases 20 minutes late. The values are invented.
func changesDuringOpenEpisodes() (items []arrival, base time.Time, subjects []string) {
	base = time.Date(2026, 1, 11, 0, 0, 0, 0, time.UTC)
	add := func(raw json.RawMessage, at time.Duration) { items = append(items, arrival{raw, at}) }
	const subj = "Patient/open1"
	for m := range 6 * 60 {
		at := base.Add(time.Duration(m) * time.Minute)
		v := 37.5 + float64(m%3)/2
		switch {
		case m >= 60 && m < 210:
			v = 29 + float64(m%2)/2
		case m >= 210 && m < 225:
			v = 2
		case m >= 225 && m < 285:
			v = 29
		case m == 300:
			v = 20
		case m >= 285 && m < 330:
			v = 45 + float64(m%2)
		case m >= 330:
			v = 20
		}
		add(obsOf(subj, fmt.Sprintf("open1-et%d", m), "1", "final", "19891-1", "mm[Hg]", v, at, at.Add(time.Minute)), time.Duration(m)*time.Minute)
	}
	for g, m := range []int{90, 240, 310} {
		at := base.Add(time.Duration(m) * time.Minute)
		add(obsOf(subj, fmt.Sprintf("open1-gas%d", g), "1", "final", "2019-8", "mm[Hg]", 42+float64(g), at, at.Add(20*time.Minute)), time.Duration(m+20)*time.Minute)
	}
	return items, base, []string{subj}
}

// arrival is one resource and when it reaches the service.
type arrival struct {
	raw     json.RawMessage
	arrival time.Duration
}

// agreesWithReplay feeds items to the live engine in several arrival
// orders (each item delayed by up to ten minutes, one in sixty by an hour
// and a half more), evaluating after every few, and compares the values
// recorded for subjects with replay's. minFalls is how many falls and
// rises replay must find, so the detector is exercised.
func agreesWithReplay(t *testing.T, items []arrival, base time.Time, subjects []string, minFalls int, seeds uint64) {
	t.Helper()
	for seed := range seeds {
		t.Run(fmt.Sprint("order ", seed), func(t *testing.T) {
			t.Parallel()
			stream := arrivalOrder(items, seed)
			bs := enginetest.OpenStore(t, boltstore.Options{NoSync: true})
			st := &rangeCounting{Store: bs}
			enc := enginetest.Encoder(t)
			eng, err := engine.New(engine.Config{
				Store: st, Decoder: decode.New(decode.Options{}), Encoder: enc, Derive: derive.DefaultConfig(),
				Now: func() time.Time { return base.Add(8 * time.Hour) },
			})
			if err != nil {
				t.Fatal(err)
			}
			ctx := context.Background()
			for from := 0; from < len(stream); from += 9 {
				if _, err := eng.Ingest(ctx, "test", stream[from:min(from+9, len(stream))]); err != nil {
					t.Fatal(err)
				}
				if err := eng.EvaluateNow(ctx); err != nil {
					t.Fatal(err)
				}
			}
			parts, wholes := st.parts.Load(), st.wholeLedgers.Load()
			n := sameAsReplay(t, eng, stream, base, subjects, minFalls)
			// The test means something only if most evaluations resumed
			// and read only the part of the ledger they can change.
			if r, c := st.ranged.Load(), st.commits.Load(); 10*r < 8*c {
				t.Errorf("%d of %d evaluations read a range of inputs: the detector's state was hardly used", r, c)
			}
			if c := st.commits.Load(); 10*parts < 7*c {
				t.Errorf("%d of %d evaluations read part of the ledger", parts, c)
			}
			t.Logf("%d values agree; %d of %d evaluations read a range of inputs, %d part of the ledger, %d the whole", n, st.ranged.Load(), st.commits.Load(), parts, wholes)
		})
	}
}

// arrivalOrder is the resources of items in an order of their arrival:
// each delayed by up to ten minutes, one in sixty by an hour and a half
// more, drawn from seed.
func arrivalOrder(items []arrival, seed uint64) []json.RawMessage {
	rng := rand.New(rand.NewPCG(seed, 7))
	order := slices.Clone(items)
	for i := range order {
		order[i].arrival += time.Duration(rng.IntN(10)) * time.Minute
		if rng.IntN(60) == 0 {
			order[i].arrival += 90 * time.Minute // very late
		}
	}
	slices.SortStableFunc(order, func(a, b arrival) int { return cmp.Compare(a.arrival, b.arrival) })
	var stream []json.RawMessage
	for _, it := range order {
		stream = append(stream, it.raw)
	}
	return stream
}

// sameAsReplay compares the values eng recorded for subjects with what
// replay finds in stream (eng.Compute), and returns how many agree.
// minFalls is how many falls and rises replay must find, so the detector
// is exercised.
func sameAsReplay(t *testing.T, eng *engine.Engine, stream []json.RawMessage, base time.Time, subjects []string, minFalls int) int {
	t.Helper()
	ctx := context.Background()
	var live []json.RawMessage
	for _, subject := range subjects {
		recs, err := eng.Derivations(ctx, subject, time.Time{}, base.Add(24*time.Hour), "", 1000)
		if err != nil {
			t.Fatal(err)
		}
		for _, r := range recs {
			live = append(live, r.Payload.Observation)
		}
	}
	rep, err := eng.Compute(ctx, stream)
	if err != nil {
		t.Fatal(err)
	}
	var replayed []json.RawMessage
	falls := 0
	for _, r := range rep.Results {
		if r.Fall != nil {
			falls++
		}
		for _, o := range r.Bundle.Observations {
			raw, err := json.Marshal(o)
			if err != nil {
				t.Fatal(err)
			}
			replayed = append(replayed, raw)
		}
	}
	if falls < minFalls {
		t.Fatalf("replay found %d falls and rises; the stream should give at least %d", falls, minFalls)
	}
	got, want := valuesOfObservations(t, live), valuesOfObservations(t, replayed)
	for series, w := range want {
		if g, ok := got[series]; !ok || g != w {
			t.Errorf("series %s: live %+v (present %v), replay %+v", series, g, ok, w)
		}
	}
	for series, g := range got {
		if _, ok := want[series]; !ok {
			t.Errorf("the live engine has series %s (key %s), replay has not", series, g.key)
		}
	}
	return len(want)
}

// TestIncrementalAgreesWithReplayForEveryKind: how far back a new input
// reaches depends on its kind (a body temperature an hour, a ventilator
// reading one pairing window, a blood gas only itself), so the live
// engine's incremental evaluations are checked against replay with every
// kind of input, sources of different priority, temperatures charted late,
// a temperature-adjusted PaCO2 of the same sample, a height, amended
// readings and a reading whose correction changes its kind.
func TestIncrementalAgreesWithReplayForEveryKind(t *testing.T) {
	t.Parallel()
	items, base, subjects := everyKind()
	agreesWithReplay(t, items, base, subjects, 2, 4)
}

// everyKind is two patients' four hours of every kind of input, from
// sources of different priority, with late temperatures, blood gases (one
// also reported at the patient's temperature), ventilator readings sent
// after their blood gas, and corrections (one changes a reading's kind).
func everyKind() (items []arrival, base time.Time, subjects []string) {
	base = time.Date(2026, 2, 3, 0, 0, 0, 0, time.UTC)
	add := func(raw json.RawMessage, at time.Duration) { items = append(items, arrival{raw, at}) }
	const hours = 4
	for p := 1; p <= 2; p++ {
		subj := fmt.Sprintf("Patient/kind%d", p)
		subjects = append(subjects, subj)
		id := func(what string, m int) string { return fmt.Sprintf("kind%d-%s%d", p, what, m) }
		reading := func(what, code, unit string, v float64, m int, late time.Duration) {
			at := base.Add(time.Duration(m) * time.Minute)
			add(obsOf(subj, id(what, m), "1", "final", code, unit, v, at, at.Add(time.Minute+late)), time.Duration(m)*time.Minute+late)
		}
		reading("height", "8302-2", "cm", 160+float64(p*10), 0, 0)
		for m := range hours * 60 {
			et := 36 + float64(m%5)/2
			if m >= 90 && m < 120 { // a fall
				et = 23 + float64(m%3)/2
			}
			reading("et", "19891-1", "mm[Hg]", et, m, 0)
			if m%7 == 3 { // a lower-priority end-tidal source
				reading("etlow", "19889-5", "mm[Hg]", et+3, m, 0)
			}
			if m%2 == 0 {
				reading("vt", "75958-9", "mL", 450+float64(m%40), m, 0)
				reading("rr", "19840-8", "/min", 14+float64(m%6), m, 0)
				reading("mv", "76008-2", "L/min", 6.5+float64(m%9)/4, m, 0)
			}
			if m%3 == 1 { // lower-priority sources of the same kinds
				reading("vtset", "76222-9", "mL", 500, m, 0)
				reading("mvin", "76009-0", "L/min", 7.5, m, 0)
			}
			if m%5 == 0 {
				reading("vco2", "60825-7", "mL/min", 190+float64(m%30), m, 0)
			}
			if m%25 == 10 {
				// Temperatures charted up to 50 minutes after they were
				// taken, some far from 37 °C.
				reading("temp", "8310-5", "Cel", 35+float64((m/25)%5), m, time.Duration(10+m%41)*time.Minute)
			}
		}
		for g, m := range []int{30, 75, 100, 150, 200, 230} {
			at := base.Add(time.Duration(m) * time.Minute)
			add(obsOf(subj, id("gas", g), "1", "final", "2019-8", "mm[Hg]", 40+float64(g), at, at.Add(20*time.Minute)), time.Duration(m+20)*time.Minute)
			// A ventilator reading two minutes after the sample, sent
			// after the blood gas: it joins the gas's pairing window.
			late := at.Add(2*time.Minute + 30*time.Second)
			add(obsOf(subj, id("vtlate", g), "1", "final", "76007-4", "mL", 610, late, at.Add(40*time.Minute)), time.Duration(m+40)*time.Minute)
			if g == 2 { // the analyser also reports it at the patient's temperature
				add(obsOf(subj, id("gasadj", g), "1", "final", "32771-8", "mm[Hg]", 38+float64(g), at.Add(30*time.Second), at.Add(21*time.Minute)), time.Duration(m+21)*time.Minute)
			}
		}
		// Corrections an hour later: a temperature amended, and a reading
		// charted as a temperature corrected to an end-tidal value.
		amendedAt := base.Add(60 * time.Minute)
		add(obsOf(subj, id("temp", 60), "2", "amended", "8310-5", "Cel", 39.5, amendedAt, base.Add(3*time.Hour)), 3*time.Hour)
		// It is the temperature nearest the blood gas sampled eight
		// minutes before it, until the correction.
		wrongAt := base.Add(158 * time.Minute)
		add(obsOf(subj, id("recoded", 158), "1", "final", "8310-5", "Cel", 34, wrongAt, wrongAt.Add(time.Minute)), 159*time.Minute)
		add(obsOf(subj, id("recoded", 158), "2", "amended", "19891-1", "mm[Hg]", 30, wrongAt, base.Add(200*time.Minute)), 200*time.Minute)
	}
	return items, base, subjects
}

// TestFallWithdrawnByALateReadingAfterItsOnset: with sparse charting
// (every 15 minutes) a fall is confirmed by its second fallen reading, a
// quarter of an hour after its onset. A reading taken between the two and
// charted late, back at the baseline, ends the episode after one fallen
// reading, so there is no fall. That reading reaches back only one pairing
// window, to after the onset: the incremental evaluation reads the ledger
// from there on, and must still find the fall's entry (kept by series
// from the earlier evaluations) to withdraw it, as replay no longer finds
// it.
func TestFallWithdrawnByALateReadingAfterItsOnset(t *testing.T) {
	t.Parallel()
	base := time.Date(2026, 3, 4, 0, 0, 0, 0, time.UTC)
	const subject = "Patient/sparse1"
	var stream []json.RawMessage
	reading := func(m int, v float64, late time.Duration) json.RawMessage {
		at := base.Add(time.Duration(m) * time.Minute)
		return obsOf(subject, fmt.Sprintf("sparse1-et%d", m), "1", "final", "19891-1", "mm[Hg]", v, at, at.Add(time.Minute+late))
	}
	for m := 0; m <= 240; m += 15 {
		v := 36.0
		if m == 180 || m == 195 {
			v = 20 // a fall, confirmed by the reading at 195
		}
		stream = append(stream, reading(m, v, 0))
	}
	bs := enginetest.OpenStore(t, boltstore.Options{NoSync: true})
	st := &rangeCounting{Store: bs}
	eng, err := engine.New(engine.Config{
		Store: st, Decoder: decode.New(decode.Options{}), Encoder: enginetest.Encoder(t), Derive: derive.DefaultConfig(),
		Now: func() time.Time { return base.Add(5 * time.Hour) },
	})
	if err != nil {
		t.Fatal(err)
	}
	ctx := context.Background()
	for _, raw := range stream {
		if _, err := eng.Ingest(ctx, "test", []json.RawMessage{raw}); err != nil {
			t.Fatal(err)
		}
		if err := eng.EvaluateNow(ctx); err != nil {
			t.Fatal(err)
		}
	}
	sameAsReplay(t, eng, stream, base, []string{subject}, 1) // the fall is recorded

	late := reading(190, 36, time.Hour)
	stream = append(stream, late)
	parts, wholes := st.parts.Load(), st.wholeLedgers.Load()
	if _, err := eng.Ingest(ctx, "test", []json.RawMessage{late}); err != nil {
		t.Fatal(err)
	}
	if err := eng.EvaluateNow(ctx); err != nil {
		t.Fatal(err)
	}
	if st.parts.Load() == parts || st.wholeLedgers.Load() != wholes {
		t.Fatalf("the late reading's evaluation read %d parts of the ledger and %d whole ledgers, want a part only",
			st.parts.Load()-parts, st.wholeLedgers.Load()-wholes)
	}
	recs, err := eng.Derivations(ctx, subject, time.Time{}, base.Add(24*time.Hour), "", 100)
	if err != nil {
		t.Fatal(err)
	}
	standing := 0
	for _, r := range recs {
		if r.Status != "entered-in-error" {
			standing++
		}
	}
	if standing != 0 {
		t.Errorf("%d values still stand after the late reading ended the episode; replay finds none", standing)
	}
	sameAsReplay(t, eng, stream, base, []string{subject}, 0)
}

// TestLedgerReadDoesNotGrowWithHistory: a new end-tidal reading's
// evaluation (of a reading within a recent blood gas's pairing window, so
// that gas is derived again) reads the same ledger entries whether the patient's
// retained history holds two blood gases or twenty-four (an hour or
// twelve, one every half hour, each with its derived values).
func TestLedgerReadDoesNotGrowWithHistory(t *testing.T) {
	t.Parallel()
	read := map[int]int64{}
	for _, hours := range []int{1, 12} {
		base := time.Date(2026, 3, 5, 0, 0, 0, 0, time.UTC)
		subject := fmt.Sprintf("Patient/hist%d", hours)
		end := base.Add(time.Duration(hours) * time.Hour)
		eng, bs, st := countingEngine(t, end.Add(time.Hour))
		ctx := context.Background()
		var batch []json.RawMessage
		for m := 0; m < hours*60; m++ {
			at := base.Add(time.Duration(m) * time.Minute)
			batch = append(batch, obsOf(subject, fmt.Sprintf("h%d-et%d", hours, m), "1", "final", "19891-1", "mm[Hg]", 36, at, at.Add(time.Minute)))
			if m%30 == 15 {
				batch = append(batch, obsOf(subject, fmt.Sprintf("h%d-gas%d", hours, m), "1", "final", "2019-8", "mm[Hg]", 41, at, at.Add(time.Minute)))
			}
		}
		if _, err := eng.Ingest(ctx, "test", batch); err != nil {
			t.Fatal(err)
		}
		if err := eng.EvaluateNow(ctx); err != nil {
			t.Fatal(err)
		}
		ledger, err := bs.Ledger(ctx, subject)
		if err != nil || len(ledger) < 2*hours {
			t.Fatalf("%d h: %d ledger entries (%v), want the blood gases' values", hours, len(ledger), err)
		}
		before, wholes := st.entriesRead.Load(), st.wholeLedgers.Load()
		// Charted late, two and a half minutes after the second-last blood
		// gas: within its pairing window, so it is derived again (the last
		// one, 30 minutes later, is beyond the reading's reach).
		at := end.Add(-45*time.Minute + 150*time.Second)
		if _, err := eng.Ingest(ctx, "test", []json.RawMessage{obsOf(subject, fmt.Sprintf("h%d-new", hours), "1", "final", "19891-1", "mm[Hg]", 36, at, end.Add(time.Minute))}); err != nil {
			t.Fatal(err)
		}
		if err := eng.EvaluateNow(ctx); err != nil {
			t.Fatal(err)
		}
		if st.wholeLedgers.Load() != wholes {
			t.Errorf("%d h: the new reading's evaluation read the whole ledger (%d entries)", hours, len(ledger))
		}
		read[hours] = st.entriesRead.Load() - before
		t.Logf("%d h of history, %d ledger entries: the new reading's evaluation read %d", hours, len(ledger), read[hours])
	}
	if read[12] != read[1] {
		t.Errorf("entries read after a new end-tidal reading: %d with 12 h of history, %d with 1 h", read[12], read[1])
	}
}

// TestLateReadingDerivesOnlyTheGasesItReaches: a reading charted hours
// late changes the blood gases whose dependency span holds it, not every
// one sampled since (derive.Config.Reach and ReachLater bound the mark).
// An end-tidal reading six hours late, two and a half minutes after a
// blood gas, re-derives that one gas: its evaluation reads the ledger
// entries of one blood gas, as many as after a reading 45 minutes late,
// and the values are still replay's.
func TestLateReadingDerivesOnlyTheGasesItReaches(t *testing.T) {
	t.Parallel()
	base := time.Date(2026, 3, 6, 0, 0, 0, 0, time.UTC)
	end := base.Add(12 * time.Hour)
	subject := "Patient/late"
	eng, bs, st := countingEngine(t, end.Add(time.Hour))
	ctx := context.Background()
	var stream []json.RawMessage
	gases := 0
	for m := 0; m < 12*60; m++ {
		at := base.Add(time.Duration(m) * time.Minute)
		stream = append(stream, obsOf(subject, fmt.Sprintf("et%d", m), "1", "final", "19891-1", "mm[Hg]", 36, at, at.Add(time.Minute)))
		if m%30 == 15 {
			stream = append(stream, obsOf(subject, fmt.Sprintf("gas%d", m), "1", "final", "2019-8", "mm[Hg]", 41, at, at.Add(time.Minute)))
			gases++
		}
	}
	if _, err := eng.Ingest(ctx, "test", stream); err != nil {
		t.Fatal(err)
	}
	if err := eng.EvaluateNow(ctx); err != nil {
		t.Fatal(err)
	}
	ledger, err := bs.Ledger(ctx, subject)
	if err != nil || len(ledger) == 0 || len(ledger)%gases != 0 {
		t.Fatalf("%d ledger entries (%v) for %d blood gases, want the same values for each", len(ledger), err, gases)
	}
	perGas := int64(len(ledger) / gases)
	late := func(name string, at time.Time) int64 {
		t.Helper()
		before, wholes := st.entriesRead.Load(), st.wholeLedgers.Load()
		o := obsOf(subject, name, "1", "final", "19891-1", "mm[Hg]", 30, at, end.Add(time.Minute))
		stream = append(stream, o)
		if _, err := eng.Ingest(ctx, "test", []json.RawMessage{o}); err != nil {
			t.Fatal(err)
		}
		if err := eng.EvaluateNow(ctx); err != nil {
			t.Fatal(err)
		}
		if st.wholeLedgers.Load() != wholes {
			t.Fatalf("%s: the evaluation read the whole ledger", name)
		}
		return st.entriesRead.Load() - before
	}
	sixHours := late("six-hours-late", base.Add(6*time.Hour+15*time.Minute+150*time.Second))
	recent := late("recent", end.Add(-45*time.Minute+150*time.Second))
	t.Logf("%d values per blood gas; entries read after a reading six hours late %d, 45 minutes late %d", perGas, sixHours, recent)
	if sixHours != perGas || recent != perGas {
		t.Errorf("entries read after a reading six hours late %d, 45 minutes late %d; want one blood gas's %d", sixHours, recent, perGas)
	}
	sameAsReplay(t, eng, stream, base, []string{subject}, 0)
}

// countingEngine is an engine over an embedded store whose reads are
// counted, with the clock stopped at now.
func countingEngine(t *testing.T, now time.Time) (*engine.Engine, *boltstore.Store, *rangeCounting) {
	t.Helper()
	bs := enginetest.OpenStore(t, boltstore.Options{NoSync: true})
	st := &rangeCounting{Store: bs}
	eng, err := engine.New(engine.Config{
		Store: st, Decoder: decode.New(decode.Options{}), Encoder: enginetest.Encoder(t), Derive: derive.DefaultConfig(),
		Now: func() time.Time { return now },
	})
	if err != nil {
		t.Fatal(err)
	}
	return eng, bs, st
}

// TestHeightRecodedAndMovedWithdrawsWhatUsedIt: a body height that a
// correction turns into another kind of reading, at another time, no
// longer serves the blood gases sampled since it was measured. The store
// keeps a height by its time a year on (retention), so the span of the
// version replaced is read from that version itself (store.Input.Replaced):
// a height changes the whole patient. The live values, the ventilatory
// ratio among them, are replay's.
func TestHeightRecodedAndMovedWithdrawsWhatUsedIt(t *testing.T) {
	t.Parallel()
	base := time.Date(2026, 3, 7, 0, 0, 0, 0, time.UTC)
	const subject = "Patient/hr"
	eng, _, _ := countingEngine(t, base.Add(6*time.Hour))
	ctx := context.Background()
	stream := []json.RawMessage{
		json.RawMessage(`{"resourceType":"Patient","id":"hr","meta":{"versionId":"1","lastUpdated":"2026-01-01T00:00:00Z"},"gender":"male","birthDate":"1960-01-01"}`),
		obsOf(subject, "hr-h", "1", "final", "8302-2", "cm", 175, base.Add(-time.Hour), base.Add(-time.Hour)),
	}
	for m := range 4 * 60 {
		at := base.Add(time.Duration(m) * time.Minute)
		stream = append(stream,
			obsOf(subject, fmt.Sprintf("hr-et%d", m), "1", "final", "19891-1", "mm[Hg]", 36, at, at.Add(time.Minute)),
			obsOf(subject, fmt.Sprintf("hr-mv%d", m), "1", "final", "76008-2", "L/min", 8, at, at.Add(time.Minute)),
			obsOf(subject, fmt.Sprintf("hr-vt%d", m), "1", "final", "75958-9", "mL", 500, at, at.Add(time.Minute)),
			obsOf(subject, fmt.Sprintf("hr-rr%d", m), "1", "final", "19840-8", "/min", 16, at, at.Add(time.Minute)))
		if m%30 == 15 {
			stream = append(stream, obsOf(subject, fmt.Sprintf("hr-gas%d", m), "1", "final", "2019-8", "mm[Hg]", 44, at, at.Add(time.Minute)))
		}
	}
	if _, err := eng.Ingest(ctx, "test", stream); err != nil {
		t.Fatal(err)
	}
	if err := eng.EvaluateNow(ctx); err != nil {
		t.Fatal(err)
	}
	ratios := func() int {
		t.Helper()
		recs, err := eng.Derivations(ctx, subject, time.Time{}, base.Add(24*time.Hour), "", 1000)
		if err != nil {
			t.Fatal(err)
		}
		n := 0
		for _, r := range recs {
			if r.Status != "entered-in-error" && strings.Contains(string(r.Payload.Observation), string(derive.CodeVentilatoryRatio)) {
				n++
			}
		}
		return n
	}
	if n := ratios(); n != 8 {
		t.Fatalf("%d ventilatory ratios before the correction, want one per blood gas (8)", n)
	}
	moved := obsOf(subject, "hr-h", "2", "amended", "19891-1", "mm[Hg]", 36, base.Add(3*time.Hour+30*time.Second), base.Add(5*time.Hour))
	stream = append(stream, moved)
	if _, err := eng.Ingest(ctx, "test", []json.RawMessage{moved}); err != nil {
		t.Fatal(err)
	}
	if err := eng.EvaluateNow(ctx); err != nil {
		t.Fatal(err)
	}
	if n := ratios(); n != 0 {
		t.Errorf("%d ventilatory ratios stand after the only height became an end-tidal reading", n)
	}
	sameAsReplay(t, eng, stream, base, []string{subject}, 0)
}
