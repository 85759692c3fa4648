package client_test

// Integration tests against an independent FHIR server: @medplum/fhir-router 5.2.13 with its
// MemoryRepository, run by package fhirtest. They skip under -short or without node.

import (
	"context"
	"encoding/json"
	"errors"
	"fmt"
	"net/url"
	"os"
	"slices"
	"strings"
	"testing"
	"time"

	"github.com/deadspace-fhir/deadspace/fhir/client"
	"github.com/deadspace-fhir/deadspace/fhir/fhirtest"
)

func TestMain(m *testing.M) {
	code := m.Run()
	fhirtest.StopShared()
	os.Exit(code)
}

// uniq makes identifiers unique per run, because the shared peer keeps its data across tests
// and across -count repetitions.
func uniq(name string) string {
	return fmt.Sprintf("%s-%d", name, time.Now().UnixNano())
}

func peerClient(t *testing.T, s *fhirtest.Server) (*client.Client, *sleeper) {
	t.Helper()
	return newClient(t, s.BaseURL, nil)
}

// Codes used only as search keys: LOINC 2019-8 is arterial pCO2 and 19889-5 end-tidal CO2
// (from memory, not checked at loinc.org).
func observation(identifier, loinc string, status string) []byte {
	return fmt.Appendf(nil, `{"resourceType":"Observation","status":%q,
"identifier":[{"system":"urn:client-peer-test","value":%q}],
"code":{"coding":[{"system":"http://loinc.org","code":%q}]},
"subject":{"reference":"Patient/peer-test"},
"effectiveDateTime":"2025-03-01T10:15:00Z",
"valueQuantity":{"value":40,"unit":"mm[Hg]","system":"http://unitsofmeasure.org","code":"mm[Hg]"}}`, status, identifier, loinc)
}

func TestPeerCreateReadVRead(t *testing.T) {
	s := fhirtest.StartShared(t)
	c, _ := peerClient(t, s)
	ctx := context.Background()

	ident := uniq("crv")
	_, created, err := c.Create(ctx, "Observation", observation(ident, "2019-8", "final"))
	if err != nil {
		t.Fatal(err)
	}
	if created.Status != 201 || created.ID == "" || created.VersionID == "" || created.ETag != `W/"`+created.VersionID+`"` {
		t.Fatalf("create meta %+v", created)
	}
	body, m, err := c.Read(ctx, "Observation", created.ID)
	if err != nil {
		t.Fatal(err)
	}
	if m.ID != created.ID || m.VersionID != created.VersionID || !strings.Contains(string(body), ident) {
		t.Fatalf("read meta %+v", m)
	}

	amended := strings.Replace(string(body), `"status":"final"`, `"status":"amended"`, 1)
	_, updated, err := c.Update(ctx, "Observation", created.ID, []byte(amended), created.VersionID)
	if err != nil {
		t.Fatal(err)
	}
	if updated.VersionID == created.VersionID {
		t.Fatalf("update kept version %s", updated.VersionID)
	}
	// R4 http.html#concurrency: a stale If-Match gives 412.
	_, _, err = c.Update(ctx, "Observation", created.ID, []byte(amended), created.VersionID)
	if !errors.Is(err, client.ErrPreconditionFailed) {
		t.Fatalf("stale If-Match: %v, want 412", err)
	}

	old, vm, err := c.VRead(ctx, "Observation", created.ID, created.VersionID)
	if err != nil {
		t.Fatal(err)
	}
	if vm.VersionID != created.VersionID || !strings.Contains(string(old), `"status":"final"`) {
		t.Fatalf("vread gave %+v %s", vm, old)
	}

	_, _, err = c.Read(ctx, "Observation", "no-such-id")
	var fe *client.Error
	if !errors.Is(err, client.ErrNotFound) || !errors.As(err, &fe) || fe.Outcome == "" {
		t.Fatalf("missing read: %v", err)
	}
	_, _, err = c.VRead(ctx, "Observation", created.ID, "no-such-version")
	if !errors.Is(err, client.ErrNotFound) {
		t.Fatalf("missing vread: %v", err)
	}
}

func TestPeerConditionalCreate(t *testing.T) {
	s := fhirtest.StartShared(t)
	c, _ := peerClient(t, s)
	ctx := context.Background()
	ident := uniq("cc")
	cond := url.Values{"identifier": {"urn:client-peer-test|" + ident}}
	_, first, err := c.ConditionalCreate(ctx, "Observation", observation(ident, "2019-8", "final"), cond)
	if err != nil {
		t.Fatal(err)
	}
	_, second, err := c.ConditionalCreate(ctx, "Observation", observation(ident, "2019-8", "final"), cond)
	if err != nil {
		t.Fatal(err)
	}
	// R4 http.html#ccreate: no match creates (201), one match returns it (200).
	if first.Status != 201 || second.Status != 200 || second.ID != first.ID {
		t.Fatalf("first %+v second %+v", first, second)
	}
	// Two matches give 412.
	if _, _, err := c.Create(ctx, "Observation", observation(ident, "2019-8", "final")); err != nil {
		t.Fatal(err)
	}
	_, _, err = c.ConditionalCreate(ctx, "Observation", observation(ident, "2019-8", "final"), cond)
	if !errors.Is(err, client.ErrPreconditionFailed) {
		t.Fatalf("two matches: %v, want 412", err)
	}
}

// The polling cursor the service will use: _lastUpdated=ge(T) (ge, so equal stamps are not
// lost), code as system|code (R4 search.html#token), following next links. _count=2 makes the
// peer page.
func TestPeerSearchByCodeAndLastUpdated(t *testing.T) {
	s := fhirtest.StartShared(t)
	c, _ := peerClient(t, s)
	ctx := context.Background()

	prefix := uniq("cursor") + "-"
	_, before, err := c.Create(ctx, "Observation", observation(prefix+"old", "2019-8", "final"))
	if err != nil {
		t.Fatal(err)
	}
	// The peer stamps lastUpdated in milliseconds; step past the first stamp so "ge cursor"
	// must exclude it.
	cursor := before.LastUpdated.Add(time.Millisecond)
	for !time.Now().After(cursor) {
		time.Sleep(time.Millisecond)
	}
	var want []string
	for i := range 3 {
		_, m, err := c.Create(ctx, "Observation", observation(fmt.Sprintf("%s%d", prefix, i), "2019-8", "final"))
		if err != nil {
			t.Fatal(err)
		}
		want = append(want, m.ID)
	}
	if _, _, err := c.Create(ctx, "Observation", observation(prefix+"other-code", "19889-5", "final")); err != nil {
		t.Fatal(err)
	}

	search := func(t *testing.T, since time.Time) []string {
		t.Helper()
		var ids []string
		q := url.Values{
			"code":         {"http://loinc.org|2019-8"},
			"subject":      {"Patient/peer-test"},
			"_lastUpdated": {"ge" + since.UTC().Format("2006-01-02T15:04:05.000Z07:00")},
			"_count":       {"2"},
		}
		err := c.Search(ctx, "Observation", q, func(e json.RawMessage) error {
			var v struct {
				Resource struct {
					ID         string `json:"id"`
					Identifier []struct {
						Value string `json:"value"`
					} `json:"identifier"`
				} `json:"resource"`
			}
			if err := json.Unmarshal(e, &v); err != nil {
				return err
			}
			if len(v.Resource.Identifier) == 1 && strings.HasPrefix(v.Resource.Identifier[0].Value, prefix) {
				ids = append(ids, v.Resource.ID)
			}
			return nil
		})
		if err != nil {
			t.Fatal(err)
		}
		slices.Sort(ids)
		return ids
	}
	slices.Sort(want)
	if got := search(t, cursor); !slices.Equal(got, want) {
		t.Errorf("ge cursor found %v, want %v", got, want)
	}
	if got := search(t, before.LastUpdated); len(got) != 4 {
		t.Errorf("ge the first stamp found %d, want 4 (ge includes equality)", len(got))
	}
	if got := search(t, time.Now().Add(time.Hour)); len(got) != 0 {
		t.Errorf("ge the future found %v", got)
	}
	if n := s.Counts().Requests["GET search"]; n < 5 {
		t.Errorf("peer saw %d searches; with _count=2 the searches should have paged", n)
	}
}

// The service's write pattern: a transaction with a conditional Observation create and a
// Provenance pointing at it through urn:uuid (R4 http.html#transaction: urn:uuid references
// are rewritten to the assigned or matched resource).
func TestPeerTransactionReplay(t *testing.T) {
	s := fhirtest.StartShared(t)
	c, _ := peerClient(t, s)
	ctx := context.Background()
	idValue := uniq("sha256-peer-replay")
	bundle := []byte(`{"resourceType":"Bundle","type":"transaction","entry":[
 {"fullUrl":"urn:uuid:1b6e0c1e-0000-4000-8000-000000000001",
  "resource":{"resourceType":"Observation","status":"final",
   "identifier":[{"system":"https://svc.example/derived-obs","value":"` + idValue + `"}],
   "code":{"text":"Arterial-end-tidal CO2 difference"},"subject":{"reference":"Patient/peer-test"}},
  "request":{"method":"POST","url":"Observation","ifNoneExist":"identifier=https://svc.example/derived-obs|` + idValue + `"}},
 {"fullUrl":"urn:uuid:1b6e0c1e-0000-4000-8000-000000000002",
  "resource":{"resourceType":"Provenance","target":[{"reference":"urn:uuid:1b6e0c1e-0000-4000-8000-000000000001"}],
   "recorded":"2025-03-01T10:15:07Z","agent":[{"who":{"reference":"Device/derive-svc"}}]},
  "request":{"method":"POST","url":"Provenance"}}]}`)

	first, err := c.Transaction(ctx, bundle)
	if err != nil {
		t.Fatal(err)
	}
	second, err := c.Transaction(ctx, bundle)
	if err != nil {
		t.Fatal(err)
	}
	if first.Type != "transaction-response" || len(first.Entries) != 2 || first.Err() != nil {
		t.Fatalf("first: %+v", first)
	}
	// R4 http.html#ccreate inside a transaction: the first run creates (201), the replay finds
	// the one match (200) and references resolve to it.
	obs1, obs2 := first.Entries[0], second.Entries[0]
	if obs1.Status != 201 || obs2.Status != 200 || obs1.ID == "" || obs2.ID != obs1.ID || obs1.ResourceType != "Observation" {
		t.Fatalf("observation entries %+v / %+v", obs1.Meta, obs2.Meta)
	}
	if got := s.Search(t, "Observation?identifier=https://svc.example/derived-obs|"+idValue); len(got) != 1 {
		t.Fatalf("%d Observations after replay, want 1", len(got))
	}
	// The Provenance POST has no condition, so R4 semantics (and the peer) store it again.
	// Replaying the bundle therefore duplicates the Provenance; the writer must guard it.
	if second.Entries[1].Status != 201 || second.Entries[1].ID == first.Entries[1].ID {
		t.Fatalf("provenance entries %+v / %+v", first.Entries[1].Meta, second.Entries[1].Meta)
	}
	provs := s.Search(t, "Provenance?target=Observation/"+obs1.ID)
	if len(provs) != 2 {
		t.Fatalf("%d Provenances for the Observation, want the measured 2", len(provs))
	}
	for _, p := range provs {
		if !strings.Contains(string(p), `"reference":"Observation/`+obs1.ID+`"`) {
			t.Errorf("Provenance target not rewritten to the Observation: %s", p)
		}
	}
}

func TestPeerBatchReportsEntryFailures(t *testing.T) {
	s := fhirtest.StartShared(t)
	c, _ := peerClient(t, s)
	bundle := []byte(`{"resourceType":"Bundle","type":"batch","entry":[
 {"resource":{"resourceType":"Device","status":"active"},"request":{"method":"POST","url":"Device"}},
 {"request":{"method":"GET","url":"Observation/no-such-id"}}]}`)
	tr, err := c.Transaction(context.Background(), bundle)
	if err != nil {
		t.Fatal(err)
	}
	if tr.Type != "batch-response" || tr.Entries[0].Status != 201 || tr.Entries[1].Status != 404 {
		t.Fatalf("batch entries %+v", tr.Entries)
	}
	if err := tr.Err(); !errors.Is(err, client.ErrNotFound) {
		t.Fatalf("Err() = %v, want the 404 entry", err)
	}
}

func TestPeerThrottledThenOK(t *testing.T) {
	s := fhirtest.StartShared(t)
	c, sl := peerClient(t, s)
	_, created, err := c.Create(context.Background(), "Observation", observation(uniq("throttle"), "2019-8", "final"))
	if err != nil {
		t.Fatal(err)
	}
	s.Reset()
	s.Fail(1, 429, 2)
	if _, _, err := c.Read(context.Background(), "Observation", created.ID); err != nil {
		t.Fatalf("read after one 429: %v", err)
	}
	if got := sl.Waits(); !slices.Equal(got, []time.Duration{2 * time.Second}) {
		t.Errorf("waits %v, want the peer's Retry-After of 2s", got)
	}
	if cnt := s.Counts(); cnt.Requests["GET read"] != 2 || cnt.Injected != 1 {
		t.Errorf("peer counts %+v, want 2 reads of which 1 injected", cnt)
	}
}

func TestPeerOutage(t *testing.T) {
	s := fhirtest.StartShared(t)
	c, sl := peerClient(t, s)
	ctx := context.Background()
	s.Down()
	_, _, err := c.Read(ctx, "Observation", "whatever")
	if !errors.Is(err, client.ErrNetwork) || !client.IsRetryable(err) {
		t.Fatalf("read while down: %v, want a retryable network error", err)
	}
	if len(sl.Waits()) != 3 {
		t.Errorf("waits %v, want 3 retries", sl.Waits())
	}
	s.Unavailable()
	_, _, err = c.Read(ctx, "Observation", "whatever")
	if !errors.Is(err, client.ErrUnavailable) {
		t.Fatalf("read while unavailable: %v, want 503", err)
	}
	s.Up()
	_, _, err = c.Read(ctx, "Observation", "whatever")
	if !errors.Is(err, client.ErrNotFound) {
		t.Fatalf("read after up: %v, want 404", err)
	}
}
