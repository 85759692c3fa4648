package client

import (
	"github.com/deadspace-fhir/deadspace/fhir/jsonscan"
)

// requestBundleJSON is what inspectRequestBundle reads of a request
// Bundle, by encoding/json's rules.
type requestBundleJSON struct {
	ResourceType string             `json:"resourceType"`
	Type         string             `json:"type"`
	Entry        []requestEntryJSON `json:"entry"`
}

type requestEntryJSON struct {
	Request *requestJSON `json:"request"`
}

type requestJSON struct {
	Method      string `json:"method"`
	IfNoneExist string `json:"ifNoneExist"`
}

// The member names inspectFast reads, in the order its functions index.
var (
	bundleNames  = [...]string{"resourceType", "type", "entry"}
	entryNames   = [...]string{"request"}
	requestNames = [...]string{"method", "ifNoneExist"}
	metaNames    = [...]string{"resourceType", "id", "meta"}
	versionNames = [...]string{"versionId", "lastUpdated"}
)

// noInspectFast makes inspectRequestBundle and resourceTypeOf take
// encoding/json's path, so tests can compare the two.
var noInspectFast = false

// inspectFast fills b in one jsonscan pass over a plain request Bundle,
// which the outbox writer sends for every write, instead of encoding/json's
// validating pass and reflective one. It reports false, leaving b partly
// filled, for anything where encoding/json's result is not certain to be
// its own: a member whose name differs from a field's only in case or is
// not ASCII (encoding/json folds case), a member given twice, a null, a
// member of another JSON type than the field's, and text that is not
// JSON; the caller then decodes with encoding/json.
// FuzzInspectRequestBundleAgainstJSON compares the two.
func inspectFast(body []byte, b *requestBundleJSON) bool {
	var s jsonscan.Scanner
	s.Reset(body)
	str := func(dst *string) bool { return scanString(&s, dst) }
	request := func(r *requestJSON) bool {
		return s.Members(requestNames[:], func(i int) bool {
			if i == 0 {
				return str(&r.Method)
			}
			return str(&r.IfNoneExist)
		})
	}
	entries := func() bool {
		if s.Peek() != jsonscan.Array || s.Array() != nil {
			return false
		}
		b.Entry = []requestEntryJSON{} // as encoding/json fills an empty array
		for first := true; ; first = false {
			more, err := s.Elem(first)
			switch {
			case err != nil:
				return false
			case !more:
				return true
			}
			b.Entry = append(b.Entry, requestEntryJSON{})
			e := &b.Entry[len(b.Entry)-1]
			if !s.Members(entryNames[:], func(int) bool {
				e.Request = new(requestJSON)
				return request(e.Request)
			}) {
				return false
			}
		}
	}
	return s.Members(bundleNames[:], func(i int) bool {
		switch i {
		case 0:
			return str(&b.ResourceType)
		case 1:
			return str(&b.Type)
		}
		return entries()
	}) && s.End() == nil
}

// metaFast fills m as inspectFast fills a request Bundle, for
// resourceTypeOf, which reads every resource the writer sends or is
// answered with one at a time.
func metaFast(body []byte, m *wireMeta) bool {
	var s jsonscan.Scanner
	s.Reset(body)
	return s.Members(metaNames[:], func(i int) bool {
		switch i {
		case 0:
			return scanString(&s, &m.ResourceType)
		case 1:
			return scanString(&s, &m.ID)
		}
		m.Meta = &struct {
			VersionID   string `json:"versionId"`
			LastUpdated string `json:"lastUpdated"`
		}{}
		return s.Members(versionNames[:], func(i int) bool {
			if i == 0 {
				return scanString(&s, &m.Meta.VersionID)
			}
			return scanString(&s, &m.Meta.LastUpdated)
		})
	}) && s.End() == nil
}

// scanString reads a string into dst; any other value (null included)
// is false.
func scanString(s *jsonscan.Scanner, dst *string) bool {
	if s.Peek() != jsonscan.String {
		return false
	}
	text, raw, err := s.Str()
	*dst = jsonscan.Unquote(text, raw)
	return err == nil
}
