package encode_test

import (
	"encoding/json"
	"net/url"
	"slices"
	"strings"
	"testing"

	"github.com/deadspace-fhir/deadspace/fhir/encode"
)

// planFixture is a plan's inputs for the first two values of the full
// derivation.
type planFixture struct {
	enc *encode.Encoder
	w   encode.Write
	cfg encode.TxConfig
}

func newPlanFixture(t *testing.T, kind string, n int) planFixture {
	t.Helper()
	enc := newEncoder(t)
	d := fullDerivation()
	b, err := enc.Derivation("Patient/p1", d)
	if err != nil {
		t.Fatal(err)
	}
	var all []string
	for _, o := range b.Observations {
		all = append(all, series(o))
	}
	return planFixture{
		enc: enc,
		w:   encode.Write{Kind: kind, Subject: "Patient/p1", Derivation: &d, Series: all[:n], Why: "an input was withdrawn"},
		cfg: encode.TxConfig{DeviceRef: "Device/server-device", ProvenanceTagSystem: "https://example.org/tag"},
	}
}

func (f planFixture) plan(t *testing.T, server map[string]encode.ServerRef) *encode.Plan {
	t.Helper()
	p, err := f.enc.Plan(f.w, server, f.cfg)
	if err != nil {
		t.Fatal(err)
	}
	return p
}

// provenanceOf returns the Provenance a plan sends on its own (every id
// given as "id-" and the series' first digits), and its condition.
func provenanceOf(t *testing.T, p *encode.Plan) (txResource, string) {
	t.Helper()
	ids := map[string]string{}
	for i := range p.Len() {
		ids[p.Series(i)] = "id-" + p.Series(i)[7:15]
	}
	raw, q, err := p.Provenance(ids)
	if err != nil {
		t.Fatal(err)
	}
	var r txResource
	if err := json.Unmarshal(raw, &r); err != nil {
		t.Fatal(err)
	}
	return r, q.Get("_tag")
}

func revisions(r txResource) []string {
	var out []string
	for _, en := range r.Entity {
		if en.Role == "revision" {
			out = append(out, en.What.Reference)
		}
	}
	slices.Sort(out)
	return out
}

// TestPlanRevisesTheVersionItWasMadeFor: sent again against versions read
// after a failed If-Match, an update names those in If-Match, and its
// Provenance still cites the versions it was made to replace, so it is the
// same Provenance (same tag) as the first attempt's.
func TestPlanRevisesTheVersionItWasMadeFor(t *testing.T) {
	for _, tc := range []struct {
		name string
		kind string
		n    int
	}{
		{"revision", encode.WriteRevise, 2},
		{"withdrawal", encode.WriteWithdraw, 1},
	} {
		t.Run(tc.name, func(t *testing.T) {
			f := newPlanFixture(t, tc.kind, tc.n)
			first := map[string]encode.ServerRef{}
			again := map[string]encode.ServerRef{}
			var want []string
			for i, s := range f.w.Series {
				id := "srv" + string(rune('0'+i))
				first[s] = encode.ServerRef{ID: id, Version: "1"}
				again[s] = encode.ServerRef{ID: id, Version: "2", Revises: "1"}
				want = append(want, "Observation/"+id+"/_history/1")
			}
			slices.Sort(want)
			p1, p2 := f.plan(t, first), f.plan(t, again)
			raw, err := p2.Transaction(0, p2.Len(), false)
			if err != nil {
				t.Fatal(err)
			}
			var tx txBundle
			if err := json.Unmarshal(raw, &tx); err != nil {
				t.Fatal(err)
			}
			for i, en := range tx.Entry {
				if en.Request.IfMatch != `W/"2"` {
					t.Errorf("entry %d: If-Match %q, want the version read, W/\"2\"", i, en.Request.IfMatch)
				}
			}
			prov1, tag1 := provenanceOf(t, p1)
			prov2, tag2 := provenanceOf(t, p2)
			if got := revisions(prov2); !slices.Equal(got, want) {
				t.Errorf("the Provenance cites %v as revised, want %v", got, want)
			}
			if !slices.Equal(revisions(prov1), revisions(prov2)) || tag1 != tag2 {
				t.Errorf("the attempts' Provenances differ: %s %v and %s %v", tag1, revisions(prov1), tag2, revisions(prov2))
			}
		})
	}
}

// TestPlanRemaining: a plan without the values that already landed sends
// only the others, and its Provenance, in a transaction or alone, still
// cites every value, the landed ones by their ids.
func TestPlanRemaining(t *testing.T) {
	for _, tc := range []struct {
		name string
		kind string
	}{
		{"create", encode.WriteCreate},
		{"revision", encode.WriteRevise},
	} {
		t.Run(tc.name, func(t *testing.T) {
			f := newPlanFixture(t, tc.kind, 3)
			server := map[string]encode.ServerRef{}
			for i, s := range f.w.Series {
				server[s] = encode.ServerRef{ID: "srv" + string(rune('0'+i)), Version: "1"}
			}
			full := f.plan(t, server)
			_, fullTag := provenanceOf(t, full)

			one, err := full.Remaining(map[string]string{full.Series(0): "landed0"})
			if err != nil {
				t.Fatal(err)
			}
			if one.Len() != 2 || one.Series(0) != full.Series(1) || one.Key(1) != full.Key(2) || string(one.Observation(0)) != string(full.Observation(1)) {
				t.Fatalf("remaining plan has %d values, want the last two of the full plan", one.Len())
			}
			raw, err := one.Transaction(0, one.Len(), true)
			if err != nil {
				t.Fatal(err)
			}
			var tx txBundle
			if err := json.Unmarshal(raw, &tx); err != nil {
				t.Fatal(err)
			}
			if len(tx.Entry) != 3 {
				t.Fatalf("%d entries, want two values and the Provenance", len(tx.Entry))
			}
			var prov txResource
			if err := json.Unmarshal(tx.Entry[2].Resource, &prov); err != nil {
				t.Fatal(err)
			}
			if len(prov.Target) != 3 || prov.Target[0].Reference != "Observation/landed0" {
				t.Errorf("the Provenance targets %+v, want three, the first Observation/landed0", prov.Target)
			}
			if q, err := url.ParseQuery(tx.Entry[2].Request.IfNoneExist); err != nil || q.Get("_tag") != fullTag {
				t.Errorf("the Provenance's condition %q is not the full plan's tag %s", tx.Entry[2].Request.IfNoneExist, fullTag)
			}

			done := map[string]string{}
			for i := range one.Len() {
				done[one.Series(i)] = "landed" + string(rune('1'+i))
			}
			none, err := one.Remaining(done)
			if err != nil {
				t.Fatal(err)
			}
			if none.Len() != 0 {
				t.Fatalf("%d values left, want none", none.Len())
			}
			alone, q, err := none.Provenance(nil)
			if err != nil {
				t.Fatal(err)
			}
			for _, id := range []string{"landed0", "landed1", "landed2"} {
				if !strings.Contains(string(alone), `"Observation/`+id+`"`) {
					t.Errorf("the Provenance of a plan with every value landed does not cite Observation/%s", id)
				}
			}
			if q.Get("_tag") != fullTag {
				t.Errorf("its tag %s, want the full plan's %s", q.Get("_tag"), fullTag)
			}
			if _, err := full.Remaining(map[string]string{"sha256:00": "x"}); err == nil {
				t.Error("a series the plan does not write was accepted as done")
			}
		})
	}
}
