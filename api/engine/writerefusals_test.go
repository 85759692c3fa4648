package engine_test

import (
	"bytes"
	"context"
	"encoding/json"
	"io"
	"net/http"
	"net/http/httptest"
	"net/http/httputil"
	"net/url"
	"slices"
	"strconv"
	"strings"
	"sync/atomic"
	"testing"
	"time"

	"github.com/deadspace-fhir/deadspace/api/deadletters"
	"github.com/deadspace-fhir/deadspace/fhir/encode"
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

// The software Device's create, conditional on its identifier, refused with
// 412: several resources match. Copies of this build's Device (two
// replicas' first writes on a server that did not keep their conditional
// creates apart) are alike, so every write cites the one with the lowest
// id, with or without a server that honours the parameter. When no Device
// carries the identifier (the server ignores the parameter and holds other
// Devices), nothing can be cited: the writes stay in the outbox, neither
// buried nor counted as attempts, the Device is looked for again only
// after two minutes however many writes arrive, and the engine says why in
// its health and hook until the server is fixed; then they go, in order.
func TestDeviceMatchingSeveral(t *testing.T) {
	enc, err := encode.New(encode.DefaultOptions())
	if err != nil {
		t.Fatal(err)
	}
	ours, _, err := enc.DeviceCreate()
	if err != nil {
		t.Fatal(err)
	}
	other := []byte(`{"resourceType":"Device","identifier":[{"system":"urn:example:devices","value":"pump-1"}]}`)
	for _, tc := range []struct {
		name string
		// server holds these Devices, in this order, before the first write.
		server  [][]byte
		ignore  bool // the server ignores Device's identifier parameter
		wantDev int  // index in server of the Device cited; -1: none, writes stop
	}{
		{"two copies of this build's Device", [][]byte{other, ours, ours}, false, 1},
		{"the server ignores identifier, one copy among other Devices", [][]byte{other, ours, other}, true, 1},
		{"the server ignores identifier, two copies among other Devices", [][]byte{other, ours, ours}, true, 1},
		{"the server ignores identifier, no copy among other Devices", [][]byte{other, other}, true, -1},
		// One resource matches the ignored condition: the create answers
		// 200 with it, and it must not be cited unless it is this build's.
		{"the server ignores identifier and holds one other Device", [][]byte{other}, true, -1},
		{"the server ignores identifier and holds only this build's Device", [][]byte{ours}, true, 0},
	} {
		t.Run(tc.name, func(t *testing.T) {
			ctx := context.Background()
			r := newWriteRig(t, 0)
			var stops []bool
			r.hooks.WritesStopped = func(stopped bool) { stops = append(stops, stopped) }
			var ids []string
			for _, d := range tc.server {
				stored, err := r.fake.Put(d)
				if err != nil {
					t.Fatal(err)
				}
				var m struct{ ID string }
				_ = json.Unmarshal(stored, &m)
				ids = append(ids, m.ID)
			}
			if tc.ignore {
				r.fake.Ignore("Device", "identifier")
			}
			r.open()
			r.ingest(append(r.inputs, r.gas(1, 44))...)
			r.eng.FlushNow(ctx)

			h := r.health()
			if tc.wantDev < 0 {
				if h.Stats.OutboxDepth != 1 || h.Stats.DeadLetters != 0 || !strings.Contains(h.WritesStopped, "cannot be resolved") {
					t.Fatalf("outbox %d, dead letters %d, writes stopped %q; want the write kept, none buried, and why", h.Stats.OutboxDepth, h.Stats.DeadLetters, h.WritesStopped)
				}
				if ws := r.outbox(); len(ws) != 1 || ws[0].Attempts != 0 {
					t.Errorf("the kept write: %+v, want it untouched", ws)
				}
				if n := r.fake.Count(http.MethodPost, "Device"); n != 1 {
					t.Errorf("%d Device creates in one pass, want 1", n)
				}
				for _, rq := range r.fake.Requests() {
					if rq.Method == http.MethodPost && rq.Path != "Device" {
						t.Errorf("POST %q sent while writes are stopped, want only the Device's create", rq.Path)
					}
				}
				r.ingest(r.gas(2, 47)) // new writes wake the writer; the next check still waits
				r.eng.FlushNow(ctx)
				if got := r.health(); got.Stats.OutboxDepth != 2 || got.WritesStopped == "" {
					t.Fatalf("second pass: outbox %d, writes stopped %q; want both writes kept", got.Stats.OutboxDepth, got.WritesStopped)
				}
				if n := r.fake.Count(http.MethodPost, "Device"); n != 1 {
					t.Errorf("%d Device creates after a second pass within two minutes, want still 1", n)
				}
				r.fake.ClearFaults() // the server is fixed
				r.mustDrain(3)
				if got := r.health(); got.WritesStopped != "" {
					t.Errorf("after the fix, writes stopped %q, want empty", got.WritesStopped)
				}
				if want := []bool{true, false}; !slices.Equal(stops, want) {
					t.Errorf("WritesStopped hook told %v, want %v", stops, want)
				}
				ids = append(ids, "")
				for _, raw := range r.fake.Current("Device") {
					var m struct {
						ID         string
						Identifier []struct{ Value string }
					}
					_ = json.Unmarshal(raw, &m)
					if len(m.Identifier) > 0 && strings.HasPrefix(m.Identifier[0].Value, "deadspace@") {
						ids[len(ids)-1] = m.ID
					}
				}
				tc.wantDev = len(ids) - 1
			} else {
				if h.Stats.OutboxDepth != 0 || h.Stats.DeadLetters != 0 || h.WritesStopped != "" {
					t.Fatalf("outbox %d, dead letters %d, writes stopped %q; want the write sent", h.Stats.OutboxDepth, h.Stats.DeadLetters, h.WritesStopped)
				}
				if len(stops) != 0 {
					t.Errorf("WritesStopped hook told %v, want nothing", stops)
				}
				if n := len(r.fake.Current("Device")); n != len(tc.server) {
					t.Errorf("the server holds %d Devices, want the %d it had", n, len(tc.server))
				}
			}
			want := "Device/" + ids[tc.wantDev]
			r.wantCurrent(2)
			for _, o := range r.fake.Current("Observation") {
				var m struct{ Device struct{ Reference string } }
				_ = json.Unmarshal(o, &m)
				if m.Device.Reference != "" && m.Device.Reference != want {
					t.Errorf("a value cites %s, want %s", m.Device.Reference, want)
				}
			}
			for _, p := range r.provenances() {
				agents, _ := json.Marshal(p["agent"])
				if !strings.Contains(string(agents), `"`+want+`"`) {
					t.Errorf("a Provenance's agents %s do not cite %s", agents, want)
				}
			}
		})
	}
}

// While writes are stopped (no software Device to cite), the Device is
// looked for again every two minutes. That wait is a wait like the
// outbox's retries: a wall clock stepped back meanwhile must not hold the
// next check back by the step. A check time further ahead than the
// longest wait the writer sets can only come from a step, as a stored
// retry time beyond every wait is due at once (TestRetryDue).
func TestWritesStoppedCheckIsNotHeldBackByAClockSteppedBack(t *testing.T) {
	ctx := context.Background()
	r := newWriteRig(t, 0)
	other := []byte(`{"resourceType":"Device","identifier":[{"system":"urn:example:devices","value":"pump-1"}]}`)
	for range 2 {
		if _, err := r.fake.Put(other); err != nil {
			t.Fatal(err)
		}
	}
	r.fake.Ignore("Device", "identifier")
	r.open()
	r.ingest(append(r.inputs, r.gas(1, 44))...)
	r.eng.FlushNow(ctx)
	if h := r.health(); h.WritesStopped == "" {
		t.Fatalf("writes stopped %q; want them stopped (the setup)", h.WritesStopped)
	}
	r.fake.ClearFaults() // the server is fixed
	r.clock.Advance(-time.Hour)
	r.clock.Advance(3 * time.Minute) // more than the two minutes between checks
	r.eng.FlushNow(ctx)
	if h := r.health(); h.WritesStopped != "" || h.Stats.OutboxDepth != 0 {
		t.Fatalf("after the clock was stepped back an hour and three minutes passed: writes stopped %q, outbox %d; want the Device looked for again and the write sent", h.WritesStopped, h.Stats.OutboxDepth)
	}
}

// A server that ignores _tag in a condition and holds exactly one
// Provenance answers the write's Provenance create, conditional on its
// tag, 200 with that Provenance (R4 http.html#ccreate: a single match is
// returned, not created again), so the write's own Provenance is never
// written. The one it holds may be another system's, or this service's
// Provenance of an earlier write (the create's, when a revision follows).
// What matched does not carry the write's tag, whether the server returns
// it or only names it by its location (then it is read): the write goes to
// the dead letters at once, counted as every buried write is, saying what
// the server seems to do and that the values were written without their
// Provenance. Once the server is fixed, the retried letter writes the
// Provenance, and the values stay as they landed: one Observation per
// series, not written again.
func TestProvenanceMatchingAnotherIsBuried(t *testing.T) {
	other := []byte(`{"resourceType":"Provenance","recorded":"2020-01-01T00:00:00Z","target":[{"reference":"Observation/other"}],"agent":[{"who":{"display":"another system"}}]}`)
	for _, tc := range []struct {
		name       string
		maxEntries int
		omit       bool // the server answers without resources
		revision   bool // the buried write is a revision, after the create
		// wantAfter are the Provenances by activity after the retry, the
		// other system's left out.
		wantAfter map[string]int
	}{
		{"create in one transaction, another system's Provenance", 0, false, false, map[string]int{"CREATE": 1}},
		{"create in one transaction, answered without resources", 0, true, false, map[string]int{"CREATE": 1}},
		{"create split, the Provenance on its own", 2, false, false, map[string]int{"CREATE": 1}},
		{"create split, answered without resources", 2, true, false, map[string]int{"CREATE": 1}},
		{"revision in one transaction, the create's Provenance the only one", 0, false, true, map[string]int{"CREATE": 1, "UPDATE": 1}},
		{"revision split, the create's Provenance the only one", 2, false, true, map[string]int{"CREATE": 1, "UPDATE": 1}},
		{"revision in one transaction, answered without resources", 0, true, true, map[string]int{"CREATE": 1, "UPDATE": 1}},
	} {
		t.Run(tc.name, func(t *testing.T) {
			ctx := context.Background()
			r := newWriteRig(t, tc.maxEntries)
			buried, results := 0, map[string]int{}
			r.hooks.DeadLetter = func() { buried++ }
			r.hooks.WriteResult = func(outcome string) { results[outcome]++ }
			if tc.omit {
				r.fake.OmitResources()
			}
			var before map[string][]serverValue
			if tc.revision {
				r.openAndCreate()
				before = r.values()
				r.fake.Ignore("Provenance", "_tag")
				r.ingest(r.gas(2, 47))
			} else {
				if _, err := r.fake.Put(other); err != nil {
					t.Fatal(err)
				}
				r.fake.Ignore("Provenance", "_tag")
				r.open()
				r.ingest(append(r.inputs, r.gas(1, 44))...)
			}
			provsBefore := len(r.provenances())
			r.eng.FlushNow(ctx)

			h := r.health()
			if h.Stats.OutboxDepth != 0 || h.Stats.DeadLetters != 1 {
				var last string
				if ws := r.outbox(); len(ws) > 0 {
					last = ws[0].LastError
				}
				t.Fatalf("after one attempt: %d writes in the outbox (last error %q), %d dead letters; want the write buried", h.Stats.OutboxDepth, last, h.Stats.DeadLetters)
			}
			if buried != 1 || results["dead-letter"] != 1 {
				t.Errorf("dead-letter hook called %d times, write results %v; want the burial counted once", buried, results)
			}
			var ids []string
			for _, typ := range []string{"Observation", "Provenance", "Device"} {
				for _, raw := range r.fake.Current(typ) {
					var m struct{ ID string }
					_ = json.Unmarshal(raw, &m)
					ids = append(ids, m.ID)
				}
			}
			for _, reason := range r.deadLetters() {
				for _, want := range []string{"Provenance was not written", "ignore _tag in conditions", "the values were written without their Provenance", "retry the write"} {
					if !strings.Contains(reason, want) {
						t.Errorf("dead letter reason %q does not say %q", reason, want)
					}
				}
				for _, id := range ids {
					if strings.Contains(reason, id) {
						t.Errorf("dead letter reason %q names the server's resource %s", reason, id)
					}
				}
			}
			if n := len(r.provenances()); n != provsBefore {
				t.Errorf("the server holds %d Provenances, want the %d it held (none written)", n, provsBefore)
			}
			landed := r.values()
			if len(landed) != 2 {
				t.Fatalf("%d series on the server, want the 2 written", len(landed))
			}
			for series, vs := range landed {
				if len(vs) != 1 {
					t.Errorf("series %s has %d Observations on the server, want 1", series, len(vs))
				}
				if tc.revision && vs[0].version == before[series][0].version {
					t.Errorf("series %s: the revision's value did not land (version %s)", series, vs[0].version)
				}
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
			for series, vs := range r.values() {
				if vs[0].version != landed[series][0].version {
					t.Errorf("series %s: version %s after the retry, want %s, as it landed (not written again)", series, vs[0].version, landed[series][0].version)
				}
			}
			got := r.activities()
			for act, n := range tc.wantAfter {
				if got[act] != n {
					t.Errorf("after the retry the server holds Provenances %v, want %v (and the other system's)", got, tc.wantAfter)
					break
				}
			}
			if tc.revision {
				r.wantOneRevisionProvenance(before)
			}
		})
	}
}

// A write sent again after its answer was lost meets its own Provenance on
// the server: the Provenance's create, conditional on its tag, is answered
// 200 with it, or with its location only (then it is read). That is a
// repeat, and the write is acknowledged, also on a server that ignores _tag
// in a condition while this write's Provenance is the only one it holds.
func TestRepeatedProvenanceIsAcknowledged(t *testing.T) {
	for _, tc := range []struct {
		name       string
		maxEntries int
		ignoreTag  bool
		omit       bool
	}{
		{"one transaction, the server honours _tag", 0, false, false},
		{"one transaction, the server honours _tag, answered without resources", 0, false, true},
		{"one transaction, the server ignores _tag", 0, true, false},
		{"one transaction, the server ignores _tag, answered without resources", 0, true, true},
		{"split, the server honours _tag", 2, false, false},
		{"split, the server ignores _tag", 2, true, false},
		{"split, the server ignores _tag, answered without resources", 2, true, true},
	} {
		t.Run(tc.name, func(t *testing.T) {
			r := newWriteRig(t, tc.maxEntries)
			if tc.ignoreTag {
				r.fake.Ignore("Provenance", "_tag")
			}
			if tc.omit {
				r.fake.OmitResources()
			}
			// The Provenance lands, its answer is lost: in the one
			// transaction, or sent on its own after the values.
			lost := ""
			if tc.maxEntries > 0 {
				lost = "Provenance"
			}
			r.fake.Drop(http.MethodPost, lost, 1)
			r.open()
			r.ingest(append(r.inputs, r.gas(1, 44))...)
			r.eng.FlushNow(t.Context())
			if got := r.activities(); got["CREATE"] != 1 || r.health().Stats.OutboxDepth != 1 {
				t.Fatalf("after the lost answer: Provenances %v, outbox %d; want the Provenance on the server and the write still to send", got, r.health().Stats.OutboxDepth)
			}
			r.mustDrain(5)
			r.wantCurrent(2)
			if got := r.activities(); got["CREATE"] != 1 || len(r.provenances()) != 1 {
				t.Errorf("the server holds Provenances %v, want one CREATE", got)
			}
			posts := 0
			for _, rq := range r.fake.Requests() {
				if rq.Method == http.MethodPost && rq.Path == lost {
					posts++
				}
			}
			if posts != 2 {
				t.Errorf("%d POSTs carrying the Provenance, want 2 (the lost one and the repeat)", posts)
			}
			reads := r.fake.Count(http.MethodGet, "Provenance/")
			if tc.omit && reads != 1 {
				t.Errorf("%d reads of the matched Provenance, want 1 (the server named it by location only)", reads)
			}
			if !tc.omit && reads != 0 {
				t.Errorf("%d reads of the matched Provenance, want none (the server returned it)", reads)
			}
		})
	}
}

// unnamedProvenances stands in front of the rig's fake and, while on,
// answers the Provenance's create, alone or in a transaction, with its
// status only: neither the resource nor its location. Call it before open.
func unnamedProvenances(r *writeRig) *atomic.Bool {
	u, err := url.Parse(r.fake.BaseURL)
	if err != nil {
		r.t.Fatal(err)
	}
	on := &atomic.Bool{}
	on.Store(true)
	proxy := httputil.NewSingleHostReverseProxy(&url.URL{Scheme: u.Scheme, Host: u.Host})
	proxy.ModifyResponse = func(resp *http.Response) error {
		path := strings.Trim(strings.TrimPrefix(resp.Request.URL.Path, u.Path), "/")
		if !on.Load() || resp.Request.Method != http.MethodPost || (path != "" && path != "Provenance") {
			return nil
		}
		body, err := io.ReadAll(resp.Body)
		if err != nil {
			return err
		}
		resp.Body.Close()
		switch {
		case path == "Provenance":
			resp.Header.Del("Location")
			body = nil
		case resp.StatusCode < 300:
			var b map[string]any
			if err := json.Unmarshal(body, &b); err != nil {
				return err
			}
			entries, _ := b["entry"].([]any)
			for _, e := range entries {
				em, _ := e.(map[string]any)
				rm, _ := em["response"].(map[string]any)
				if loc, _ := rm["location"].(string); strings.HasPrefix(loc, "Provenance/") {
					delete(rm, "location")
					delete(em, "resource")
				}
			}
			if body, err = json.Marshal(b); err != nil {
				return err
			}
		}
		resp.Body = io.NopCloser(bytes.NewReader(body))
		resp.ContentLength = int64(len(body))
		resp.Header.Set("Content-Length", strconv.Itoa(len(body)))
		return nil
	}
	srv := httptest.NewServer(proxy)
	r.t.Cleanup(srv.Close)
	r.base = srv.URL + u.Path
	return on
}

// A server that answers the Provenance's create, conditional on its tag,
// 200 (an existing match) without the resource or its location gives
// nothing to check that the match is this write's Provenance: on a server
// that ignores _tag it may be any other. The write is not counted as done:
// it goes to the dead letters saying so, and once the server answers as
// R4 has it, the retried letter writes the Provenance, the values as they
// landed.
func TestProvenanceMatchThatCannotBeCheckedIsBuried(t *testing.T) {
	other := []byte(`{"resourceType":"Provenance","recorded":"2020-01-01T00:00:00Z","target":[{"reference":"Observation/other"}],"agent":[{"who":{"display":"another system"}}]}`)
	for _, tc := range []struct {
		name       string
		maxEntries int
	}{
		{"one transaction", 0},
		{"split, the Provenance on its own", 2},
	} {
		t.Run(tc.name, func(t *testing.T) {
			ctx := context.Background()
			r := newWriteRig(t, tc.maxEntries)
			unnamed := unnamedProvenances(r)
			if _, err := r.fake.Put(other); err != nil {
				t.Fatal(err)
			}
			r.fake.Ignore("Provenance", "_tag")
			r.open()
			r.ingest(append(r.inputs, r.gas(1, 44))...)
			r.eng.FlushNow(ctx)
			if h := r.health(); h.Stats.OutboxDepth != 0 || h.Stats.DeadLetters != 1 {
				t.Fatalf("after one attempt: %d writes in the outbox, %d dead letters; want the write buried", h.Stats.OutboxDepth, h.Stats.DeadLetters)
			}
			for _, reason := range r.deadLetters() {
				for _, want := range []string{"cannot be checked to be this write's Provenance", "neither the resource nor its location", "the values were written without their Provenance"} {
					if !strings.Contains(reason, want) {
						t.Errorf("dead letter reason %q does not say %q", reason, want)
					}
				}
			}
			landed := r.values()

			r.fake.ClearFaults() // the operator fixes the server
			unnamed.Store(false)
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
			for series, vs := range r.values() {
				if vs[0].version != landed[series][0].version {
					t.Errorf("series %s: version %s after the retry, want %s, as it landed", series, vs[0].version, landed[series][0].version)
				}
			}
			if got := r.activities(); got["CREATE"] != 1 || len(r.provenances()) != 2 {
				t.Errorf("after the retry the server holds Provenances %v, want one CREATE and the other system's", got)
			}
		})
	}
}
