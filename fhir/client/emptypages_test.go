package client_test

import (
	"context"
	"encoding/json"
	"errors"
	"fmt"
	"net/http"
	"net/http/httptest"
	"strconv"
	"sync/atomic"
	"testing"

	"github.com/deadspace-fhir/deadspace/fhir/client"
)

// A server that answers page after page without entries, each with a new
// next link (a cursor that never moves), ends the search with
// ErrEmptyPages after MaxEmptyPages of them rather than being read for
// ever; empty pages between pages with entries are followed as any other.
func TestSearchBoundsEmptyPages(t *testing.T) {
	entry := `{"fullUrl":"http://x/fhir/Observation/o%d","resource":{"resourceType":"Observation","id":"o%d","status":"final","code":{"text":"x"}}}`
	cases := []struct {
		name string
		// page returns page n's entries (a JSON array's contents) and
		// whether it links to a next page.
		page    func(n int) (string, bool)
		entries int
		err     error
	}{
		{"empty pages without end", func(n int) (string, bool) { return "", true }, 0, client.ErrEmptyPages},
		{"entries, then empty pages without end", func(n int) (string, bool) {
			if n < 3 {
				return fmt.Sprintf(entry, n, n), true
			}
			return "", true
		}, 3, client.ErrEmptyPages},
		{"a few empty pages between entries", func(n int) (string, bool) {
			if n%(client.MaxEmptyPages-1) == 0 {
				return fmt.Sprintf(entry, n, n), n < 5*client.MaxEmptyPages
			}
			return "", true
		}, 7, nil},
		{"empty pages up to the bound, then the end", func(n int) (string, bool) { return "", n < client.MaxEmptyPages-1 }, 0, nil},
	}
	for _, tc := range cases {
		t.Run(tc.name, func(t *testing.T) {
			var pages atomic.Int32
			srv := httptest.NewServer(http.HandlerFunc(func(w http.ResponseWriter, r *http.Request) {
				pages.Add(1)
				n, _ := strconv.Atoi(r.URL.Query().Get("page"))
				entries, more := tc.page(n)
				link := ""
				if more {
					link = fmt.Sprintf(`,"link":[{"relation":"next","url":"/fhir/Observation?page=%d"}]`, n+1)
				}
				w.Header().Set("Content-Type", "application/fhir+json")
				fmt.Fprintf(w, `{"resourceType":"Bundle","type":"searchset","entry":[%s]%s}`, entries, link)
			}))
			defer srv.Close()
			c, _ := newClient(t, srv.URL+"/fhir", nil)
			got := 0
			err := c.Search(context.Background(), "Observation", nil, func(json.RawMessage) error { got++; return nil })
			if tc.err == nil && err != nil || tc.err != nil && !errors.Is(err, tc.err) {
				t.Fatalf("error %v, want %v", err, tc.err)
			}
			if got != tc.entries {
				t.Errorf("%d entries, want %d", got, tc.entries)
			}
			if n := pages.Load(); n > 6*client.MaxEmptyPages {
				t.Errorf("%d pages read", n)
			}
		})
	}
}
