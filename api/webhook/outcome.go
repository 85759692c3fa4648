package webhook

import (
	"encoding/json"
	"errors"
	"fmt"
	"net/http"
	"strconv"
	"time"
)

// requestError is a request the webhook itself refuses.
type requestError struct {
	status int
	code   string // OperationOutcome issue.code (http://hl7.org/fhir/issue-type)
	msg    string
	// allow is the Allow header of a 405.
	allow string
	// authenticate asks for WWW-Authenticate on a 401.
	authenticate bool
}

func (e *requestError) Error() string { return e.msg }

type issue struct {
	Severity    string `json:"severity"`
	Code        string `json:"code"`
	Diagnostics string `json:"diagnostics,omitempty"`
}

type outcome struct {
	issues  []issue
	headers map[string]string
}

// answer is the one place that turns a failure into what the sender sees.
// Only two outcomes exist for sink errors: 400 when the sink blames the
// content (ErrInvalid), and 503 for everything else, because a 503 makes
// the sender keep the notification and retry, and nothing that was not
// stored may be acknowledged. A sink error that says when to retry
// ([RetryLater]) gives the 503 that Retry-After.
func answer(err error) (int, outcome) {
	var re *requestError
	var later *RetryLater
	switch {
	case errors.As(err, &re):
		out := outcome{issues: []issue{{Severity: "error", Code: re.code, Diagnostics: re.msg}}}
		switch {
		case re.authenticate:
			out.headers = map[string]string{"WWW-Authenticate": `Bearer realm="webhook"`}
		case re.allow != "":
			out.headers = map[string]string{"Allow": re.allow}
		}
		return re.status, out
	case errors.Is(err, ErrInvalid):
		return http.StatusBadRequest, outcome{issues: []issue{{Severity: "error", Code: "invalid", Diagnostics: err.Error()}}}
	case errors.As(err, &later):
		secs := max(1, int64((later.After+time.Second-1)/time.Second))
		return http.StatusServiceUnavailable, outcome{
			issues: []issue{{Severity: "error", Code: "transient",
				Diagnostics: "a resource the notification names could not be read from the FHIR server in time; send the notification again after Retry-After"}},
			headers: map[string]string{"Retry-After": strconv.FormatInt(secs, 10)},
		}
	default:
		return http.StatusServiceUnavailable, outcome{issues: []issue{{Severity: "error", Code: "transient",
			Diagnostics: "the notification could not be stored; send it again later"}}}
	}
}

// issues summarises a success. Some servers reject a hook response that is
// not a FHIR resource (HAPI refused "{}"), so there is always an
// OperationOutcome with at least one issue.
func (r result) issues() []issue {
	// Built in one buffer: this runs for every request.
	var buf [160]byte
	b := buf[:0]
	part := func(n int, text string) {
		if len(b) > 0 {
			b = append(b, "; "...)
		}
		if n >= 0 {
			b = strconv.AppendInt(b, int64(n), 10)
		}
		b = append(b, text...)
	}
	if r.offered > 0 {
		part(r.receipt.Accepted, " of ")
		b = strconv.AppendInt(b, int64(r.offered), 10)
		b = append(b, " resources accepted, "...)
		b = strconv.AppendInt(b, int64(len(r.receipt.Rejected)), 10)
		b = append(b, " rejected"...)
	}
	if r.fetch > 0 {
		part(r.fetch, " references queued for reading")
	}
	if r.unusable > 0 {
		part(r.unusable, " focus references name no readable resource")
	}
	if r.changed {
		part(-1, "change recorded; the service will search for it")
	}
	if r.status {
		part(-1, string(r.ntype))
		b = append(b, " notification status recorded"...)
	}
	if len(b) == 0 {
		part(-1, "nothing to do")
	}
	out := []issue{{Severity: "information", Code: "informational", Diagnostics: string(b)}}
	for _, rj := range r.receipt.Rejected {
		d := fmt.Sprintf("resource %d rejected: %s", rj.Index, rj.Reason)
		if rj.Detail != "" {
			d += ": " + rj.Detail
		}
		out = append(out, issue{Severity: "warning", Code: "processing", Diagnostics: d})
	}
	return out
}

var outcomeType = []string{"application/fhir+json; charset=utf-8"}

func writeOutcome(w http.ResponseWriter, status int, issues []issue) {
	body, err := json.Marshal(struct {
		ResourceType string  `json:"resourceType"`
		Issue        []issue `json:"issue"`
	}{"OperationOutcome", issues})
	if err != nil {
		// Marshalling strings and ints cannot fail; keep the status anyway.
		body = []byte(`{"resourceType":"OperationOutcome","issue":[{"severity":"error","code":"exception"}]}`)
	}
	// One shared value: net/http only reads it.
	w.Header()["Content-Type"] = outcomeType
	w.WriteHeader(status)
	_, _ = w.Write(body)
}
