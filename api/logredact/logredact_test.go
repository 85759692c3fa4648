package logredact_test

import (
	"bytes"
	"context"
	"encoding/json"
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
	long := strings.Repeat("a", 64) + "TAIL9988"
	cases := []struct {
		name, in, want string
	}{
		// References, in any spelling a server or a URL gives them.
		{"reference", "no such Patient/bed1-stable here", "no such Patient/[redacted] here"},
		{"versioned reference", "at Observation/x.1/_history/3: boom", "at Observation/[redacted]: boom"},
		{"version that is not an R4 id", "at Observation/ok-1/_history/v_7788", "at Observation/[redacted]"},
		{"reference inside a URL", "GET https://fhir.example/r4/Observation/abc-123?_count=1", "GET https://fhir.example/r4/Observation/[redacted]?_count=1"},
		{"absolute URL with a version", "GET https://host/fhir/Observation/abc/_history/2 failed", "GET https://host/fhir/Observation/[redacted] failed"},
		{"location header", "Location: https://h.example/fhir/Observation/abc/_history/2", "Location: https://h.example/fhir/Observation/[redacted]"},
		{"response location", "entry.response.location Observation/xyz-9/_history/1 unexpected", "entry.response.location Observation/[redacted] unexpected"},
		{"id over 64 characters", "no Patient/" + long, "no Patient/[redacted]"},
		{"id with an underscore", "no Patient/mrn_445566", "no Patient/[redacted]"},
		{"id with a colon", "no Patient/mrn:445577", "no Patient/[redacted]"},
		{"id with a letter outside ASCII", "no Patient/müller-1 here", "no Patient/[redacted] here"},
		{"lower-case type", "GET https://h/fhir/patient/lp-5566", "GET https://h/fhir/patient/[redacted]"},
		{"upper-case type", "GET /PATIENT/up-5566", "GET /PATIENT/[redacted]"},
		{"type glued to a digit", "x2Patient/dp-1234", "x2Patient/[redacted]"},
		{"type glued to a base URL", "GET https://h/fhirPatient/gl-1234", "GET https://h/fhirPatient/[redacted]"},
		{"type with a longer name that starts the same", "MedicationRequest/mr-1 and DeviceUseStatement/du-2", "MedicationRequest/[redacted] and DeviceUseStatement/[redacted]"},
		{"R5 type", "Transport/tr-1 failed", "Transport/[redacted] failed"},
		{"percent-encoded reference", "GET /Observation?performer=Patient%2Fpe-7788", "GET /Observation?performer=[redacted]"},
		{"percent-encoded reference, lower-case escape", "x Patient%2fpe-7789 y", "x Patient%2f[redacted] y"},
		{"doubly encoded reference", "x Patient%252Fpe-7790 y", "x Patient%252F[redacted] y"},
		{"operations and keywords after a type stay", "GET /Patient/$everything and Patient/_search and Observation/_history", "GET /Patient/$everything and Patient/_search and Observation/_history"},
		{"contained reference", "Observation.subject: reference #p1 not found", "Observation.subject: reference #[redacted] not found"},

		// UUIDs.
		{"urn:uuid", "entry urn:uuid:0f0e0d0c-0000-4000-8000-000000000001 failed", "entry urn:uuid:[redacted] failed"},
		{"upper-case urn:uuid", "entry URN:UUID:ABCDEF01-2345 failed", "entry URN:UUID:[redacted] failed"},
		{"bare UUID", "fhir read: resource 0f0e0d0c-1234-4000-8000-00000000abcd is gone", "fhir read: resource [redacted] is gone"},
		{"UUID inside a word", "key obs-0f0e0d0c-1234-4000-8000-00000000abcd-2 kept", "key [redacted] kept"},
		{"32 hex digits", "resource 0f0e0d0c123440008000000000000abc gone", "resource [redacted] gone"},

		// Search parameters.
		{"identifier search parameter", "If-None-Exist identifier=https://x.example/id|k-77f3 matched 2", "If-None-Exist identifier=[redacted] matched 2"},
		{"identifier token only", "GET Patient?identifier=MRN-55667", "GET Patient?identifier=[redacted]"},
		{"identifier OR list", "GET Patient?identifier=http://h.example/mrn|111222,http://h.example/mrn|333444", "GET Patient?identifier=[redacted]"},
		{"identifier with a space", "If-None-Exist identifier=urn:oid:1.2.3|MRN 998877", "If-None-Exist identifier=[redacted]"},
		{"identifier at the end of a sentence", "no match for identifier=sys|a1.", "no match for identifier=[redacted]."},
		{"identifier in brackets", "(identifier=sys|a1)", "(identifier=[redacted])"},
		{"subject with a type modifier", "GET Observation?subject:Patient=sm-4455", "GET Observation?subject:Patient=[redacted]"},
		{"chained identifier", "GET Observation?patient.identifier=sys|MRN8899", "GET Observation?patient.identifier=[redacted]"},
		{"escaped subject parameter", "url Observation?subject%3DPatient%2F9", "url Observation?subject%3D[redacted]"},
		{"escaped identifier parameter", "GET Patient?identifier%3Dsys%7CMRN7766", "GET Patient?identifier%3D[redacted]"},
		{"escaped identifier parameter, lower-case escape", "GET Patient?identifier%3dsys%7CMRN7767", "GET Patient?identifier%3d[redacted]"},
		{"escaped query ends at an escaped ampersand", "GET Observation%3Fpatient%3Dp-1%26_count%3D5", "GET Observation%3Fpatient%3D[redacted]%26_count%3D5"},
		{"names and birth dates in a query", "GET Patient?family=Smithers&given=Waylon&birthdate=1956-02-01", "GET Patient?family=[redacted]&given=[redacted]&birthdate=[redacted]"},
		{"reverse chaining", "GET Observation?_has:Observation:patient:code=1234", "GET Observation?_has:Observation:patient:code=[redacted]"},
		{"codes, counts and dates in a query stay", "GET Observation?code=http://loinc.org|8867-4&_count=10&subject=Patient/9&date=ge2026-01-01",
			"GET Observation?code=http://loinc.org|8867-4&_count=10&subject=[redacted]&date=ge2026-01-01"},

		// JSON members, plain and quoted.
		{"JSON member", `body {"id":"obs-991","status":"final"}`, `body {"id":"[redacted]","status":"final"}`},
		{"JSON member with spaces", `body {"id" : "sp-1122"}`, `body {"id" : "[redacted]"}`},
		{"JSON number", `body {"resourceType":"Patient","id":445599}`, `body {"resourceType":"Patient","id":[redacted]}`},
		{"JSON value with an escaped quote", `body {"id":"ab\"cd-7711"}`, `body {"id":"[redacted]"}`},
		{"JSON value cut short", `body {"id":"cut-77`, `body {"id":"[redacted]`},
		{"escaped JSON member", `text "{\"reference\":\"Encounter/e9\"}"`, `text "{\"reference\":\"[redacted]\"}"`},
		{"escaped JSON value with an escaped quote", `text "{\"display\":\"Waylon \\\"Smithers\\\"\",\"status\":\"final\"}"`,
			`text "{\"display\":\"[redacted]\",\"status\":\"final\"}"`},
		{"fullUrl", `{"fullUrl":"https://h/fhir/Patient/fu-2211"}`, `{"fullUrl":"[redacted]"}`},
		{"contained reference in JSON", `{"reference":"#p1"}`, `{"reference":"[redacted]"}`},
		{"HumanName", `body {"name":[{"use":"official","text":"Waylon Smithers","family":"Smithers","given":["Waylon","J"]}],"gender":"male"}`,
			`body {"name":[{"use":"[redacted]","text":"[redacted]","family":"[redacted]","given":["[redacted]","[redacted]"]}],"gender":"male"}`},
		{"escaped HumanName", `text "{\"name\":[{\"text\":\"Waylon Smithers\"}],\"gender\":\"male\"}"`,
			`text "{\"name\":[{\"text\":\"[redacted]\"}],\"gender\":\"male\"}"`},
		{"reference with a display", `{"subject":{"reference":"Patient/1","display":"Waylon Smithers"},"status":"final"}`,
			`{"subject":{"reference":"[redacted]","display":"[redacted]"},"status":"final"}`},
		{"identifier array", `{"identifier":[{"system":"urn:oid:1.2","value":"MRN-1"}],"active":true}`,
			`{"identifier":[{"system":"[redacted]","value":"[redacted]"}],"active":true}`},
		{"birth date", `{"birthDate":"1956-02-01"}`, `{"birthDate":"[redacted]"}`},
		{"narrative", `{"text":{"status":"generated","div":"<div>Waylon Smithers</div>"}}`, `{"text":{"status":"generated","div":"[redacted]"}}`},

		// Ids named in words, as the FHIR client and servers quote them.
		{"quoted id", `fhir read Observation: invalid id "obs 3355"`, `fhir read Observation: invalid id "[redacted]"`},
		{"quoted body id", `fhir update Observation: body id "obs-3344" does not match the request id`, `fhir update Observation: body id "[redacted]" does not match the request id`},
		{"single-quoted id", "Resource type 'Patient' with id 'abc' couldn't be found.", "Resource type 'Patient' with id '[redacted]' couldn't be found."},
		{"id in brackets", "Can not create resource with ID[abc123], ID must not be supplied", "Can not create resource with ID[redacted], ID must not be supplied"},
		{"id after a colon", "duplicate id:dup-7 and identifier: MRN|44", "duplicate id:[redacted] and identifier: [redacted]"},
		{"id as two words", "no Patient with identifier MRN 998877.", "no Patient with identifier [redacted]."},
		{"quoted subject", `subject "bed-7" is not a reference`, `subject "[redacted]" is not a reference`},
		{"words after subject stay", "subject is unknown; Observation.subject: Patient/p1 bad", "subject is unknown; Observation.subject: Patient/[redacted] bad"},
		{"words after id stay", "id is missing; identifier system must be a URI; Patient.id: must match", "id is missing; identifier system must be a URI; Patient.id: must match"},

		// A server's answer is withheld whole.
		{"server answer withheld", "engine: write: fhir transaction: HTTP 422 Unprocessable Entity: resource 48213 of subject 77 is invalid",
			"engine: write: fhir transaction: HTTP 422 Unprocessable Entity: [server text withheld]"},
		{"server answer withheld, attempts kept", "fhir read Patient: HTTP 503 Service Unavailable: node 12 down (after 4 attempts)",
			"fhir read Patient: HTTP 503 Service Unavailable: [server text withheld] (after 4 attempts)"},
		{"each joined error", "fhir read: HTTP 500 Internal Server Error: a 1\nfhir read: HTTP 404 Not Found: b 2",
			"fhir read: HTTP 500 Internal Server Error: [server text withheld]\nfhir read: HTTP 404 Not Found: [server text withheld]"},
		{"status without a reason phrase", "fhir transaction: HTTP 599: resource 778899 bad", "fhir transaction: HTTP 599: [server text withheld]"},
		{"lower-case http", "token: http 400: client cid-4455 unknown", "token: http 400: [server text withheld]"},
		{"OAuth error description", "oauth token request: HTTP 400 invalid_client: client pat-6677 unknown",
			"oauth token request: HTTP 400 invalid_client: [server text withheld]"},
		{"OAuth response body", `oauth token request: unexpected response body: {"error":"invalid_client","error_description":"client pat-6677 unknown"}`,
			"oauth token request: unexpected response body: [server text withheld]"},

		// What is not an identifier stays.
		{"counts and codes stay", "derived 8 values; 2 left out (no-etco2-in-window); HTTP 200", "derived 8 values; 2 left out (no-etco2-in-window); HTTP 200"},
		{"units stay", "no references here: 5 kPa/min", "no references here: 5 kPa/min"},
		{"hashes stay", "ds-0123 and sha256:ab", "ds-0123 and sha256:ab"},
		{"media types stay", "content type application/fhir+json", "content type application/fhir+json"},
		{"error codes stay", "HAPI-0989: rejected", "HAPI-0989: rejected"},
		{"gRPC method stays", "/deadspace.v1.DeadSpace/Submit", "/deadspace.v1.DeadSpace/Submit"},
		{"gRPC health method stays", "/grpc.health.v1.Health/Check", "/grpc.health.v1.Health/Check"},
		{"capitalised words before a slash stay", "see README/Setup and Go/Rust", "see README/Setup and Go/Rust"},
		{"package paths stay", "panic in github.com/deadspace-fhir/deadspace/api/engine.(*Engine).Ingest", "panic in github.com/deadspace-fhir/deadspace/api/engine.(*Engine).Ingest"},
	}
	for _, tc := range cases {
		t.Run(tc.name, func(t *testing.T) {
			if got := logredact.String(tc.in); got != tc.want {
				t.Errorf("String(%q)\n got %q\nwant %q", tc.in, got, tc.want)
			}
		})
	}
}

// TestText: the dead-letter view keeps a server's wording and drops every
// word that may be an identifier, however short.
func TestText(t *testing.T) {
	cases := []struct {
		name, in, want string
	}{
		{"server wording kept", "Observation.subject: reference to 48213a is invalid; see Patient/p-1 and urn:uuid:ab12",
			"Observation.subject: reference to [redacted] is invalid; see Patient/[redacted] and urn:uuid:[redacted]"},
		{"short numeric id", "HAPI-0989: resource 48213 rejected", "HAPI-0989: resource [redacted] rejected"},
		{"five-character id", "subject ab12c is unknown", "subject [redacted] is unknown"},
		{"id with an underscore", "subject mrn_9 unknown", "subject [redacted] unknown"},
		{"one-digit id after a type", "HAPI-2001: Resource Patient/1 is not known", "HAPI-2001: Resource Patient/[redacted] is not known"},
		{"letters-only id after a type", "Resource Patient/abcdef is not known", "Resource Patient/[redacted] is not known"},
		{"letters-only id in a search", "subject Bedsix unknown in Patient?identifier=sys|abcdef", "subject Bedsix unknown in Patient?identifier=[redacted]"},
		{"letters-only id after an id key", "Resource type 'Patient' with id 'abc' not found", "Resource type 'Patient' with id '[redacted]' not found"},
		{"code after an id key", "duplicate id=HAPI-7", "duplicate id=[redacted]"},
		{"percent-encoded reference", "see Patient%2Fpq", "see Patient%2F[redacted]"},
		{"diagnostics echoing a URL", "HAPI-0450: Failed to call GET https://h/fhir/Observation?subject=Patient/ab&_count=5",
			"HAPI-0450: Failed to call GET https://h/fhir/Observation?subject=[redacted]&_count=[redacted]"},
		{"contained reference", "Bundle.entry[2].resource.subject: reference #c1 not contained", "Bundle.entry[2].resource.subject: reference #[redacted] not contained"},
		{"status, positions and attempts kept", "fhir transaction: HTTP 422 Unprocessable Entity: line 1, col 5: Observation.component[0] bad (after 4 attempts)",
			"fhir transaction: HTTP 422 Unprocessable Entity: line 1, col 5: Observation.component[0] bad (after 4 attempts)"},
		{"other numbers go", "resource 7731902 rejected; 12 more", "resource [redacted] rejected; [redacted] more"},
	}
	for _, tc := range cases {
		t.Run(tc.name, func(t *testing.T) {
			if got := logredact.Text(tc.in); got != tc.want {
				t.Errorf("Text(%q)\n got %q\nwant %q", tc.in, got, tc.want)
			}
		})
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
	log.Error("token", "err", &client.TokenError{Status: http.StatusBadRequest, Code: "invalid_client", Description: "client pat-6677 unknown"})
	log.Error("token", "err", &client.TokenError{Status: http.StatusBadGateway, Err: errors.New(`unexpected response body: {"detail":"no route for Patient mrn-5566"}`)})
	out := buf.String()
	for _, id := range []string{"obs-4411", "771133", "p-5521", "enc-8831", "pat-2291", "res-6612", "o-3391", "0f0e0d0c-1111", "body-9931", "grp-1177", "pat-6677", "mrn-5566"} {
		if strings.Contains(out, id) {
			t.Errorf("identifier %q reached the log:\n%s", id, out)
		}
	}
	for _, keep := range []string{`"n":3`, "HTTP 422", "engine: write Observation/[redacted]", "HTTP 400 invalid_client: [server text withheld]"} {
		if !strings.Contains(out, keep) {
			t.Errorf("%q missing from the log:\n%s", keep, out)
		}
	}
	if !log.Enabled(context.Background(), slog.LevelDebug) {
		t.Error("level not passed through")
	}
}

// TestHandlerKeepsWhatNamesTheCall: a gRPC method and a request id are
// logged whole, even where a rule would take part of them; the same keys
// with a FHIR path or free text in them are redacted as any other.
func TestHandlerKeepsWhatNamesTheCall(t *testing.T) {
	cases := []struct {
		name, key, value, want string
	}{
		{"gRPC method", "method", "/deadspace.v1.DeadSpace/Submit", "/deadspace.v1.DeadSpace/Submit"},
		{"gRPC method of a service named like a type", "method", "/acme.v1.Patient/Get", "/acme.v1.Patient/Get"},
		{"HTTP method", "method", "POST", "POST"},
		{"path under the method key", "method", "/Patient/abc", "/Patient/[redacted]"},
		{"UUID request id", "request_id", "0f0e0d0c-1234-4000-8000-00000000abcd", "0f0e0d0c-1234-4000-8000-00000000abcd"},
		{"request id of the service", "request_id", "5f1c0a9e3b7d2c4e6f8a0b1c", "5f1c0a9e3b7d2c4e6f8a0b1c"},
		{"text under the request id key", "request_id", "see Patient/abc", "see Patient/[redacted]"},
	}
	for _, tc := range cases {
		t.Run(tc.name, func(t *testing.T) {
			var buf bytes.Buffer
			logredact.NewLogger(&buf, slog.LevelInfo).Info("call", tc.key, tc.value)
			var line map[string]any
			if err := json.Unmarshal(buf.Bytes(), &line); err != nil {
				t.Fatal(err)
			}
			if got := line[tc.key]; got != tc.want {
				t.Errorf("%s=%q logged as %q, want %q", tc.key, tc.value, got, tc.want)
			}
		})
	}
}

// plantings are the shapes an identifier is planted in by the fuzz tests:
// after a resource type in every spelling, and after the keys and search
// parameters that name one.
var plantings = []func(id string) string{
	func(id string) string { return "Patient/" + id },
	func(id string) string { return "observation/" + id },
	func(id string) string { return "x1MedicationRequest/" + id },
	func(id string) string { return "Encounter%2F" + id },
	func(id string) string { return "https://h/fhir/Observation/o-1/_history/" + id },
	func(id string) string { return "urn:uuid:" + id },
	func(id string) string { return `{"id":"` + id + `"}` },
	func(id string) string { return `{\"reference\":\"` + id + `\"}` },
	func(id string) string { return `invalid id "` + id + `"` },
	func(id string) string { return "identifier=sys|" + id },
	func(id string) string { return "?subject:Patient=" + id },
}

// plantable tells whether id is worth planting: an id's characters, not
// found in the text around it or in what redaction writes.
func plantable(id string, around ...string) bool {
	if id == "" || id == "_search" || id == "_history" || strings.Trim(id, ".:-_") == "" {
		return false
	}
	for _, c := range id {
		if !(c >= 'a' && c <= 'z' || c >= 'A' && c <= 'Z' || c >= '0' && c <= '9' || strings.ContainsRune("-._:", c)) {
			return false
		}
	}
	for _, s := range append(around, "[redacted]", "[server text withheld]") {
		if strings.Contains(s, id) {
			return false
		}
	}
	return true
}

func fuzzRedaction(f *testing.F, redact func(string) string) {
	f.Add("before", "zq81xv", "after", uint8(0))
	f.Add(`{"a":"`, "p-1", `"}`, uint8(6))
	f.Add("HTTP 422 Unprocessable Entity: ", "abc", "", uint8(1))
	f.Add("x/", "mrn:77", "/_history/1", uint8(4))
	f.Add(`\"`, "a.b", `\\\"`, uint8(7))
	f.Add("identifier=", "k_9", "MRN 4", uint8(9))
	f.Fuzz(func(t *testing.T, before, id, after string, shape uint8) {
		plant := plantings[int(shape)%len(plantings)](id)
		in := before + " " + plant + " " + after
		out := redact(in) // must not panic, whatever the text
		if plantable(id, before, after, plant[:strings.Index(plant, id)], plant[strings.Index(plant, id)+len(id):]) && strings.Contains(out, id) {
			t.Fatalf("%q\nbecame %q\nwhich keeps %q", in, out, id)
		}
	})
}

// FuzzString checks that an identifier planted anywhere in any text never
// survives String.
func FuzzString(f *testing.F) { fuzzRedaction(f, logredact.String) }

// FuzzText is FuzzString for Text.
func FuzzText(f *testing.F) { fuzzRedaction(f, logredact.Text) }

// BenchmarkString redacts what a request's log line carries most often:
// short words with nothing to remove, and an error quoting a server.
func BenchmarkString(b *testing.B) {
	for _, in := range []string{
		"POST",
		"notify",
		"engine: write: fhir transaction: HTTP 422 Unprocessable Entity: Observation.subject: Patient/bed2-sedated is unknown (after 2 attempts)",
	} {
		b.Run(fmt.Sprint(len(in)), func(b *testing.B) {
			for b.Loop() {
				logredact.String(in)
			}
		})
	}
}
