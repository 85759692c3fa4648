package engine_test

import (
	"context"
	"encoding/json"
	"fmt"
	"math/rand/v2"
	"slices"
	"strings"
	"testing"
	"time"

	"github.com/deadspace-fhir/deadspace/api/engine"
	"github.com/deadspace-fhir/deadspace/api/engine/enginetest"
	"github.com/deadspace-fhir/deadspace/api/store/boltstore"
	"github.com/deadspace-fhir/deadspace/derive"
	"github.com/deadspace-fhir/deadspace/fhir/decode"
)

// The live engine and replay must give the same values, with the same
// identifiers, for the same inputs in any order: whatever order the
// versions of a resource arrive in, a value never stays live (or comes
// back) from a version that was superseded, withdrawn or re-coded.

// orderNight is the night the streams below cover.
var orderNight = time.Date(2026, 3, 1, 0, 0, 0, 0, time.UTC)

func orderAt(m int) time.Time { return orderNight.Add(time.Duration(m) * time.Minute) }

// orderObs is an Observation written out in full; meta is left out when
// both version and updated are empty, and each of them when it is.
func orderObs(subject, id, version string, updated time.Time, status, code, unit string, v float64, at time.Time) json.RawMessage {
	var meta []string
	if version != "" {
		meta = append(meta, fmt.Sprintf(`"versionId":"%s"`, version))
	}
	if !updated.IsZero() {
		meta = append(meta, fmt.Sprintf(`"lastUpdated":"%s"`, updated.UTC().Format(time.RFC3339Nano)))
	}
	m := ""
	if len(meta) > 0 {
		m = `"meta":{` + strings.Join(meta, ",") + `},`
	}
	return json.RawMessage(fmt.Sprintf(`{"resourceType":"Observation","id":"%s",%s"status":"%s",`+
		`"code":{"coding":[{"system":"http://loinc.org","code":"%s"}]},"subject":{"reference":"%s"},"effectiveDateTime":"%s",`+
		`"valueQuantity":{"value":%g,"unit":"%s","system":"http://unitsofmeasure.org","code":"%s"}}`,
		id, m, status, code, subject, at.UTC().Format(time.RFC3339), v, unit, unit))
}

// orderBed is the device readings of one patient for three hours (every
// minute: end-tidal CO2, tidal volume, rate, minute volume; VCO2 every
// five), with a Patient resource and a height.
func orderBed(subj, tag string) []json.RawMessage {
	var out []json.RawMessage
	id := subj[len("Patient/"):]
	out = append(out, json.RawMessage(fmt.Sprintf(`{"resourceType":"Patient","id":"%s","meta":{"versionId":"1","lastUpdated":"%s"},"gender":"male","birthDate":"1960-05-01"}`,
		id, orderNight.Format(time.RFC3339))))
	out = append(out, orderObs(subj, tag+"-height", "1", orderAt(0).Add(time.Minute), "final", "8302-2", "cm", 180, orderAt(0)))
	for m := range 180 {
		at := orderAt(m)
		up := at.Add(time.Minute)
		out = append(out,
			orderObs(subj, fmt.Sprintf("%s-et%d", tag, m), "1", up, "final", "19891-1", "mm[Hg]", 34+float64(m%4)/2, at),
			orderObs(subj, fmt.Sprintf("%s-vt%d", tag, m), "1", up, "final", "75958-9", "mL", 480+float64(m%10), at),
			orderObs(subj, fmt.Sprintf("%s-rr%d", tag, m), "1", up, "final", "19840-8", "/min", 16, at),
			orderObs(subj, fmt.Sprintf("%s-mv%d", tag, m), "1", up, "final", "76008-2", "L/min", 7.7, at),
		)
		if m%5 == 0 {
			out = append(out, orderObs(subj, fmt.Sprintf("%s-vco2%d", tag, m), "1", up, "final", "60825-7", "mL/min", 210, at))
		}
	}
	return out
}

func orderBeds(subjects ...string) []json.RawMessage {
	var out []json.RawMessage
	for _, s := range subjects {
		out = append(out, orderBed(s, strings.TrimPrefix(s, "Patient/"))...)
	}
	return out
}

func orderEngine(t *testing.T, hooks engine.Hooks) *engine.Engine {
	t.Helper()
	st := enginetest.OpenStore(t, boltstore.Options{NoSync: true})
	eng, err := engine.New(engine.Config{
		Store: st, Decoder: decode.New(decode.Options{}), Encoder: enginetest.Encoder(t), Derive: derive.DefaultConfig(),
		Now: func() time.Time { return orderNight.Add(6 * time.Hour) }, Hooks: hooks,
	})
	if err != nil {
		t.Fatal(err)
	}
	return eng
}

// feedInChunks ingests stream in chunks of n, evaluating after each.
func feedInChunks(t *testing.T, eng *engine.Engine, stream []json.RawMessage, n int) {
	t.Helper()
	ctx := context.Background()
	for from := 0; from < len(stream); from += n {
		if _, err := eng.Ingest(ctx, "test", stream[from:min(from+n, len(stream))]); err != nil {
			t.Fatal(err)
		}
		if err := eng.EvaluateNow(ctx); err != nil {
			t.Fatal(err)
		}
	}
}

// orderCase is a stream of background data, fed first and evaluated,
// then versions of some resources, each fed and evaluated on its own, in
// every order (every permutation of up to four versions, else seeds
// shuffles).
type orderCase struct {
	name       string
	background []json.RawMessage
	versions   []json.RawMessage
	subjects   []string
	seeds      int
}

func (tc orderCase) run(t *testing.T) {
	t.Helper()
	orders := permutationsOrShuffles(len(tc.versions), tc.seeds)
	for i, ord := range orders {
		t.Run(fmt.Sprint("order ", ord), func(t *testing.T) {
			eng := orderEngine(t, engine.Hooks{})
			stream := slices.Clone(tc.background)
			feedInChunks(t, eng, tc.background, 200)
			for _, k := range ord {
				stream = append(stream, tc.versions[k])
				feedInChunks(t, eng, []json.RawMessage{tc.versions[k]}, 1)
			}
			n := sameAsReplay(t, eng, stream, orderNight, tc.subjects, 0)
			if i == 0 {
				t.Logf("%d values compared", n)
			}
		})
	}
}

func permutationsOrShuffles(n, seeds int) [][]int {
	var out [][]int
	if n <= 4 {
		var rec func(p []int, used []bool)
		rec = func(p []int, used []bool) {
			if len(p) == n {
				out = append(out, slices.Clone(p))
				return
			}
			for i := range n {
				if !used[i] {
					used[i] = true
					rec(append(p, i), used)
					used[i] = false
				}
			}
		}
		rec(nil, make([]bool, n))
		return out
	}
	for s := range seeds {
		rng := rand.New(rand.NewPCG(uint64(s), 3))
		p := make([]int, n)
		for i := range p {
			p[i] = i
		}
		rng.Shuffle(n, func(i, j int) { p[i], p[j] = p[j], p[i] })
		out = append(out, p)
	}
	return out
}

// TestVersionsInAnyOrderAgreeWithReplay: the versions of each case, fed
// in every order, leave the live engine with the values replay finds in
// the same stream, identifiers included.
func TestVersionsInAnyOrderAgreeWithReplay(t *testing.T) {
	one := orderBeds("Patient/o1")
	two := orderBeds("Patient/o1", "Patient/o2")
	both := []string{"Patient/o1", "Patient/o2"}
	up := orderAt(60).Add(20 * time.Minute)
	gas := func(subject, id, version string, updated time.Time, status, code string, v float64, at time.Time) json.RawMessage {
		return orderObs(subject, id, version, updated, status, code, "mm[Hg]", v, at)
	}
	gasAt := orderAt(200) // after the minute readings: only the window-edge readings pair with it
	w := derive.DefaultConfig().Window
	cases := []orderCase{
		// A newer version that cannot be used, arriving before the final
		// version it supersedes, is stored and refuses it.
		{name: "cancelled version before the final one", background: one, subjects: []string{"Patient/o1"}, versions: []json.RawMessage{
			gas("Patient/o1", "g", "1", up, "final", "2019-8", 45, orderAt(60)),
			gas("Patient/o1", "g", "2", up.Add(20*time.Minute), "cancelled", "2019-8", 45, orderAt(60))}},
		{name: "preliminary version before the final one", background: one, subjects: []string{"Patient/o1"}, versions: []json.RawMessage{
			gas("Patient/o1", "g", "1", up, "final", "2019-8", 45, orderAt(60)),
			gas("Patient/o1", "g", "2", up.Add(20*time.Minute), "preliminary", "2019-8", 45, orderAt(60))}},
		{name: "registered version before the final one", background: one, subjects: []string{"Patient/o1"}, versions: []json.RawMessage{
			gas("Patient/o1", "g", "1", up, "final", "2019-8", 45, orderAt(60)),
			gas("Patient/o1", "g", "2", up.Add(20*time.Minute), "registered", "2019-8", 45, orderAt(60))}},
		{name: "venous correction before the arterial gas", background: one, subjects: []string{"Patient/o1"}, versions: []json.RawMessage{
			gas("Patient/o1", "g", "1", up, "final", "2019-8", 45, orderAt(60)),
			gas("Patient/o1", "g", "2", up.Add(20*time.Minute), "amended", "2021-4", 45, orderAt(60))}},
		// Versions tied on meta (none, or the same) are ordered by one
		// rule: an unusable version wins, then the content.
		{name: "no meta: final and withdrawn", background: one, subjects: []string{"Patient/o1"}, versions: []json.RawMessage{
			gas("Patient/o1", "g", "", time.Time{}, "final", "2019-8", 45, orderAt(60)),
			gas("Patient/o1", "g", "", time.Time{}, "entered-in-error", "2019-8", 45, orderAt(60))}},
		{name: "no meta: final and amended", background: one, subjects: []string{"Patient/o1"}, versions: []json.RawMessage{
			gas("Patient/o1", "g", "", time.Time{}, "final", "2019-8", 45, orderAt(60)),
			gas("Patient/o1", "g", "", time.Time{}, "amended", "2019-8", 50, orderAt(60))}},
		{name: "no meta: one gas under two patients", background: two, subjects: both, versions: []json.RawMessage{
			gas("Patient/o1", "gx", "", time.Time{}, "final", "2019-8", 45, orderAt(60)),
			gas("Patient/o2", "gx", "", time.Time{}, "final", "2019-8", 45, orderAt(60))}},
		{name: "lastUpdated only", background: one, subjects: []string{"Patient/o1"}, versions: []json.RawMessage{
			gas("Patient/o1", "g", "", up, "final", "2019-8", 45, orderAt(60)),
			gas("Patient/o1", "g", "", up.Add(time.Minute), "amended", "2019-8", 50, orderAt(60)),
			gas("Patient/o1", "g", "", up.Add(2*time.Minute), "entered-in-error", "2019-8", 50, orderAt(60))}},
		{name: "equal lastUpdated, told apart by version id", background: one, subjects: []string{"Patient/o1"}, versions: []json.RawMessage{
			gas("Patient/o1", "g", "9", up, "final", "2019-8", 45, orderAt(60)),
			gas("Patient/o1", "g", "10", up, "amended", "2019-8", 50, orderAt(60)),
			gas("Patient/o1", "g2", "a", up, "final", "2019-8", 45, orderAt(120)),
			gas("Patient/o1", "g2", "b", up, "entered-in-error", "2019-8", 45, orderAt(120))}},
		// A re-coded blood gas (to glucose) withdraws what its earlier
		// version gave once that version is held (replay: read before).
		{name: "blood gas re-coded as glucose", background: one, subjects: []string{"Patient/o1"}, versions: []json.RawMessage{
			gas("Patient/o1", "z", "1", up, "final", "2019-8", 45, orderAt(60)),
			orderObs("Patient/o1", "z", "2", up.Add(time.Minute), "amended", "2345-7", "mg/dL", 100, orderAt(60))}},
		{name: "end-tidal to blood gas and back", background: one, subjects: []string{"Patient/o1"}, versions: []json.RawMessage{
			gas("Patient/o1", "x", "1", up, "final", "19891-1", 35, orderAt(60)),
			gas("Patient/o1", "x", "2", up.Add(time.Minute), "amended", "2019-8", 45, orderAt(60)),
			gas("Patient/o1", "y", "1", up, "final", "2019-8", 46, orderAt(90)),
			gas("Patient/o1", "y", "2", up.Add(time.Minute), "amended", "19891-1", 36, orderAt(90))}},
		{name: "re-filed and back", background: two, subjects: both, versions: []json.RawMessage{
			gas("Patient/o1", "gx", "1", up, "final", "2019-8", 45, orderAt(60)),
			gas("Patient/o2", "gx", "2", up.Add(time.Hour), "amended", "2019-8", 45, orderAt(60)),
			gas("Patient/o1", "gx", "3", up.Add(2*time.Hour), "corrected", "2019-8", 48, orderAt(62))}},
		{name: "re-filed then withdrawn, then a late copy", background: two, subjects: both, versions: []json.RawMessage{
			gas("Patient/o1", "gx", "1", up, "final", "2019-8", 45, orderAt(60)),
			gas("Patient/o2", "gx", "2", up.Add(time.Hour), "amended", "2019-8", 45, orderAt(60)),
			gas("Patient/o2", "gx", "3", up.Add(2*time.Hour), "entered-in-error", "2019-8", 45, orderAt(60)),
			gas("Patient/o1", "gx", "4", up.Add(3*time.Hour), "amended", "2019-8", 47, orderAt(60))}},
		{name: "readings moved into and out of a blood gas's window", background: one, subjects: []string{"Patient/o1"}, seeds: 40, versions: []json.RawMessage{
			gas("Patient/o1", "g", "1", gasAt.Add(30*time.Minute), "final", "2019-8", 45, gasAt),
			gas("Patient/o1", "et", "1", gasAt.Add(30*time.Minute), "final", "19891-1", 30, gasAt.Add(w-time.Second)),
			gas("Patient/o1", "et", "2", gasAt.Add(31*time.Minute), "amended", "19891-1", 31, gasAt.Add(w+time.Second)),
			orderObs("Patient/o1", "vt", "1", gasAt.Add(30*time.Minute), "final", "75958-9", "mL", 500, gasAt.Add(-w-time.Second)),
			orderObs("Patient/o1", "vt", "2", gasAt.Add(31*time.Minute), "amended", "75958-9", "L", 0.52, gasAt.Add(-w+time.Second)),
			orderObs("Patient/o1", "rr", "1", gasAt.Add(30*time.Minute), "final", "19840-8", "/min", 18, gasAt),
			orderObs("Patient/o1", "g", "2", gasAt.Add(32*time.Minute), "corrected", "2019-8", "kPa", 6.1, gasAt.Add(2*w))}},
		{name: "patient facts and height updated after", subjects: []string{"Patient/o1"},
			background: append(slices.Clone(one), gas("Patient/o1", "g", "1", orderAt(80), "final", "2019-8", 45, orderAt(60))),
			versions: []json.RawMessage{
				json.RawMessage(fmt.Sprintf(`{"resourceType":"Patient","id":"o1","meta":{"versionId":"2","lastUpdated":"%s"},"gender":"female","birthDate":"1940-02-02"}`, orderAt(100).Format(time.RFC3339))),
				json.RawMessage(fmt.Sprintf(`{"resourceType":"Patient","id":"o1","meta":{"versionId":"3","lastUpdated":"%s"},"gender":"male","birthDate":"2001-03-03"}`, orderAt(110).Format(time.RFC3339))),
				orderObs("Patient/o1", "o1-height", "2", orderAt(120), "amended", "8302-2", "cm", 150, orderAt(0))}},
	}
	for _, tc := range cases {
		t.Run(tc.name, tc.run)
	}
}

// TestShuffledStreamAgreesWithReplay: three patients' streams with every
// kind of correction, shuffled whole with duplicates and fed in chunks.
func TestShuffledStreamAgreesWithReplay(t *testing.T) {
	subjects := []string{"Patient/o1", "Patient/o2", "Patient/o3"}
	stream := orderBeds(subjects...)
	up := func(m int) time.Time { return orderAt(m).Add(20 * time.Minute) }
	for i, s := range subjects {
		for g, m := range []int{30, 90, 150} {
			stream = append(stream, orderObs(s, fmt.Sprintf("o%d-gas%d", i+1, g), "1", up(m), "final", "2019-8", "mm[Hg]", 44+float64(g), orderAt(m)))
		}
	}
	stream = append(stream,
		orderObs("Patient/o1", "o1-gas0", "2", up(30).Add(time.Hour), "amended", "2019-8", "kPa", 6.4, orderAt(30)),
		orderObs("Patient/o1", "o1-gas1", "2", up(90).Add(time.Hour), "entered-in-error", "2019-8", "mm[Hg]", 45, orderAt(90)),
		orderObs("Patient/o2", "o1-gas2", "2", up(150).Add(time.Hour), "amended", "2019-8", "mm[Hg]", 46, orderAt(150)),
		orderObs("Patient/o1", "o1-gas2", "3", up(150).Add(2*time.Hour), "amended", "2019-8", "mm[Hg]", 47, orderAt(151)),
		orderObs("Patient/o3", "o3-gas1", "2", up(90).Add(time.Hour), "amended", "2019-8", "mm[Hg]", 52, orderAt(95)),
		orderObs("Patient/o2", "o2-vt30", "2", up(30).Add(time.Hour), "amended", "75958-9", "L", 0.61, orderAt(33)),
		orderObs("Patient/o2", "o2-et91", "2", up(91).Add(time.Hour), "entered-in-error", "19891-1", "mm[Hg]", 35, orderAt(91)),
		orderObs("Patient/o1", "o1-gas2", "4", up(150).Add(3*time.Hour), "cancelled", "2019-8", "mm[Hg]", 47, orderAt(151)),
		json.RawMessage(fmt.Sprintf(`{"resourceType":"Patient","id":"o3","meta":{"versionId":"2","lastUpdated":"%s"},"gender":"female","birthDate":"1990-01-01"}`, orderAt(200).Format(time.RFC3339))),
		orderObs("Patient/o3", "o3-height", "2", orderAt(200), "amended", "8302-2", "cm", 150, orderAt(0)),
	)
	for seed := range uint64(6) {
		t.Run(fmt.Sprint("seed ", seed), func(t *testing.T) {
			s := slices.Clone(stream)
			rng := rand.New(rand.NewPCG(seed, 11))
			for i := range len(s) / 15 {
				s = append(s, s[(i*13+int(seed))%len(s)])
			}
			rng.Shuffle(len(s), func(i, j int) { s[i], s[j] = s[j], s[i] })
			eng := orderEngine(t, engine.Hooks{})
			feedInChunks(t, eng, s, 23+int(seed)*7)
			t.Logf("%d values agree", sameAsReplay(t, eng, s, orderNight, subjects, 0))
		})
	}
}

// TestRecodedBloodGasLeavesNothingLive: a blood gas corrected to glucose
// in the same request as its first version, or in a later one, leaves no
// value live from the first version, and the re-coded version is counted
// by its reason. Glucose of a resource never held is only an Observation
// this service does not recognise.
func TestRecodedBloodGasLeavesNothingLive(t *testing.T) {
	up := orderAt(60).Add(20 * time.Minute)
	v1 := orderObs("Patient/o1", "z", "1", up, "final", "2019-8", "mm[Hg]", 45, orderAt(60))
	v2 := orderObs("Patient/o1", "z", "2", up.Add(time.Minute), "amended", "2345-7", "mg/dL", 100, orderAt(60))
	other := orderObs("Patient/o1", "w", "1", up, "final", "2345-7", "mg/dL", 100, orderAt(60))
	for _, tc := range []struct {
		name  string
		chunk int
	}{{"in one request", 1 << 20}, {"request by request", 1}} {
		t.Run(tc.name, func(t *testing.T) {
			counted := map[derive.Reason]int{}
			eng := orderEngine(t, engine.Hooks{LeftOut: func(r derive.Reason) { counted[r]++ }})
			feedInChunks(t, eng, orderBed("Patient/o1", "o1"), 1000)
			clear(counted)
			feedInChunks(t, eng, []json.RawMessage{v1, v2, other}, tc.chunk)
			recs, err := eng.Derivations(context.Background(), "Patient/o1", time.Time{}, orderNight.Add(24*time.Hour), "", 1000)
			if err != nil {
				t.Fatal(err)
			}
			for _, r := range recs {
				if r.Status != "entered-in-error" && r.EffectiveAt.Equal(orderAt(60)) {
					t.Errorf("value %s (%s) from Observation/z/_history/1 stays live after z was re-coded as glucose", r.Key, r.Code)
				}
			}
			if counted[derive.ReasonRecoded] != 1 || counted[derive.ReasonUnrecognised] != 1 {
				t.Errorf("left out %v, want one %s and one %s", counted, derive.ReasonRecoded, derive.ReasonUnrecognised)
			}
		})
	}
}

// TestReplayDerivesATiedGasUnderOnePatient: two copies of one blood gas
// without meta, under two patients: replay derives it under one, the
// one the live store keeps.
func TestReplayDerivesATiedGasUnderOnePatient(t *testing.T) {
	stream := append(orderBeds("Patient/o1", "Patient/o2"),
		orderObs("Patient/o1", "gx", "", time.Time{}, "final", "2019-8", "mm[Hg]", 45, orderAt(60)),
		orderObs("Patient/o2", "gx", "", time.Time{}, "final", "2019-8", "mm[Hg]", 45, orderAt(60)))
	eng := orderEngine(t, engine.Hooks{})
	rep, err := eng.Compute(context.Background(), stream)
	if err != nil {
		t.Fatal(err)
	}
	under := map[string]bool{}
	for _, r := range rep.Results {
		if r.Derivation != nil && r.Derivation.Gas.Ref == "Observation/gx" {
			under[r.Subject] = true
		}
	}
	if len(under) != 1 {
		t.Errorf("replay derived Observation/gx under %v, want one patient", under)
	}
}
