package bulk

import (
	"errors"
	"strings"
	"testing"
	"time"
)

// The example complete-status body of the Bulk Data Access IG 2.0.0
// ("Response - Complete Status"), with a count added to one file.
const igExample = `{
  "transactionTime": "2021-01-01T00:00:00Z",
  "request" : "https://example.com/fhir/Patient/$export?_type=Patient,Observation",
  "requiresAccessToken" : true,
  "output" : [{"type" : "Patient", "url" : "https://example.com/output/patient_file_1.ndjson"},
    {"type" : "Patient", "url" : "https://example.com/output/patient_file_2.ndjson"},
    {"type" : "Observation", "url" : "https://example.com/output/observation_file_1.ndjson", "count": 12}],
  "deleted": [{"type" : "Bundle", "url" : "https://example.com/output/del_file_1.ndjson"}],
  "error" : [{"type" : "OperationOutcome", "url" : "https://example.com/output/err_file_1.ndjson"}],
  "extension":{"https://example.com/extra-property": true}
}`

func TestParseManifest(t *testing.T) {
	tests := []struct {
		name    string
		body    string
		want    string // substring of the error; "" for success
		outputs int
	}{
		{"IG example", igExample, "", 3},
		{"empty output", `{"transactionTime":"2021-01-01T00:00:00.123+01:00","requiresAccessToken":false,"output":[],"error":[]}`, "", 0},
		{"no transactionTime", `{"requiresAccessToken":true,"output":[]}`, "transactionTime is missing", 0},
		{"bad transactionTime", `{"transactionTime":"yesterday","requiresAccessToken":true,"output":[]}`, "not a FHIR instant", 0},
		{"zero transactionTime", `{"transactionTime":"0001-01-01T00:00:00Z","requiresAccessToken":true,"output":[]}`, "the zero instant", 0},
		{"no requiresAccessToken", `{"transactionTime":"2021-01-01T00:00:00Z","output":[]}`, "requiresAccessToken is missing", 0},
		{"no output", `{"transactionTime":"2021-01-01T00:00:00Z","requiresAccessToken":true}`, "output is missing", 0},
		{"relative url", `{"transactionTime":"2021-01-01T00:00:00Z","requiresAccessToken":true,"output":[{"type":"Patient","url":"/p.ndjson"}]}`, "output[0].url", 0},
		{"ftp url", `{"transactionTime":"2021-01-01T00:00:00Z","requiresAccessToken":true,"output":[{"type":"Patient","url":"ftp://x/p.ndjson"}]}`, "output[0].url", 0},
		{"bad type", `{"transactionTime":"2021-01-01T00:00:00Z","requiresAccessToken":true,"output":[{"type":"../x","url":"https://x/p"}]}`, "not a resource type", 0},
		{"negative count", `{"transactionTime":"2021-01-01T00:00:00Z","requiresAccessToken":true,"output":[{"type":"Patient","url":"https://x/p","count":-1}]}`, "count", 0},
		{"not JSON", `<html>busy</html>`, "unusable export manifest", 0},
		{"array", `[]`, "unusable export manifest", 0},
	}
	for _, tc := range tests {
		t.Run(tc.name, func(t *testing.T) {
			m, err := ParseManifest([]byte(tc.body))
			if tc.want != "" {
				if !errors.Is(err, ErrBadManifest) || !strings.Contains(err.Error(), tc.want) {
					t.Fatalf("err = %v, want ErrBadManifest with %q", err, tc.want)
				}
				return
			}
			if err != nil {
				t.Fatal(err)
			}
			if len(m.Output) != tc.outputs {
				t.Errorf("outputs = %d, want %d", len(m.Output), tc.outputs)
			}
		})
	}
	m, _ := ParseManifest([]byte(igExample))
	if !m.TransactionTime.Equal(time.Date(2021, 1, 1, 0, 0, 0, 0, time.UTC)) || !m.RequiresAccessToken ||
		m.Output[0].Count != -1 || m.Output[2].Count != 12 || len(m.Deleted) != 1 || len(m.Error) != 1 {
		t.Errorf("IG example read as %+v", m)
	}
}

func TestParseOutcome(t *testing.T) {
	tests := []struct {
		name      string
		body      string
		text      string
		transient bool
		err       bool
	}{
		// The IG's error status example (Bulk Data Status Request).
		{"IG example", `{"resourceType":"OperationOutcome","id":"1","issue":[{"severity":"error","code":"processing","details":{"text":"An internal timeout has occurred"}}]}`, "error: An internal timeout has occurred", false, false},
		{"transient", `{"resourceType":"OperationOutcome","issue":[{"severity":"error","code":"transient","diagnostics":"try later"}]}`, "error: try later", true, false},
		{"no issues", `{"resourceType":"OperationOutcome"}`, "", false, false},
		{"other resource", `{"resourceType":"Patient"}`, "", false, true},
		{"not JSON", `Bad Gateway`, "", false, true},
	}
	for _, tc := range tests {
		t.Run(tc.name, func(t *testing.T) {
			o, err := ParseOutcome([]byte(tc.body))
			if (err != nil) != tc.err {
				t.Fatalf("err = %v", err)
			}
			if o.String() != tc.text || o.Transient() != tc.transient {
				t.Errorf("got %q transient=%v", o.String(), o.Transient())
			}
		})
	}
}

func FuzzParseManifest(f *testing.F) {
	f.Add([]byte(igExample))
	f.Add([]byte(`{"transactionTime":"2021-01-01T00:00:00Z","requiresAccessToken":false,"output":[{"type":"Patient","url":"https://x/p","count":3}]}`))
	f.Add([]byte(`{"output":null}`))
	f.Fuzz(func(t *testing.T, body []byte) {
		m, err := ParseManifest(body)
		if err != nil {
			if !errors.Is(err, ErrBadManifest) {
				t.Fatalf("error %v is not ErrBadManifest", err)
			}
			return
		}
		// encoding/json matches keys without regard to case, so the key
		// may be spelled in any case; its time must be a real one.
		if m.TransactionTime.IsZero() || !strings.Contains(strings.ToLower(string(body)), "transactiontime") {
			t.Fatalf("accepted without a transactionTime")
		}
		for _, f := range append(append(m.Output, m.Deleted...), m.Error...) {
			// A URL's scheme is case-insensitive (RFC 3986, 3.1).
			if !isResourceType(f.Type) || !strings.HasPrefix(strings.ToLower(f.URL), "http") || f.Count < -1 {
				t.Fatalf("accepted file %+v", f)
			}
		}
	})
}

func FuzzParseOutcome(f *testing.F) {
	f.Add([]byte(`{"resourceType":"OperationOutcome","issue":[{"severity":"error","code":"processing","details":{"text":"x"}}]}`))
	f.Add([]byte(`{"resourceType":"OperationOutcome","issue":[{"severity":"error","code":"transient","diagnostics":"\u0000\n"}]}`))
	f.Fuzz(func(t *testing.T, body []byte) {
		o, err := ParseOutcome(body)
		if err != nil {
			if !errors.Is(err, ErrNotOutcome) {
				t.Fatalf("error %v is not ErrNotOutcome", err)
			}
			return
		}
		s := o.String()
		if strings.ContainsAny(s, "\n\r\x00") {
			t.Fatalf("outcome text %q carries control characters", s)
		}
		_ = o.Transient()
	})
}
