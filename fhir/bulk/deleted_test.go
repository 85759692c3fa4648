package bulk

import (
	"encoding/json"
	"errors"
	"reflect"
	"strings"
	"testing"
	"time"

	"github.com/deadspace-fhir/deadspace/fhir/ref"
)

// The example deleted-file line of the Bulk Data Access IG 2.0.0
// ("Response - Complete Status", the deleted array).
const igDeletedLine = `{"resourceType": "Bundle", "id": "bundle-transaction", "meta": {"lastUpdated": "2020-04-27T02:56:00Z"}, "type": "transaction", "entry":[{"request": {"method": "DELETE", "url": "Patient/123"}}]}`

func TestParseDeletions(t *testing.T) {
	at := time.Date(2026, 3, 16, 6, 40, 0, 0, time.UTC)
	tests := []struct {
		name      string
		line      string
		want      []Deletion
		notBundle bool  // ErrNotDeletions
		entries   []int // the positions of the EntryErrors
		errHas    string
	}{
		{name: "the IG's example: one DELETE, no time", line: igDeletedLine,
			want: []Deletion{{Type: "Patient", ID: "123"}}},
		{name: "several entries, one with the time of the deletion",
			line: `{"resourceType":"Bundle","type":"transaction","entry":[` +
				`{"request":{"method":"DELETE","url":"Observation/gas-1"},"response":{"lastModified":"2026-03-16T07:40:00+01:00"}},` +
				`{"request":{"method":"DELETE","url":"Observation/gas-2"}}]}`,
			want: []Deletion{{Type: "Observation", ID: "gas-1", At: at}, {Type: "Observation", ID: "gas-2"}}},
		{name: "absolute and versioned url", line: `{"resourceType":"Bundle","type":"transaction","entry":[{"request":{"method":"DELETE","url":"https://ehr.example/fhir/r4/Observation/g7/_history/3"}}]}`,
			want: []Deletion{{Type: "Observation", ID: "g7"}}},
		{name: "conditional delete named by its fullUrl", line: `{"resourceType":"Bundle","type":"transaction","entry":[{"fullUrl":"https://ehr.example/fhir/Observation/g8","request":{"method":"DELETE","url":"Observation?identifier=lab|42"}}]}`,
			want: []Deletion{{Type: "Observation", ID: "g8"}}},
		{name: "a batch Bundle, method in lower case", line: `{"resourceType":"Bundle","type":"batch","entry":[{"request":{"method":"delete","url":"Observation/g9"}}]}`,
			want: []Deletion{{Type: "Observation", ID: "g9"}}},
		{name: "conditional delete without a fullUrl", line: `{"resourceType":"Bundle","type":"transaction","entry":[{"request":{"method":"DELETE","url":"Observation?identifier=lab|42"}},{"request":{"method":"DELETE","url":"Observation/ok"}}]}`,
			want: []Deletion{{Type: "Observation", ID: "ok"}}, entries: []int{0}, errHas: "names a resource"},
		{name: "a PUT among the deletes", line: `{"resourceType":"Bundle","type":"transaction","entry":[{"request":{"method":"DELETE","url":"Observation/a"}},{"request":{"method":"PUT","url":"Observation/b"},"resource":{"resourceType":"Observation","id":"b"}}]}`,
			want: []Deletion{{Type: "Observation", ID: "a"}}, entries: []int{1}, errHas: `"PUT", not DELETE`},
		{name: "an entry without a request", line: `{"resourceType":"Bundle","type":"transaction","entry":[{"fullUrl":"Observation/x"},{"request":{"method":"DELETE","url":"Observation/a"}}]}`,
			want: []Deletion{{Type: "Observation", ID: "a"}}, entries: []int{0}, errHas: "no request"},
		{name: "a time that is not an instant", line: `{"resourceType":"Bundle","type":"transaction","entry":[{"request":{"method":"DELETE","url":"Observation/secret-id-77"},"response":{"lastModified":"yesterday"}}]}`,
			entries: []int{0}, errHas: "lastModified"},
		{name: "not JSON", line: `{"resourceType":"Bundle",`, notBundle: true},
		{name: "a resource, not a Bundle", line: `{"resourceType":"Observation","id":"x"}`, notBundle: true},
		{name: "a searchset Bundle", line: `{"resourceType":"Bundle","type":"searchset","entry":[{"request":{"method":"DELETE","url":"Observation/x"}}]}`, notBundle: true},
		{name: "a transaction without entries", line: `{"resourceType":"Bundle","type":"transaction"}`, notBundle: true},
		{name: "a transaction of writes only", line: `{"resourceType":"Bundle","type":"transaction","entry":[{"request":{"method":"POST","url":"Observation"}}]}`, notBundle: true},
		{name: "entry is not a list", line: `{"resourceType":"Bundle","type":"transaction","entry":{"request":{"method":"DELETE","url":"Observation/x"}}}`, notBundle: true},
	}
	for _, tc := range tests {
		t.Run(tc.name, func(t *testing.T) {
			t.Parallel()
			got, err := ParseDeletions([]byte(tc.line))
			if tc.notBundle {
				if !errors.Is(err, ErrNotDeletions) || got != nil {
					t.Fatalf("got %v, %v; want nothing and ErrNotDeletions", got, err)
				}
				return
			}
			if errors.Is(err, ErrNotDeletions) {
				t.Fatalf("err = %v", err)
			}
			for i := range got {
				if !got[i].At.IsZero() {
					got[i].At = got[i].At.UTC()
				}
			}
			if !reflect.DeepEqual(got, tc.want) {
				t.Errorf("got %+v, want %+v", got, tc.want)
			}
			var positions []int
			for _, e := range entryErrors(err) {
				positions = append(positions, e.Entry)
			}
			if !reflect.DeepEqual(positions, tc.entries) {
				t.Errorf("entry errors at %v, want %v (err %v)", positions, tc.entries, err)
			}
			if err != nil && !strings.Contains(err.Error(), tc.errHas) {
				t.Errorf("err %q does not say %q", err, tc.errHas)
			}
			if err != nil && strings.Contains(err.Error(), "secret-id") {
				t.Errorf("err %q quotes the resource's id", err)
			}
		})
	}
}

// entryErrors unpacks the joined EntryErrors of err.
func entryErrors(err error) []*EntryError {
	if err == nil {
		return nil
	}
	var out []*EntryError
	if j, ok := err.(interface{ Unwrap() []error }); ok {
		for _, e := range j.Unwrap() {
			out = append(out, entryErrors(e)...)
		}
		return out
	}
	var ee *EntryError
	if errors.As(err, &ee) {
		out = append(out, ee)
	}
	return out
}

func FuzzParseDeletions(f *testing.F) {
	f.Add([]byte(igDeletedLine))
	f.Add([]byte(`{"resourceType":"Bundle","type":"transaction","entry":[{"request":{"method":"DELETE","url":"Observation/a"},"response":{"lastModified":"2026-03-16T07:40:00Z"}},{"request":{"method":"PUT","url":"Observation/b"}}]}`))
	f.Add([]byte(`{"resourceType":"Bundle","type":"batch","entry":[{"fullUrl":"http://x/fhir/Observation/c","request":{"method":"delete","url":"Observation?code=1"}},{}]}`))
	f.Fuzz(func(t *testing.T, line []byte) {
		got, err := ParseDeletions(line)
		if errors.Is(err, ErrNotDeletions) {
			if got != nil {
				t.Fatalf("deletions %v returned with %v", got, err)
			}
			return
		}
		for _, d := range got {
			if !ref.IsType(d.Type) || !ref.IsID(d.ID) {
				t.Fatalf("accepted %+v", d)
			}
			if _, perr := ref.Parse(d.Ref()); perr != nil {
				t.Fatalf("Ref %q does not parse: %v", d.Ref(), perr)
			}
		}
		// Every entry is either returned or reported, once.
		var w struct {
			Entry []json.RawMessage `json:"entry"`
		}
		if json.Unmarshal(line, &w) != nil {
			t.Fatalf("accepted a line encoding/json refuses")
		}
		bad := entryErrors(err)
		if len(got)+len(bad) != len(w.Entry) {
			t.Fatalf("%d entries: %d returned, %d reported (%v)", len(w.Entry), len(got), len(bad), err)
		}
		if err != nil && strings.ContainsAny(err.Error(), "\r\x00") {
			t.Fatalf("error text %q carries control characters", err)
		}
	})
}
