package bulk

import (
	"encoding/json"
	"errors"
	"fmt"
	"strings"
	"time"

	"github.com/deadspace-fhir/deadspace/fhir/ref"
)

// Deletion is one entry of a deleted file: a resource the server deleted.
type Deletion struct {
	// Type and ID name the resource.
	Type, ID string
	// At is when it was deleted, when the entry says so
	// (entry.response.lastModified); zero when it does not.
	At time.Time
}

// Ref is the resource's relative reference, "Type/id".
func (d Deletion) Ref() string { return d.Type + "/" + d.ID }

// ErrNotDeletions marks a line that is not a Bundle of deletions at all:
// not JSON, not a Bundle, a Bundle of another type than transaction or
// batch, or one with no DELETE entry.
var ErrNotDeletions = errors.New("not a transaction Bundle of DELETE entries")

// EntryError is an entry of a Bundle of deletions that cannot be applied.
// Its text says what is wrong with the entry, by its position, and never
// quotes the resource's id.
type EntryError struct {
	Entry   int // from 0, as Bundle.entry[n]
	Problem string
}

func (e *EntryError) Error() string { return fmt.Sprintf("entry[%d]: %s", e.Entry, e.Problem) }

type wireDeletions struct {
	ResourceType string `json:"resourceType"`
	Type         string `json:"type"`
	Entry        []struct {
		FullURL string `json:"fullUrl"`
		Request *struct {
			Method string `json:"method"`
			URL    string `json:"url"`
		} `json:"request"`
		Response *struct {
			LastModified *string `json:"lastModified"`
		} `json:"response"`
	} `json:"entry"`
}

// ParseDeletions reads one line of a deleted file (Bulk Data Access IG
// 2.0.0, "deleted": each line a Bundle of type transaction whose entries
// have request.method DELETE and request.url naming the resource). A
// batch Bundle is read the same way. The resource is the one request.url
// names, relative or absolute on any base (a version is dropped), or its
// fullUrl when the url names none (a conditional delete), as the webhook
// reads a DELETE entry; response.lastModified, when present, is when it
// was deleted.
//
// It returns the entries that can be applied and an error for the rest:
// one wrapping [ErrNotDeletions] when the line is not such a Bundle (then
// nothing is returned), or else the [EntryError] of each entry that
// cannot be applied, joined. Error texts never quote an id.
func ParseDeletions(line []byte) ([]Deletion, error) {
	var w wireDeletions
	if err := json.Unmarshal(line, &w); err != nil {
		return nil, fmt.Errorf("%w: the line is not a JSON object of that shape", ErrNotDeletions)
	}
	switch {
	case w.ResourceType != "Bundle":
		return nil, fmt.Errorf("%w: its resourceType is not Bundle", ErrNotDeletions)
	case w.Type != "transaction" && w.Type != "batch":
		return nil, fmt.Errorf("%w: its type is %q", ErrNotDeletions, clip(w.Type))
	}
	deletes := 0
	for _, e := range w.Entry {
		if e.Request != nil && strings.EqualFold(e.Request.Method, "DELETE") {
			deletes++
		}
	}
	if deletes == 0 {
		return nil, fmt.Errorf("%w: none of its %d entries is a DELETE request", ErrNotDeletions, len(w.Entry))
	}
	var out []Deletion
	var errs []error
	for i, e := range w.Entry {
		switch {
		case e.Request == nil:
			errs = append(errs, &EntryError{Entry: i, Problem: "it has no request"})
			continue
		case !strings.EqualFold(e.Request.Method, "DELETE"):
			errs = append(errs, &EntryError{Entry: i, Problem: fmt.Sprintf("request.method is %q, not DELETE", clip(e.Request.Method))})
			continue
		}
		target, ok := ref.DeleteTarget(e.Request.URL, e.FullURL)
		d := Deletion{Type: target.Type, ID: target.ID}
		if !ok {
			errs = append(errs, &EntryError{Entry: i, Problem: "neither request.url nor fullUrl names a resource (Type/id)"})
			continue
		}
		if e.Response != nil && e.Response.LastModified != nil {
			t, err := parseInstant(*e.Response.LastModified)
			if err != nil || t.IsZero() {
				errs = append(errs, &EntryError{Entry: i, Problem: "response.lastModified is not a FHIR instant"})
				continue
			}
			d.At = t
		}
		out = append(out, d)
	}
	return out, errors.Join(errs...)
}
