package client

import (
	"encoding/json"
	"net/http"
	"strings"
	"testing"
	"time"
	"unicode/utf8"
)

// RFC 9110 §10.2.3: Retry-After = HTTP-date / delay-seconds, delay-seconds = 1*DIGIT.
func TestParseRetryAfter(t *testing.T) {
	now := time.Date(2025, 3, 1, 10, 0, 0, 0, time.UTC)
	cases := []struct {
		name   string
		in     string
		want   time.Duration
		wantOK bool
	}{
		{"seconds", "120", 120 * time.Second, true},
		{"zero", "0", 0, true},
		{"padded", " 5 ", 5 * time.Second, true},
		// The example date of RFC 9110 §10.2.3.
		{"IMF-fixdate", "Fri, 31 Dec 1999 23:59:59 GMT", 0, true},
		{"future IMF-fixdate", "Sat, 01 Mar 2025 10:01:30 GMT", 90 * time.Second, true},
		// RFC 9110 §5.6.7: recipients also accept the obsolete RFC 850 and asctime forms.
		{"RFC 850 date", "Saturday, 01-Mar-25 10:00:10 GMT", 10 * time.Second, true},
		{"asctime date", "Sat Mar  1 10:00:20 2025", 20 * time.Second, true},
		{"huge", "99999999999999999999999", maxDuration, true},
		{"negative", "-1", 0, false},
		{"fraction", "1.5", 0, false},
		{"empty", "", 0, false},
		{"words", "soon", 0, false},
	}
	for _, tc := range cases {
		t.Run(tc.name, func(t *testing.T) {
			got, ok := parseRetryAfter(tc.in, now)
			if got != tc.want || ok != tc.wantOK {
				t.Errorf("parseRetryAfter(%q) = %v, %v; want %v, %v", tc.in, got, ok, tc.want, tc.wantOK)
			}
		})
	}
}

// R4 Bundle.entry.response.status: "The status code returned by processing this entry. The
// status SHALL start with a 3 digit HTTP code (e.g. 404) and may contain the standard HTTP
// description associated with the status code."
func TestParseStatusLine(t *testing.T) {
	cases := []struct {
		in      string
		want    int
		wantErr bool
	}{
		{"201 Created", 201, false},
		{"201", 201, false},
		{" 200 OK ", 200, false},
		{"412 Precondition Failed", 412, false},
		{"20", 0, true},
		{"2010", 0, true},
		{"201Created", 0, true},
		{"OK", 0, true},
		{"099", 0, true},
		{"", 0, true},
	}
	for _, tc := range cases {
		t.Run(tc.in, func(t *testing.T) {
			got, err := parseStatusLine(tc.in)
			if got != tc.want || (err != nil) != tc.wantErr {
				t.Errorf("parseStatusLine(%q) = %d, %v", tc.in, got, err)
			}
		})
	}
}

// R4 http.html#create: Location is [base]/[type]/[id]/_history/[vid]; transaction responses
// give it relative, and some servers omit the _history part.
func TestParseLocation(t *testing.T) {
	cases := []struct{ in, typ, id, vid string }{
		{"http://h/fhir/Observation/o1/_history/2", "Observation", "o1", "2"},
		{"Observation/o1/_history/2", "Observation", "o1", "2"},
		{"Device/d-1", "Device", "d-1", ""},
		{"https://h/r4/Provenance/7b18e8a7-90b2-4646-a693-97388f0a8e20/", "Provenance", "7b18e8a7-90b2-4646-a693-97388f0a8e20", ""},
		{"http://h/fhir/Observation/o1/_history/2?x=1", "Observation", "o1", "2"},
		{"http://h/fhir/observation/o1", "", "", ""},
		{"", "", "", ""},
	}
	for _, tc := range cases {
		t.Run(tc.in, func(t *testing.T) {
			typ, id, vid := parseLocation(tc.in)
			if typ != tc.typ || id != tc.id || vid != tc.vid {
				t.Errorf("parseLocation(%q) = %q %q %q", tc.in, typ, id, vid)
			}
		})
	}
}

// R4 http.html#versioning: "ETag: W/\"[versionId]\"".
func TestParseETag(t *testing.T) {
	cases := []struct{ in, want string }{
		{`W/"3141"`, "3141"},
		{`"3141"`, "3141"},
		{`3141`, ""},
		{`W/"`, ""},
		{``, ""},
	}
	for _, tc := range cases {
		if got := parseETag(tc.in); got != tc.want {
			t.Errorf("parseETag(%q) = %q, want %q", tc.in, got, tc.want)
		}
	}
}

func TestParseOutcome(t *testing.T) {
	cases := []struct {
		name, ct, body   string
		wantCode, wantTx string
	}{
		{"two issues joined", "application/fhir+json; charset=utf-8",
			`{"resourceType":"OperationOutcome","issue":[{"severity":"error","code":"invalid","diagnostics":"a"},{"severity":"warning","code":"processing","details":{"text":"b"}}]}`,
			"invalid", "a; b"},
		{"coding display as last resort", "application/fhir+json",
			`{"resourceType":"OperationOutcome","issue":[{"severity":"error","code":"processing","details":{"coding":[{"code":"MSG_X","display":"shown"}]}}]}`,
			"processing", "shown"},
		{"only a code", "application/fhir+json",
			`{"resourceType":"OperationOutcome","issue":[{"severity":"error","code":"throttled"}]}`,
			"throttled", "throttled"},
		{"non-standard issue code is kept", "application/fhir+json",
			`{"resourceType":"OperationOutcome","issue":[{"severity":"fatal","code":"x-vendor","diagnostics":"d"}]}`,
			"x-vendor", "d"},
		{"not an OperationOutcome", "application/fhir+json", `{"resourceType":"Bundle"}`, "", `{"resourceType":"Bundle"}`},
		{"newlines cannot forge log lines", "text/plain", "line1\nlevel=ERROR msg=forged\r\n", "", "line1 level=ERROR msg=forged"},
		{"invalid UTF-8 is replaced", "text/plain", "a\xffb", "", "a\uFFFDb"},
		{"empty body", "text/html", "", "", ""},
	}
	for _, tc := range cases {
		t.Run(tc.name, func(t *testing.T) {
			got := parseOutcome(tc.ct, []byte(tc.body))
			if got.Code != tc.wantCode || got.Text != tc.wantTx {
				t.Errorf("got %+v, want code %q text %q", got, tc.wantCode, tc.wantTx)
			}
		})
	}
	t.Run("long body is cut", func(t *testing.T) {
		got := parseOutcome("text/html", []byte(strings.Repeat("é", 1000)))
		if len(got.Text) > maxBodyPrefix+len("…") || !strings.HasSuffix(got.Text, "…") || !utf8.ValidString(got.Text) {
			t.Errorf("len %d %q", len(got.Text), got.Text)
		}
	})
}

func TestInspectRequestBundle(t *testing.T) {
	cases := []struct {
		name       string
		body       string
		repeatable bool
		wantErr    bool
	}{
		{"conditional and PUT", `{"resourceType":"Bundle","type":"transaction","entry":[{"request":{"method":"POST","url":"Observation","ifNoneExist":"identifier=a|b"}},{"request":{"method":"PUT","url":"Device/d"}}]}`, true, false},
		{"plain POST", `{"resourceType":"Bundle","type":"batch","entry":[{"request":{"method":"POST","url":"Provenance"}}]}`, false, false},
		{"PATCH", `{"resourceType":"Bundle","type":"batch","entry":[{"request":{"method":"PATCH","url":"Observation/x"}}]}`, false, false},
		{"entry without request", `{"resourceType":"Bundle","type":"batch","entry":[{}]}`, false, true},
		{"document bundle", `{"resourceType":"Bundle","type":"document"}`, false, true},
	}
	for _, tc := range cases {
		t.Run(tc.name, func(t *testing.T) {
			info, err := inspectRequestBundle([]byte(tc.body))
			if (err != nil) != tc.wantErr || (err == nil && info.Repeatable != tc.repeatable) {
				t.Errorf("got %+v, %v", info, err)
			}
		})
	}
}

func TestBackoffSchedule(t *testing.T) {
	ceil := func(d time.Duration) time.Duration { return d }
	var got []time.Duration
	for a := range 8 {
		got = append(got, backoff(a, 500*time.Millisecond, 5*time.Second, ceil))
	}
	want := []time.Duration{500 * time.Millisecond, time.Second, 2 * time.Second, 4 * time.Second, 5 * time.Second, 5 * time.Second, 5 * time.Second, 5 * time.Second}
	for i := range want {
		if got[i] != want[i] {
			t.Fatalf("ceilings %v, want %v", got, want)
		}
	}
	// Full jitter draws from [0, ceil]; check the default draw stays inside it.
	for range 1000 {
		if d := backoff(3, 500*time.Millisecond, 5*time.Second, defaultJitter); d < 0 || d > 4*time.Second {
			t.Fatalf("draw %v outside [0, 4s]", d)
		}
	}
	if d := backoff(200, time.Second, time.Minute, ceil); d != time.Minute {
		t.Errorf("attempt 200: %v, want the cap", d)
	}
}

func FuzzParseOutcome(f *testing.F) {
	f.Add("application/fhir+json", []byte(`{"resourceType":"OperationOutcome","issue":[{"severity":"error","code":"invalid","diagnostics":"a"}]}`))
	f.Add("application/fhir+json", []byte(`{"resourceType":"OperationOutcome","issue":[{"details":{"coding":[{"code":"c"}]}}]}`))
	f.Add("text/html", []byte("<html>\x00\xff</html>"))
	f.Add("application/json", []byte(`{"resourceType":"OperationOutcome","issue":null}`))
	f.Fuzz(func(t *testing.T, ct string, body []byte) {
		oi := parseOutcome(ct, body)
		if !utf8.ValidString(oi.Text) || !utf8.ValidString(oi.Code) {
			t.Fatalf("invalid UTF-8: %q %q", oi.Text, oi.Code)
		}
		if strings.ContainsAny(oi.Text, "\n\r\x00") {
			t.Fatalf("control characters survive: %q", oi.Text)
		}
		if len(oi.Text) > maxOutcomeText+len("…") {
			t.Fatalf("text of %d bytes", len(oi.Text))
		}
	})
}

func FuzzParseTransactionResponse(f *testing.F) {
	f.Add([]byte(`{"resourceType":"Bundle","type":"transaction-response","entry":[{"response":{"status":"201","location":"Device/d"}}]}`), 1)
	f.Add([]byte(`{"resourceType":"Bundle","type":"batch-response","entry":[{"response":{"status":"404 Not Found","outcome":{"resourceType":"OperationOutcome","issue":[{"code":"not-found"}]}}}]}`), 1)
	f.Add([]byte(`{"resourceType":"Bundle","type":"transaction-response","entry":[{"resource":null,"response":{"status":"200 OK","etag":"W/\"1\"","lastModified":"2025-03-01T10:15:07Z"}}]}`), 1)
	f.Add([]byte(`{"resourceType":"Bundle","type":"transaction-response"}`), -1)
	f.Fuzz(func(t *testing.T, body []byte, want int) {
		tr, err := parseTransactionResponse(body, want)
		if err != nil {
			return
		}
		if want >= 0 && len(tr.Entries) != want {
			t.Fatalf("%d entries, want %d", len(tr.Entries), want)
		}
		for i, e := range tr.Entries {
			if e.Status < 100 || e.Status > 999 {
				t.Fatalf("entry %d: status %d", i, e.Status)
			}
			if n, err := parseStatusLine(e.StatusLine); err != nil || n != e.Status {
				t.Fatalf("entry %d: status line %q gives %d, %v; entry has %d", i, e.StatusLine, n, err, e.Status)
			}
			if e.Resource != nil && !json.Valid(e.Resource) {
				t.Fatalf("entry %d: resource is not JSON", i)
			}
		}
		_ = tr.Err()
	})
}

func FuzzParseSearchPage(f *testing.F) {
	f.Add([]byte(`{"resourceType":"Bundle","type":"searchset","link":[{"relation":"next","url":"http://h/x?p=2"}],"entry":[{"resource":{}}]}`))
	f.Add([]byte(`{"resourceType":"Bundle","type":"searchset","link":[{"relation":"next","url":"a"},{"relation":"next","url":"b"}]}`))
	f.Fuzz(func(t *testing.T, body []byte) {
		p, err := parseSearchPage(body)
		if err != nil {
			return
		}
		for _, e := range p.Entries {
			if !json.Valid(e) {
				t.Fatal("entry is not JSON")
			}
		}
	})
}

func FuzzParseRetryAfter(f *testing.F) {
	for _, s := range []string{"120", "0", "Fri, 31 Dec 1999 23:59:59 GMT", "-1", "1e3", "99999999999999999999"} {
		f.Add(s)
	}
	now := time.Date(2025, 3, 1, 10, 0, 0, 0, time.UTC)
	f.Fuzz(func(t *testing.T, s string) {
		d, ok := parseRetryAfter(s, now)
		if d < 0 || (!ok && d != 0) {
			t.Fatalf("parseRetryAfter(%q) = %v, %v", s, d, ok)
		}
		if ok {
			if _, err := http.ParseTime(strings.TrimSpace(s)); err != nil && strings.TrimLeft(strings.TrimSpace(s), "0123456789") != "" {
				t.Fatalf("accepted %q, which is neither digits nor an HTTP-date", s)
			}
		}
	})
}

func FuzzBuildMeta(f *testing.F) {
	f.Add([]byte(`{"resourceType":"Observation","id":"o1","meta":{"versionId":"2","lastUpdated":"2025-03-01T10:15:07Z"}}`), `W/"2"`, "Observation/o1/_history/2", "")
	f.Add([]byte(``), `W/"9"`, "http://h/fhir/Device/d/_history/9", "Sat, 01 Mar 2025 10:15:07 GMT")
	// The body is the resource itself, so whatever it says wins over the headers.
	f.Fuzz(func(t *testing.T, body []byte, etag, loc, lm string) {
		m := buildMeta(200, body, etag, loc, lm)
		var wm wireMeta
		if json.Unmarshal(body, &wm) != nil {
			return
		}
		if wm.ID != "" && m.ID != wm.ID {
			t.Fatalf("id %q, body says %q", m.ID, wm.ID)
		}
		if wm.Meta != nil && wm.Meta.VersionID != "" && m.VersionID != wm.Meta.VersionID {
			t.Fatalf("versionId %q, body says %q", m.VersionID, wm.Meta.VersionID)
		}
	})
}
