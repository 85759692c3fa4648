package client

import (
	"bytes"

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
		return scanObject(&s, requestNames[:], func(i int) bool {
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
			if !scanObject(&s, entryNames[:], func(int) bool {
				e.Request = new(requestJSON)
				return request(e.Request)
			}) {
				return false
			}
		}
	}
	return scanObject(&s, bundleNames[:], func(i int) bool {
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
	return scanObject(&s, metaNames[:], func(i int) bool {
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
		return scanObject(&s, versionNames[:], func(i int) bool {
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

// scanObject reads an object, calling member with the index in names of
// each member named exactly so and skipping the others; it reports false
// for a value that is not an object, a repeated member, or a name
// encoding/json might match to one of names by folding case.
func scanObject(s *jsonscan.Scanner, names []string, member func(i int) bool) bool {
	if s.Peek() != jsonscan.Object || s.Object() != nil {
		return false
	}
	var seen uint32
	for first := true; ; first = false {
		name, more, err := s.Member(first)
		switch {
		case err != nil:
			return false
		case !more:
			return true
		}
		i := -1
		for j, n := range names {
			if string(name) == n {
				i = j
				break
			}
		}
		switch {
		case i >= 0 && seen&(1<<i) != 0:
			return false
		case i >= 0:
			seen |= 1 << i
			if !member(i) {
				return false
			}
		case foldsToName(names, name):
			return false
		default:
			if _, err := s.Skip(); err != nil {
				return false
			}
		}
	}
}

// foldsToName says whether name is outside ASCII or equals one of names
// ignoring ASCII case.
func foldsToName(names []string, name []byte) bool {
	for _, c := range name {
		if c >= 0x80 {
			return true
		}
	}
	for _, n := range names {
		if bytes.EqualFold([]byte(n), name) {
			return true
		}
	}
	return false
}
