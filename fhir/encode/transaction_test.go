package encode_test

import (
	"encoding/json"
	"errors"
	"strings"
	"testing"

	"github.com/deadspace-fhir/deadspace/fhir/encode"
)

type txBundle struct {
	Type  string
	Entry []struct {
		FullURL  string
		Resource json.RawMessage
		Request  struct{ Method, URL, IfNoneExist, IfMatch string }
	}
}

type txResource struct {
	ResourceType string
	ID           string
	Status       string
	Device       *struct{ Reference string }
	Target       []struct{ Reference string }
	Agent        []struct{ Who struct{ Reference string } }
	Entity       []struct {
		Role string
		What struct{ Reference string }
	}
}

// TestPlanTransactions: a typed write becomes a transaction whose creates
// are conditional on the series, whose updates carry If-Match on the
// version last seen, and whose references are resolved as it is built
// (fullUrls within the transaction, the server's Device and ids).
func TestPlanTransactions(t *testing.T) {
	enc := newEncoder(t)
	d := fullDerivation()
	b, err := enc.Derivation("Patient/p1", d)
	if err != nil {
		t.Fatal(err)
	}
	var allSeries []string
	for _, o := range b.Observations {
		allSeries = append(allSeries, series(o))
	}
	two := allSeries[:2]
	opts := encode.DefaultOptions()
	cfg := encode.TxConfig{DeviceRef: "Device/server-device", ProvenanceTagSystem: "https://example.org/tag"}
	server := map[string]encode.ServerRef{two[0]: {ID: "srv0", Version: "v7"}, two[1]: {ID: "srv1", Version: "v8"}}

	for _, tc := range []struct {
		name       string
		kind       string
		series     []string
		wantMethod string
	}{
		{"Create", encode.WriteCreate, two, "POST"},
		{"Revise", encode.WriteRevise, two, "PUT"},
		{"Withdraw", encode.WriteWithdraw, two[:1], "PUT"},
	} {
		t.Run(tc.name, func(t *testing.T) {
			w := encode.Write{Kind: tc.kind, Subject: "Patient/p1", Derivation: &d, Series: tc.series, Why: "an input was withdrawn"}
			p, err := enc.Plan(w, server, cfg)
			if err != nil {
				t.Fatal(err)
			}
			raw, err := p.Transaction(0, p.Len(), true)
			if err != nil {
				t.Fatal(err)
			}
			if strings.Contains(string(raw), enc.DeviceRef()) {
				t.Errorf("the transaction still cites the local Device reference %s", enc.DeviceRef())
			}
			var tx txBundle
			if err := json.Unmarshal(raw, &tx); err != nil {
				t.Fatal(err)
			}
			if tx.Type != "transaction" || len(tx.Entry) != len(tc.series)+1 {
				t.Fatalf("type %s with %d entries, want a transaction of %d", tx.Type, len(tx.Entry), len(tc.series)+1)
			}
			targets := map[string]bool{}
			for i := range p.Len() {
				en := tx.Entry[i]
				var r txResource
				if err := json.Unmarshal(en.Resource, &r); err != nil {
					t.Fatal(err)
				}
				if en.Request.Method != tc.wantMethod {
					t.Errorf("entry %d: %s, want %s", i, en.Request.Method, tc.wantMethod)
				}
				if r.Device == nil || r.Device.Reference != cfg.DeviceRef {
					t.Errorf("entry %d: device %+v, want %s", i, r.Device, cfg.DeviceRef)
				}
				switch tc.kind {
				case encode.WriteCreate:
					want := "identifier=" + strings.ReplaceAll(strings.ReplaceAll(opts.SeriesSystem+"|"+p.Series(i), ":", "%3A"), "/", "%2F")
					if en.Request.IfNoneExist != strings.ReplaceAll(want, "|", "%7C") || r.ID != "" || en.FullURL == "" {
						t.Errorf("create entry %d: ifNoneExist %q id %q fullUrl %q; want conditional on the series, no id, a fullUrl", i, en.Request.IfNoneExist, r.ID, en.FullURL)
					}
					targets[en.FullURL] = true
				default:
					sr := server[p.Series(i)]
					if en.Request.URL != "Observation/"+sr.ID || en.Request.IfMatch != `W/"`+sr.Version+`"` || r.ID != sr.ID {
						t.Errorf("update entry %d: %s If-Match %q id %q; want Observation/%s with If-Match W/\"%s\"", i, en.Request.URL, en.Request.IfMatch, r.ID, sr.ID, sr.Version)
					}
					targets["Observation/"+sr.ID] = true
					wantStatus := map[string]string{encode.WriteRevise: "amended", encode.WriteWithdraw: "entered-in-error"}[tc.kind]
					if r.Status != wantStatus {
						t.Errorf("update entry %d: status %s, want %s", i, r.Status, wantStatus)
					}
				}
			}
			var prov txResource
			if err := json.Unmarshal(tx.Entry[p.Len()].Resource, &prov); err != nil {
				t.Fatal(err)
			}
			if prov.ResourceType != "Provenance" || len(prov.Target) != p.Len() {
				t.Fatalf("last entry: %s with %d targets", prov.ResourceType, len(prov.Target))
			}
			for _, tg := range prov.Target {
				if !targets[tg.Reference] {
					t.Errorf("provenance target %s is none of the entries %v", tg.Reference, targets)
				}
			}
			if len(prov.Agent) == 0 || prov.Agent[0].Who.Reference != cfg.DeviceRef {
				t.Errorf("provenance agent %+v, want %s", prov.Agent, cfg.DeviceRef)
			}
			if tc.kind != encode.WriteCreate {
				revisions := 0
				for _, en := range prov.Entity {
					if en.Role == "revision" {
						revisions++
					}
				}
				if revisions != len(tc.series) {
					t.Errorf("%d revision entities, want one per earlier version", revisions)
				}
			}
			// Sent on its own, the Provenance cites the server's ids.
			ids := map[string]string{}
			for i := range p.Len() {
				ids[p.Series(i)] = "id" + p.Series(i)[7:15]
			}
			alone, q, err := p.Provenance(ids)
			if err != nil {
				t.Fatal(err)
			}
			if !strings.Contains(q.Get("_tag"), cfg.ProvenanceTagSystem+"|dsp-") {
				t.Errorf("provenance condition %v", q)
			}
			for _, id := range ids {
				if !strings.Contains(string(alone), `"Observation/`+id+`"`) {
					t.Errorf("provenance sent alone does not cite Observation/%s", id)
				}
			}
		})
	}

	t.Run("UpdateOfAValueNeverCreated", func(t *testing.T) {
		_, err := enc.Plan(encode.Write{Kind: encode.WriteRevise, Subject: "Patient/p1", Derivation: &d, Series: allSeries[2:3]}, server, cfg)
		if !errors.Is(err, encode.ErrNotOnServer) {
			t.Fatalf("err = %v, want ErrNotOnServer", err)
		}
	})
	t.Run("UnknownSeries", func(t *testing.T) {
		_, err := enc.Plan(encode.Write{Kind: encode.WriteCreate, Subject: "Patient/p1", Derivation: &d, Series: []string{"sha256:00"}}, server, cfg)
		if err == nil {
			t.Fatal("a write of a series the result does not have was planned")
		}
	})
	t.Run("ValueJSON", func(t *testing.T) {
		raw, err := enc.ValueJSON(encode.Write{Subject: "Patient/p1", Derivation: &d, Why: "gone"}, allSeries[0], "entered-in-error")
		if err != nil {
			t.Fatal(err)
		}
		var r txResource
		if err := json.Unmarshal(raw, &r); err != nil || r.Status != "entered-in-error" {
			t.Fatalf("status %q (%v), want entered-in-error", r.Status, err)
		}
	})
}

// BenchmarkWriteEncode encodes what the outbox writer sends for one blood
// gas's derivation (nine values: two transactions of at most eight
// entries, then the Provenance on its own, as for Medplum), with the
// encoding/json construction it replaced as the baseline in the same run.
func BenchmarkWriteEncode(b *testing.B) {
	enc := newEncoder(b)
	d := fullDerivation()
	bd, err := enc.Derivation(subject, d)
	if err != nil {
		b.Fatal(err)
	}
	var all []string
	for _, o := range bd.Observations {
		all = append(all, series(o))
	}
	w := encode.Write{Kind: encode.WriteCreate, Subject: subject, Derivation: &d, Series: all}
	cfg := encode.TxConfig{DeviceRef: "Device/server-device", ProvenanceTagSystem: "https://example.org/provenance"}
	for _, bc := range []struct {
		name string
		old  bool
	}{{"baseline=encoding-json", true}, {"direct", false}} {
		b.Run(bc.name, func(b *testing.B) {
			defer encode.SetViaEncodingJSON(bc.old)()
			b.ReportAllocs()
			for b.Loop() {
				p, err := enc.Plan(w, nil, cfg)
				if err != nil {
					b.Fatal(err)
				}
				for from := 0; from < p.Len(); from += 8 {
					if _, err := p.Transaction(from, min(from+8, p.Len()), false); err != nil {
						b.Fatal(err)
					}
				}
				ids := make(map[string]string, p.Len())
				for i := range p.Len() {
					ids[p.Series(i)] = "srv"
				}
				if _, _, err := p.Provenance(ids); err != nil {
					b.Fatal(err)
				}
			}
		})
	}
}

// TestOwnProvenance: what a server returns for the Provenance's create,
// conditional on its tag, is the plan's Provenance only when it is a
// Provenance carrying the plan's tag (system and code); a server that
// ignores _tag in the condition returns whatever single Provenance it
// holds.
func TestOwnProvenance(t *testing.T) {
	enc := newEncoder(t)
	d := fullDerivation()
	b, err := enc.Derivation("Patient/p1", d)
	if err != nil {
		t.Fatal(err)
	}
	cfg := encode.TxConfig{DeviceRef: "Device/server-device", ProvenanceTagSystem: "https://example.org/tag"}
	p, err := enc.Plan(encode.Write{Kind: encode.WriteCreate, Subject: "Patient/p1", Derivation: &d, Series: []string{series(b.Observations[0])}}, nil, cfg)
	if err != nil {
		t.Fatal(err)
	}
	raw, err := p.Transaction(0, p.Len(), true)
	if err != nil {
		t.Fatal(err)
	}
	var tx txBundle
	if err := json.Unmarshal(raw, &tx); err != nil {
		t.Fatal(err)
	}
	// As the server stores it: with an id and a version of its own.
	var sent map[string]any
	if err := json.Unmarshal(tx.Entry[len(tx.Entry)-1].Resource, &sent); err != nil {
		t.Fatal(err)
	}
	sent["id"] = "f0000009"
	sent["meta"].(map[string]any)["versionId"] = "1"
	stored, err := json.Marshal(sent)
	if err != nil {
		t.Fatal(err)
	}
	_, q, err := p.Provenance(map[string]string{p.Series(0): "f0000001"})
	if err != nil {
		t.Fatal(err)
	}
	system, code, _ := strings.Cut(q.Get("_tag"), "|")
	if system != cfg.ProvenanceTagSystem || code == "" {
		t.Fatalf("the plan's condition %v does not carry its tag", q)
	}
	withTags := func(tags string) []byte {
		return []byte(`{"resourceType":"Provenance","id":"f0000002","meta":{"versionId":"1","tag":[` + tags + `]},"recorded":"2020-01-01T00:00:00Z"}`)
	}
	tag := func(system, code string) string { return `{"system":"` + system + `","code":"` + code + `"}` }
	for _, tc := range []struct {
		name     string
		resource []byte
		want     bool
		wantErr  bool
	}{
		{"the plan's Provenance as the server stores it", stored, true, false},
		{"its tag among other tags", withTags(tag("urn:example:audit", "checked") + "," + tag(system, code)), true, false},
		{"another write's tag", withTags(tag(system, code+"x")), false, false},
		{"the tag's code under another system", withTags(tag("urn:example:audit", code)), false, false},
		{"the tag's code without a system", withTags(`{"code":"` + code + `"}`), false, false},
		{"a tag of another shape beside it", withTags(`{"system":1},` + tag(system, code)), true, false},
		{"no tag at all (another system's Provenance)", []byte(`{"resourceType":"Provenance","recorded":"2020-01-01T00:00:00Z"}`), false, false},
		{"an Observation carrying the tag", []byte(`{"resourceType":"Observation","meta":{"tag":[` + tag(system, code) + `]}}`), false, true},
		{"an OperationOutcome", []byte(`{"resourceType":"OperationOutcome","issue":[]}`), false, true},
		{"not JSON", []byte(`<html>`), false, true},
		{"nothing", nil, false, true},
	} {
		t.Run(tc.name, func(t *testing.T) {
			got, err := p.OwnProvenance(tc.resource)
			if got != tc.want || (err != nil) != tc.wantErr {
				t.Fatalf("OwnProvenance = %v, %v; want %v, error %v", got, err, tc.want, tc.wantErr)
			}
			if err != nil && !errors.Is(err, encode.ErrNotAProvenance) {
				t.Errorf("error %v does not match ErrNotAProvenance", err)
			}
		})
	}
}
