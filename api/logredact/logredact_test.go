package logredact_test

import (
	"bytes"
	"context"
	"errors"
	"fmt"
	"log/slog"
	"net/http"
	"strings"
	"testing"

	"github.com/deadspace-fhir/deadspace/api/logredact"
	"github.com/deadspace-fhir/deadspace/fhir/client"
)

func TestString(t *testing.T) {
	cases := []struct {
		name, in, want string
	}{
		{"reference", "no such Patient/bed1-stable here", "no such Patient/[redacted] here"},
		{"versioned reference", "at Observation/x.1/_history/3: boom", "at Observation/[redacted]: boom"},
		{"reference inside a URL", "GET https://fhir.example/r4/Observation/abc-123?x=1", "GET https://fhir.example/r4/Observation/[redacted]?x=1"},
		{"urn:uuid", "entry urn:uuid:0f0e0d0c-0000-4000-8000-000000000001 failed", "entry urn:uuid:[redacted] failed"},
		{"identifier search parameter", "If-None-Exist identifier=https://x.example/id|k-77f3 matched 2", "If-None-Exist identifier=[redacted] matched 2"},
		{"escaped subject parameter", "url Observation?subject%3DPatient%2F9", "url Observation?subject%3D[redacted]"},
		{"JSON member", `body {"id":"obs-991","status":"final"}`, `body {"id":"[redacted]","status":"final"}`},
		{"escaped JSON member", `text "{\"reference\":\"Encounter/e9\"}"`, `text "{\"reference\":\"[redacted]\"}"`},
		{"server answer withheld", "engine: write: fhir transaction: HTTP 422 Unprocessable Entity: resource 48213 of subject 77 is invalid",
			"engine: write: fhir transaction: HTTP 422 Unprocessable Entity: [server text withheld]"},
		{"server answer withheld, attempts kept", "fhir read Patient: HTTP 503 Service Unavailable: node 12 down (after 4 attempts)",
			"fhir read Patient: HTTP 503 Service Unavailable: [server text withheld] (after 4 attempts)"},
		{"each joined error", "fhir read: HTTP 500 Internal Server Error: a 1\nfhir read: HTTP 404 Not Found: b 2",
			"fhir read: HTTP 500 Internal Server Error: [server text withheld]\nfhir read: HTTP 404 Not Found: [server text withheld]"},
		{"counts and codes stay", "derived 8 values; 2 left out (no-etco2-in-window); HTTP 200", "derived 8 values; 2 left out (no-etco2-in-window); HTTP 200"},
		{"units stay", "no references here: 5 kPa/min", "no references here: 5 kPa/min"},
		{"hashes stay", "ds-0123 and sha256:ab", "ds-0123 and sha256:ab"},
		{"media types stay", "content type application/fhir+json", "content type application/fhir+json"},
	}
	for _, tc := range cases {
		t.Run(tc.name, func(t *testing.T) {
			if got := logredact.String(tc.in); got != tc.want {
				t.Errorf("String(%q)\n got %q\nwant %q", tc.in, got, tc.want)
			}
		})
	}
}

func TestTextKeepsTheServersWordingWithoutIdentifiers(t *testing.T) {
	in := "Observation.subject: reference to 48213a is invalid; see Patient/p-1 and urn:uuid:ab12"
	want := "Observation.subject: reference to [redacted] is invalid; see Patient/[redacted] and urn:uuid:[redacted]"
	if got := logredact.Text(in); got != want {
		t.Errorf("Text:\n got %q\nwant %q", got, want)
	}
}

// TestHandlerRedactsEveryPartOfARecord logs identifiers every way the
// service could, and requires none of them in the output.
func TestHandlerRedactsEveryPartOfARecord(t *testing.T) {
	var buf bytes.Buffer
	log := logredact.NewLogger(&buf, slog.LevelDebug)
	serverErr := &client.Error{Op: "transaction", Status: http.StatusUnprocessableEntity, Outcome: "subject 771133 unknown"}
	wrapped := fmt.Errorf("engine: write Observation/obs-4411: %w", serverErr)
	log = log.With("patient", "p-5521", slog.Group("req", "reference", "Encounter/enc-8831"))
	log.Debug("read Patient/pat-2291", "err", wrapped, "id", "res-6612", "urls", []string{"Observation/o-3391"},
		"joined", errors.Join(errors.New("urn:uuid:0f0e0d0c-1111"), errors.New("x")),
		"body", []byte(`{"id":"body-9931"}`), "n", 3)
	log.WithGroup("g").Info("ok", "subject", "Patient/grp-1177")
	out := buf.String()
	for _, id := range []string{"obs-4411", "771133", "p-5521", "enc-8831", "pat-2291", "res-6612", "o-3391", "0f0e0d0c-1111", "body-9931", "grp-1177"} {
		if strings.Contains(out, id) {
			t.Errorf("identifier %q reached the log:\n%s", id, out)
		}
	}
	for _, keep := range []string{`"n":3`, "HTTP 422", "engine: write Observation/[redacted]"} {
		if !strings.Contains(out, keep) {
			t.Errorf("%q missing from the log:\n%s", keep, out)
		}
	}
	if !log.Enabled(context.Background(), slog.LevelDebug) {
		t.Error("level not passed through")
	}
}

// FuzzString checks that a reference or urn:uuid planted anywhere in any
// text never survives.
func FuzzString(f *testing.F) {
	f.Add("before ", " after")
	f.Add(`{"a":"`, `"}`)
	f.Add("HTTP 422 Unprocessable Entity: ", "")
	f.Add("x/", "/_history/1")
	f.Fuzz(func(t *testing.T, before, after string) {
		for _, planted := range []string{"Patient/zq81xv", "urn:uuid:7fa3c2d1e0"} {
			in := before + " " + planted + " " + after
			out := logredact.String(in)
			if strings.Contains(out, planted) {
				t.Fatalf("String(%q) = %q keeps %q", in, out, planted)
			}
		}
	})
}
