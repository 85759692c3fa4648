package fhirtest_test

import (
	"encoding/json"
	"fmt"
	"net/http"
	"os"
	"strings"
	"testing"
	"time"

	"github.com/deadspace-fhir/deadspace/fhir/fhirtest"
)

func TestMain(m *testing.M) {
	code := m.Run()
	fhirtest.StopShared()
	os.Exit(code)
}

// uniq makes identifiers unique per call, because the shared peer keeps its data across tests
// and across -count repetitions.
func uniq(name string) string {
	return fmt.Sprintf("%s-%d", name, time.Now().UnixNano())
}

// obs builds a minimal Observation. 2019-8 is LOINC "Carbon dioxide [Partial pressure] in
// Arterial blood" (from memory; only used as a search key here).
func obs(identifier string) []byte {
	return fmt.Appendf(nil, `{"resourceType":"Observation","status":"final",
"identifier":[{"system":"urn:fhirtest","value":%q}],
"code":{"coding":[{"system":"http://loinc.org","code":"2019-8"}]},
"valueQuantity":{"value":40.0,"unit":"mm[Hg]","system":"http://unitsofmeasure.org","code":"mm[Hg]"}}`, identifier)
}

func TestCreateSearchAndCounts(t *testing.T) {
	s := fhirtest.StartShared(t)
	s.Reset()
	ident := uniq("count")
	id, vid := s.Create(t, obs(ident))
	if id == "" || vid == "" {
		t.Fatalf("Create gave id %q version %q", id, vid)
	}
	got := s.Search(t, "Observation?identifier=urn:fhirtest|"+ident)
	if len(got) != 1 {
		t.Fatalf("search found %d resources, want 1", len(got))
	}
	c := s.Counts()
	if c.Requests["POST create"] != 1 || c.Requests["GET search"] != 1 || c.Total() != 2 {
		t.Errorf("counts = %+v, want one create and one search", c)
	}
}

func TestFaultsDownUp(t *testing.T) {
	s := fhirtest.StartShared(t)
	cases := []struct {
		name       string
		setup      func()
		wantStatus []int
		wantRA     string
	}{
		{"429 twice then OK", func() { s.Fail(2, 429, 7) }, []int{429, 429, 200}, "7"},
		{"503 without Retry-After", func() { s.Fail(1, 503, -1) }, []int{503, 200}, ""},
		{"unavailable until up", func() { s.Unavailable() }, []int{503, 503}, ""},
	}
	for _, tc := range cases {
		t.Run(tc.name, func(t *testing.T) {
			s.Reset()
			tc.setup()
			for i, want := range tc.wantStatus {
				status, h, body := s.Do(t, http.MethodGet, "metadata", nil, nil)
				if status != want {
					t.Fatalf("request %d: HTTP %d, want %d", i, status, want)
				}
				if want != 200 {
					if ra := h.Get("Retry-After"); ra != tc.wantRA {
						t.Errorf("request %d: Retry-After %q, want %q", i, ra, tc.wantRA)
					}
					if !strings.Contains(string(body), `"OperationOutcome"`) {
						t.Errorf("request %d: body is not an OperationOutcome: %s", i, body)
					}
				}
			}
		})
	}
	t.Run("down closes connections", func(t *testing.T) {
		s.Reset()
		s.Down()
		req, _ := http.NewRequest(http.MethodGet, s.BaseURL+"/metadata", nil)
		if resp, err := http.DefaultClient.Do(req); err == nil {
			resp.Body.Close()
			t.Fatalf("down peer answered HTTP %d", resp.StatusCode)
		}
		s.Up()
		if status, _, _ := s.Do(t, http.MethodGet, "metadata", nil, nil); status != 200 {
			t.Fatalf("after Up: HTTP %d", status)
		}
		if c := s.Counts(); c.Dropped < 1 {
			t.Errorf("dropped = %d, want at least 1", c.Dropped)
		}
	})
}

func TestHTTPDateRetryAfter(t *testing.T) {
	s := fhirtest.StartShared(t)
	s.Inject(fhirtest.Fault{Status: 503, Count: 1, RetryAfter: 30, HTTPDate: true})
	_, h, _ := s.Do(t, http.MethodGet, "metadata", nil, nil)
	if _, err := http.ParseTime(h.Get("Retry-After")); err != nil {
		t.Fatalf("Retry-After %q is not an HTTP-date: %v", h.Get("Retry-After"), err)
	}
}

func TestErrorsAreOperationOutcomes(t *testing.T) {
	s := fhirtest.StartShared(t)
	cases := []struct {
		name, method, path string
		body               []byte
		header             http.Header
		want               int
	}{
		{"unknown route outside base", http.MethodGet, strings.TrimSuffix(s.BaseURL, "/fhir") + "/nowhere", nil, nil, 404},
		{"missing resource", http.MethodGet, "Observation/does-not-exist", nil, nil, 404},
		{"body not JSON", http.MethodPost, "Observation", []byte("{not json"), nil, 400},
		{"text body", http.MethodPost, "Observation", []byte("x"), http.Header{"Content-Type": {"text/plain"}}, 415},
	}
	for _, tc := range cases {
		t.Run(tc.name, func(t *testing.T) {
			var status int
			var body []byte
			if tc.header != nil {
				req, _ := http.NewRequest(tc.method, s.BaseURL+"/"+tc.path, strings.NewReader(string(tc.body)))
				for k, v := range tc.header {
					req.Header[k] = v
				}
				resp, err := http.DefaultClient.Do(req)
				if err != nil {
					t.Fatal(err)
				}
				defer resp.Body.Close()
				status = resp.StatusCode
				var oo json.RawMessage
				_ = json.NewDecoder(resp.Body).Decode(&oo)
				body = oo
			} else {
				status, _, body = s.Do(t, tc.method, tc.path, tc.body, nil)
			}
			if status != tc.want {
				t.Fatalf("HTTP %d, want %d: %s", status, tc.want, body)
			}
			if !strings.Contains(string(body), `"resourceType":"OperationOutcome"`) {
				t.Errorf("body is not an OperationOutcome: %s", body)
			}
		})
	}
}

// TestPeerQuirks pins the behaviour the package comment lists, so a Medplum upgrade that
// changes it fails here instead of confusing other tests. Each expectation is the peer's
// measured behaviour, not what R4 asks for.
func TestPeerQuirks(t *testing.T) {
	s := fhirtest.StartShared(t)

	t.Run("unquoted If-Match is ignored", func(t *testing.T) {
		id, v1 := s.Create(t, obs(uniq("quirk-ifmatch")))
		_, _, cur := s.Do(t, http.MethodGet, "Observation/"+id, nil, nil)
		// First update moves the resource past v1.
		if st, _, b := s.Do(t, http.MethodPut, "Observation/"+id, cur, http.Header{"If-Match": {`W/"` + v1 + `"`}}); st != 200 {
			t.Fatalf("quoted If-Match with current version: HTTP %d %s", st, b)
		}
		if st, _, _ := s.Do(t, http.MethodPut, "Observation/"+id, cur, http.Header{"If-Match": {`W/"` + v1 + `"`}}); st != 412 {
			t.Fatalf("quoted stale If-Match: HTTP %d, want 412", st)
		}
		if st, _, _ := s.Do(t, http.MethodPut, "Observation/"+id, cur, http.Header{"If-Match": {v1}}); st != 200 {
			t.Fatalf("unquoted stale If-Match: HTTP %d, the peer used to ignore it (200)", st)
		}
	})

	t.Run("If-None-Exist with unknown parameter creates", func(t *testing.T) {
		ident := uniq("quirk-ine")
		s.Create(t, obs(ident))
		st, _, _ := s.Do(t, http.MethodPost, "Observation", obs(ident), http.Header{"If-None-Exist": {"no-such-param=1"}})
		if st != 201 {
			t.Fatalf("HTTP %d, the peer used to create (201)", st)
		}
	})

	t.Run("PUT to a new id creates with 200", func(t *testing.T) {
		id := uniq("fhirtest-new")
		body := []byte(`{"resourceType":"Device","id":"` + id + `","status":"active"}`)
		if st, _, b := s.Do(t, http.MethodPut, "Device/"+id, body, nil); st != 200 {
			t.Fatalf("HTTP %d %s, the peer used to answer 200", st, b)
		}
	})

	t.Run("value-quantity search matches nothing", func(t *testing.T) {
		ident := uniq("quirk-vq")
		s.Create(t, obs(ident))
		if got := s.Search(t, "Observation?identifier=urn:fhirtest|"+ident); len(got) != 1 {
			t.Fatalf("identifier alone found %d, want 1", len(got))
		}
		got := s.Search(t, "Observation?identifier=urn:fhirtest|"+ident+"&value-quantity=gt39")
		if len(got) != 0 {
			t.Fatalf("found %d, the peer used to find none", len(got))
		}
	})

	t.Run("history order flips on every call", func(t *testing.T) {
		id, _ := s.Create(t, obs(uniq("quirk-history")))
		_, _, cur := s.Do(t, http.MethodGet, "Observation/"+id, nil, nil)
		amended := strings.Replace(string(cur), `"status":"final"`, `"status":"amended"`, 1)
		if st, _, b := s.Do(t, http.MethodPut, "Observation/"+id, []byte(amended), nil); st != 200 {
			t.Fatalf("update: HTTP %d %s", st, b)
		}
		first := historyStatuses(t, s, id)
		second := historyStatuses(t, s, id)
		if len(first) != 2 || len(second) != 2 || first[0] == second[0] {
			t.Fatalf("history statuses %v then %v; the peer used to alternate the order", first, second)
		}
	})

	t.Run("search pages carry next links from the wrapper", func(t *testing.T) {
		p := uniq("quirk-page")
		for i := range 3 {
			s.Create(t, obs(fmt.Sprintf("%s-%d", p, i)))
		}
		q := fmt.Sprintf("Observation?identifier=urn:fhirtest|%[1]s-0,urn:fhirtest|%[1]s-1,urn:fhirtest|%[1]s-2&_count=2", p)
		_, _, body := s.Do(t, http.MethodGet, q, nil, nil)
		if !strings.Contains(string(body), `"relation":"next"`) {
			t.Fatalf("first page of 3 with _count=2 has no next link: %s", body)
		}
		all := s.Search(t, q)
		if len(all) != 3 {
			t.Fatalf("following next links found %d, want 3", len(all))
		}
	})
}

func historyStatuses(t *testing.T, s *fhirtest.Server, id string) []string {
	t.Helper()
	st, _, body := s.Do(t, http.MethodGet, "Observation/"+id+"/_history", nil, nil)
	if st != 200 {
		t.Fatalf("history: HTTP %d %s", st, body)
	}
	var b struct {
		Entry []struct {
			Resource struct {
				Status string `json:"status"`
			} `json:"resource"`
		} `json:"entry"`
	}
	if err := json.Unmarshal(body, &b); err != nil {
		t.Fatal(err)
	}
	var out []string
	for _, e := range b.Entry {
		out = append(out, e.Resource.Status)
	}
	return out
}

func TestStartDedicated(t *testing.T) {
	s := fhirtest.Start(t)
	if !strings.HasPrefix(s.BaseURL, "http://127.0.0.1:") || !strings.HasSuffix(s.BaseURL, "/fhir") {
		t.Fatalf("BaseURL %q is not a loopback /fhir base", s.BaseURL)
	}
	s.Create(t, obs("dedicated"))
	if got := s.Search(t, "Observation?identifier=urn:fhirtest|dedicated"); len(got) != 1 {
		t.Fatalf("dedicated peer found %d, want 1", len(got))
	}
	s.ResetData()
	if got := s.Search(t, "Observation?identifier=urn:fhirtest|dedicated"); len(got) != 0 {
		t.Fatalf("ResetData left %d resources", len(got))
	}
}
