package fakefhir_test

import (
	"context"
	"encoding/json"
	"errors"
	"fmt"
	"net/http"
	"net/url"
	"strconv"
	"strings"
	"testing"
	"time"

	"github.com/deadspace-fhir/deadspace/fhir/client"
	"github.com/deadspace-fhir/deadspace/fhir/fhirtest/fakefhir"
)

// newClient talks to the fake with the project's own client; retries wait
// nothing, so fault tests are fast.
func newClient(t *testing.T, s *fakefhir.Server, waits *[]time.Duration) *client.Client {
	t.Helper()
	c, err := client.New(client.Config{
		BaseURL: s.BaseURL, MaxRetries: 3,
		Sleep: func(_ context.Context, d time.Duration) error {
			if waits != nil {
				*waits = append(*waits, d)
			}
			return nil
		},
	})
	if err != nil {
		t.Fatal(err)
	}
	return c
}

func obs(code, subject string, value float64) []byte {
	return []byte(fmt.Sprintf(`{"resourceType":"Observation","status":"final","code":{"coding":[{"system":"http://loinc.org","code":"%s"}]},"subject":{"reference":"%s"},"valueQuantity":{"value":%g}}`, code, subject, value))
}

func TestCreateReadVReadUpdateWithIfMatch(t *testing.T) {
	s := fakefhir.Start(t)
	c := newClient(t, s, nil)
	ctx := context.Background()
	body, m, err := c.Create(ctx, "Observation", obs("2019-8", "Patient/p1", 44))
	if err != nil || m.Status != http.StatusCreated || m.ID == "" || m.VersionID != "1" {
		t.Fatalf("create: %v %+v", err, m)
	}
	var r map[string]any
	_ = json.Unmarshal(body, &r)
	r["valueQuantity"] = map[string]any{"value": 45}
	v2, _ := json.Marshal(r)
	if _, m2, err := c.Update(ctx, "Observation", m.ID, v2, "1"); err != nil || m2.VersionID != "2" {
		t.Fatalf("update on the current version: %v %+v", err, m2)
	}
	// A late write that saw version 1 must not overwrite version 2.
	if _, _, err := c.Update(ctx, "Observation", m.ID, v2, "1"); !errors.Is(err, client.ErrPreconditionFailed) {
		t.Fatalf("update on a stale version: %v, want precondition failed", err)
	}
	cur, m3, err := c.Read(ctx, "Observation", m.ID)
	if err != nil || m3.VersionID != "2" || !strings.Contains(string(cur), `"value":45`) {
		t.Fatalf("read: %v %+v %s", err, m3, cur)
	}
	old, _, err := c.VRead(ctx, "Observation", m.ID, "1")
	if err != nil || !strings.Contains(string(old), `"value":44`) {
		t.Fatalf("vread 1: %v %s", err, old)
	}
	if _, _, err := c.Read(ctx, "Observation", "nope"); !errors.Is(err, client.ErrNotFound) {
		t.Fatalf("read of an unknown id: %v", err)
	}
	if n := len(s.History("Observation", m.ID)); n != 2 {
		t.Fatalf("%d versions, want 2", n)
	}
}

// A deleted resource answers 410 Gone to a read, is left out of searches,
// keeps its earlier versions for vread, and comes back with the next
// version when it is written again.
func TestDeleteThenReadSearchAndWriteAgain(t *testing.T) {
	s := fakefhir.Start(t)
	c := newClient(t, s, nil)
	ctx := context.Background()
	_, m, err := c.Create(ctx, "Observation", obs("2019-8", "Patient/p1", 44))
	if err != nil {
		t.Fatal(err)
	}
	req, err := http.NewRequest(http.MethodDelete, s.BaseURL+"/Observation/"+m.ID, nil)
	if err != nil {
		t.Fatal(err)
	}
	resp, err := http.DefaultClient.Do(req)
	if err != nil || resp.StatusCode != http.StatusNoContent {
		t.Fatalf("DELETE: %v %v", err, resp)
	}
	resp.Body.Close()
	if _, _, err := c.Read(ctx, "Observation", m.ID); !errors.Is(err, client.ErrGone) {
		t.Fatalf("read after the delete: %v, want 410 Gone", err)
	}
	if _, _, err := c.VRead(ctx, "Observation", m.ID, "1"); err != nil {
		t.Fatalf("vread of the version before the delete: %v", err)
	}
	if n := len(s.Current("Observation")); n != 0 {
		t.Fatalf("%d current Observations after the delete, want none", n)
	}
	if s.Delete("Observation", m.ID) {
		t.Error("a second delete found something to delete")
	}
	again, err := s.Put(append([]byte(`{"id":"`+m.ID+`",`), obs("2019-8", "Patient/p1", 46)[1:]...))
	if err != nil {
		t.Fatal(err)
	}
	if !strings.Contains(string(again), `"versionId":"3"`) {
		t.Errorf("written again as %s, want version 3 (after the deletion's version 2)", again)
	}
	if _, _, err := c.Read(ctx, "Observation", m.ID); err != nil {
		t.Errorf("read after it was written again: %v", err)
	}
}

func TestConditionalCreateFindsTheExistingResource(t *testing.T) {
	s := fakefhir.Start(t)
	c := newClient(t, s, nil)
	ctx := context.Background()
	dev := []byte(`{"resourceType":"Device","identifier":[{"system":"urn:x","value":"d1"}]}`)
	q := url.Values{"identifier": {"urn:x|d1"}}
	_, m1, err := c.ConditionalCreate(ctx, "Device", dev, q)
	if err != nil || m1.Status != http.StatusCreated {
		t.Fatalf("first: %v %+v", err, m1)
	}
	_, m2, err := c.ConditionalCreate(ctx, "Device", dev, q)
	if err != nil || m2.Status != http.StatusOK || m2.ID != m1.ID {
		t.Fatalf("second: %v %+v, want 200 with id %s", err, m2, m1.ID)
	}
	if _, _, err := c.ConditionalCreate(ctx, "Device", dev, url.Values{"nonsense": {"1"}}); !errors.Is(err, client.ErrBadRequest) {
		t.Fatalf("unknown parameter under handling=strict: %v, want 400", err)
	}
	if n := len(s.Current("Device")); n != 1 {
		t.Fatalf("%d devices, want 1", n)
	}
}

// A server that ignores a search parameter matches every resource of the
// type on a condition made of it alone: one other resource answers the
// conditional create 200 with that resource, two answer 412.
func TestIgnoredParameterMatchesEveryResource(t *testing.T) {
	dev := func(v string) []byte {
		return []byte(`{"resourceType":"Device","identifier":[{"system":"urn:x","value":"` + v + `"}]}`)
	}
	for _, tc := range []struct {
		name       string
		others     int
		wantStatus int
		wantErr    error
	}{
		{"no other Device: created", 0, http.StatusCreated, nil},
		{"one other Device: found instead", 1, http.StatusOK, nil},
		{"two other Devices: several match", 2, 0, client.ErrPreconditionFailed},
	} {
		t.Run(tc.name, func(t *testing.T) {
			s := fakefhir.Start(t)
			c := newClient(t, s, nil)
			for i := range tc.others {
				if _, err := s.Put(dev(fmt.Sprintf("other%d", i))); err != nil {
					t.Fatal(err)
				}
			}
			s.Ignore("Device", "identifier")
			_, m, err := c.ConditionalCreate(context.Background(), "Device", dev("mine"), url.Values{"identifier": {"urn:x|mine"}})
			if !errors.Is(err, tc.wantErr) || (tc.wantErr == nil && m.Status != tc.wantStatus) {
				t.Fatalf("conditional create: %v, status %d; want %v, status %d", err, m.Status, tc.wantErr, tc.wantStatus)
			}
			n := 0
			if err := c.Search(context.Background(), "Device", url.Values{"identifier": {"urn:x|nothing"}}, func(json.RawMessage) error { n++; return nil }); err != nil {
				t.Fatal(err)
			}
			if want := len(s.Current("Device")); n != want {
				t.Errorf("a search on the ignored parameter found %d Devices, want all %d", n, want)
			}
		})
	}
}

// A server that answers without resources still names what it created or
// matched: by Location and ETag for a create or update on its own, by
// response.location and etag for a Bundle's entries, whose references to
// urn:uuid fullUrls it still resolves; reads still return the resource.
func TestOmitResourcesAnswersWithLocationsOnly(t *testing.T) {
	s := fakefhir.Start(t)
	c := newClient(t, s, nil)
	ctx := context.Background()
	s.OmitResources()
	dev := []byte(`{"resourceType":"Device","identifier":[{"system":"urn:x","value":"d1"}]}`)
	q := url.Values{"identifier": {"urn:x|d1"}}
	for _, tc := range []struct {
		name       string
		wantStatus int
	}{
		{"created", http.StatusCreated},
		{"matched", http.StatusOK},
	} {
		t.Run("conditional create, "+tc.name, func(t *testing.T) {
			body, m, err := c.ConditionalCreate(ctx, "Device", dev, q)
			if err != nil || m.Status != tc.wantStatus || len(body) != 0 || m.ID == "" || m.VersionID != "1" || !strings.Contains(m.Location, "/Device/"+m.ID) {
				t.Fatalf("%v, %+v, body %q; want %d with no body, and the id and version from Location and ETag", err, m, body, tc.wantStatus)
			}
		})
	}
	_, m, err := c.Create(ctx, "Observation", obs("2019-8", "Patient/p1", 44))
	if err != nil {
		t.Fatal(err)
	}
	tx := fmt.Sprintf(`{"resourceType":"Bundle","type":"transaction","entry":[
	 {"fullUrl":"urn:uuid:0f0e0d0c-0000-4000-8000-000000000002","resource":{"resourceType":"Observation","status":"final"},"request":{"method":"POST","url":"Observation"}},
	 {"resource":{"resourceType":"Provenance","target":[{"reference":"urn:uuid:0f0e0d0c-0000-4000-8000-000000000002"}]},"request":{"method":"POST","url":"Provenance"}},
	 {"resource":{"resourceType":"Observation","id":"%s","status":"amended"},"request":{"method":"PUT","url":"Observation/%s"}},
	 {"request":{"method":"GET","url":"Observation/%s"}}]}`, m.ID, m.ID, m.ID)
	resp, err := c.Transaction(ctx, []byte(tx))
	if err != nil || len(resp.Entries) != 4 {
		t.Fatalf("transaction: %v %+v", err, resp)
	}
	for i, en := range resp.Entries[:3] {
		if en.Resource != nil || en.ID == "" || en.VersionID == "" {
			t.Errorf("entry %d: resource %s, id %q, version %q; want no resource, and the id and version from location and etag", i, en.Resource, en.ID, en.VersionID)
		}
	}
	if resp.Entries[3].Resource == nil {
		t.Error("the GET entry came back without its resource")
	}
	prov := s.Current("Provenance")
	if len(prov) != 1 || !strings.Contains(string(prov[0]), `"Observation/`+resp.Entries[0].ID+`"`) {
		t.Fatalf("the Provenance does not cite the created Observation: %s", prov)
	}
	if body, _, err := c.Read(ctx, "Provenance", resp.Entries[1].ID); err != nil || len(body) == 0 {
		t.Fatalf("read of the Provenance: %v, body %q", err, body)
	}
}

func TestSearchPagesByLastUpdatedAndCode(t *testing.T) {
	s := fakefhir.Start(t)
	c := newClient(t, s, nil)
	ctx := context.Background()
	for i := range 7 {
		if _, _, err := c.Create(ctx, "Observation", obs("2019-8", "Patient/p1", float64(40+i))); err != nil {
			t.Fatal(err)
		}
		if _, _, err := c.Create(ctx, "Observation", obs("8867-4", "Patient/p1", 80)); err != nil {
			t.Fatal(err)
		}
	}
	all := s.Current("Observation")
	var third struct{ Meta struct{ LastUpdated string } }
	_ = json.Unmarshal(all[4], &third)
	cases := []struct {
		name  string
		query url.Values
		want  int
	}{
		{"code over three pages", url.Values{"code": {"http://loinc.org|2019-8"}, "_count": {"3"}}, 7},
		{"either of two codes", url.Values{"code": {"2019-8,8867-4"}, "_count": {"4"}}, 14},
		{"since a time, inclusive", url.Values{"_lastUpdated": {"ge" + third.Meta.LastUpdated}, "_count": {"2"}}, 10},
		{"after a time", url.Values{"_lastUpdated": {"gt" + third.Meta.LastUpdated}}, 9},
		{"by subject", url.Values{"subject": {"Patient/p1"}, "code": {"8867-4"}}, 7},
	}
	for _, tc := range cases {
		t.Run(tc.name, func(t *testing.T) {
			before := s.Count(http.MethodGet, "Observation")
			var got []string
			err := c.Search(ctx, "Observation", tc.query, func(e json.RawMessage) error {
				got = append(got, string(e))
				return nil
			})
			if err != nil || len(got) != tc.want {
				t.Fatalf("search: %v, %d entries, want %d", err, len(got), tc.want)
			}
			count := fakefhir.DefaultPageSize
			if v := tc.query.Get("_count"); v != "" {
				count, _ = strconv.Atoi(v)
			}
			pages := max(1, (tc.want+count-1)/count)
			if got := s.Count(http.MethodGet, "Observation") - before; got != pages {
				t.Errorf("%d page requests, want %d (next links followed)", got, pages)
			}
		})
	}
}

func TestTransactionResolvesReferencesAndIsAllOrNothing(t *testing.T) {
	s := fakefhir.Start(t)
	c := newClient(t, s, nil)
	ctx := context.Background()
	existing, m, err := c.Create(ctx, "Observation", obs("2019-8", "Patient/p1", 44))
	if err != nil {
		t.Fatal(err)
	}
	_ = existing
	tx := fmt.Sprintf(`{"resourceType":"Bundle","type":"transaction","entry":[
	 {"fullUrl":"urn:uuid:0f0e0d0c-0000-4000-8000-000000000001","resource":{"resourceType":"Observation","status":"final","identifier":[{"system":"urn:d","value":"k1"}]},
	  "request":{"method":"POST","url":"Observation","ifNoneExist":"identifier=urn:d|k1"}},
	 {"resource":{"resourceType":"Provenance","target":[{"reference":"urn:uuid:0f0e0d0c-0000-4000-8000-000000000001"}]},"request":{"method":"POST","url":"Provenance"}},
	 {"resource":{"resourceType":"Observation","id":"%s","status":"amended"},"request":{"method":"PUT","url":"Observation/%s","ifMatch":"W/\"1\""}}]}`, m.ID, m.ID)
	resp, err := c.Transaction(ctx, []byte(tx))
	if err != nil || len(resp.Entries) != 3 {
		t.Fatalf("transaction: %v %+v", err, resp)
	}
	if resp.Entries[0].Status != 201 || resp.Entries[2].VersionID != "2" {
		t.Fatalf("entries: %+v", resp.Entries)
	}
	prov := s.Current("Provenance")
	if len(prov) != 1 || !strings.Contains(string(prov[0]), `"Observation/`+resp.Entries[0].ID+`"`) {
		t.Fatalf("the Provenance does not cite the created Observation: %s", prov)
	}
	// The same transaction again: the PUT's If-Match is stale, so nothing
	// of it is stored, not even the unconditional Provenance.
	if _, err := c.Transaction(ctx, []byte(tx)); !errors.Is(err, client.ErrPreconditionFailed) {
		t.Fatalf("stale transaction: %v, want 412", err)
	}
	if n := len(s.Current("Provenance")); n != 1 {
		t.Fatalf("%d Provenance after a failed transaction, want 1", n)
	}
}

func TestFaultsAreRetriedAndDroppedAnswersRecovered(t *testing.T) {
	s := fakefhir.Start(t)
	var waits []time.Duration
	c := newClient(t, s, &waits)
	ctx := context.Background()
	s.Fail(http.MethodGet, "Observation", http.StatusTooManyRequests, "7", 1)
	s.Fail(http.MethodGet, "Observation", http.StatusServiceUnavailable, "3", 1)
	err := c.Search(ctx, "Observation", url.Values{"code": {"x"}}, func(json.RawMessage) error { return nil })
	if err != nil {
		t.Fatalf("search after 429 and 503: %v", err)
	}
	if len(waits) != 2 || waits[0] != 7*time.Second || waits[1] != 3*time.Second {
		t.Fatalf("waits %v, want the server's Retry-After 7s then 3s", waits)
	}
	// The server stores the create, the answer is lost; the client's
	// retry of a conditional create finds it instead of storing it twice.
	s.Drop(http.MethodPost, "Device", 1)
	dev := []byte(`{"resourceType":"Device","identifier":[{"system":"urn:x","value":"d2"}]}`)
	_, m, err := c.ConditionalCreate(ctx, "Device", dev, url.Values{"identifier": {"urn:x|d2"}})
	if err != nil || m.Status != http.StatusOK {
		t.Fatalf("conditional create after a dropped answer: %v %+v, want 200 (found)", err, m)
	}
	if n := len(s.Current("Device")); n != 1 {
		t.Fatalf("%d devices, want 1", n)
	}
	if n := s.Count(http.MethodPost, "Device"); n != 2 {
		t.Fatalf("%d POSTs, want 2 (the dropped one and its retry)", n)
	}
}

// TestStalledAnswers: a Stall holds the request back. A client that waits
// longer gets the answer (a slow server); one whose deadline comes first
// gets none, and Close does not wait for the held request (a server that
// never answers).
func TestStalledAnswers(t *testing.T) {
	s := fakefhir.Start(t)
	c := newClient(t, s, nil)
	created, err := s.Put(obs("2019-8", "Patient/p", 44))
	if err != nil {
		t.Fatal(err)
	}
	var id struct{ ID string }
	_ = json.Unmarshal(created, &id)

	s.Stall(http.MethodGet, "Observation/"+id.ID, 200*time.Millisecond, 1)
	start := time.Now()
	if _, _, err := c.Read(context.Background(), "Observation", id.ID); err != nil {
		t.Fatalf("read of a slow answer: %v", err)
	}
	if d := time.Since(start); d < 200*time.Millisecond {
		t.Errorf("answered after %v, before the stall ended", d)
	}

	s.Stall(http.MethodGet, "Observation/"+id.ID, time.Hour, 0)
	ctx, cancel := context.WithTimeout(context.Background(), 300*time.Millisecond)
	defer cancel()
	_, _, err = c.Read(ctx, "Observation", id.ID)
	if !errors.Is(err, context.DeadlineExceeded) {
		t.Fatalf("read of a server that never answers: %v, want the deadline", err)
	}
	// A request held when the server closes ends unanswered, and Close
	// returns.
	go func() { _, _, _ = c.Read(context.Background(), "Observation", id.ID) }()
	for s.Count(http.MethodGet, "Observation/"+id.ID) < 3 {
		time.Sleep(5 * time.Millisecond)
	}
	closed := make(chan struct{})
	go func() { s.Close(); close(closed) }()
	select {
	case <-closed:
	case <-time.After(10 * time.Second):
		t.Fatal("Close waited for a held request")
	}
}
