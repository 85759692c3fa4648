package webhook

import (
	"encoding/json"
	"errors"
	"fmt"
	"net/http"
	"strings"
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
// stored may be acknowledged.
func answer(err error) (int, outcome) {
	var re *requestError
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
	default:
		return http.StatusServiceUnavailable, outcome{issues: []issue{{Severity: "error", Code: "transient",
			Diagnostics: "the notification could not be stored; send it again later"}}}
	}
}

// issues summarises a success. Some servers reject a hook response that is
// not a FHIR resource (HAPI refused "{}"), so there is always an
// OperationOutcome with at least one issue.
func (r result) issues() []issue {
	var parts []string
	if r.offered > 0 {
		parts = append(parts, fmt.Sprintf("%d of %d resources accepted, %d rejected", r.receipt.Accepted, r.offered, len(r.receipt.Rejected)))
	}
	if r.fetch > 0 {
		parts = append(parts, fmt.Sprintf("%d references queued for reading", r.fetch))
	}
	if r.unusable > 0 {
		parts = append(parts, fmt.Sprintf("%d focus references name no readable resource", r.unusable))
	}
	if r.changed {
		parts = append(parts, "change recorded; the service will search for it")
	}
	if r.status {
		parts = append(parts, fmt.Sprintf("%s notification status recorded", r.ntype))
	}
	if len(parts) == 0 {
		parts = append(parts, "nothing to do")
	}
	out := []issue{{Severity: "information", Code: "informational", Diagnostics: strings.Join(parts, "; ")}}
	for _, rj := range r.receipt.Rejected {
		d := fmt.Sprintf("resource %d rejected: %s", rj.Index, rj.Reason)
		if rj.Detail != "" {
			d += ": " + rj.Detail
		}
		out = append(out, issue{Severity: "warning", Code: "processing", Diagnostics: d})
	}
	return out
}

func writeOutcome(w http.ResponseWriter, status int, issues []issue) {
	body, err := json.Marshal(struct {
		ResourceType string  `json:"resourceType"`
		Issue        []issue `json:"issue"`
	}{"OperationOutcome", issues})
	if err != nil {
		// Marshalling strings and ints cannot fail; keep the status anyway.
		body = []byte(`{"resourceType":"OperationOutcome","issue":[{"severity":"error","code":"exception"}]}`)
	}
	w.Header().Set("Content-Type", "application/fhir+json; charset=utf-8")
	w.WriteHeader(status)
	_, _ = w.Write(body)
}
