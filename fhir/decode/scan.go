package decode

import (
	"bytes"

	"github.com/deadspace-fhir/deadspace/fhir/jsonscan"
)

// The prefilter: one pass over the raw bytes that validates the JSON exactly
// as encoding/json does (json.Valid, including its nesting limit; the pass
// is jsonscan's), finds the top-level resourceType and id, and notes
// whether any string value of a member named "code" (at any depth) is one
// of the table's codes. It decodes only the few strings it must compare,
// so a line of an unrelated Observation costs one scan and one allocation,
// its id (which lets a caller see that it holds an earlier version of the
// resource: Decoder.Recoded).
//
// It never drops a relevant line: the full decode finds codings through
// encoding/json, which matches member names case-insensitively, so member
// names are compared with bytes.EqualFold as encoding/json does; names and
// code values containing an escape or a non-ASCII byte are decoded as
// encoding/json decodes them before they are compared.

// maxDepth is encoding/json's nesting limit (scanner.go, maxNestingDepth).
const maxDepth = jsonscan.MaxDepth

type scanResult struct {
	// object is true when the top-level value is an object.
	object bool
	// rt is the last top-level "resourceType" string; rtBad is set when any
	// top-level "resourceType" is not a string.
	rt    []byte
	hasRT bool
	rtBad bool
	// candidate is true when some "code" member's string value is in the
	// code set.
	candidate bool
	// id is the text of the one top-level member spelled "id", a string
	// (idRaw: as written, without escapes), when idPlain; idPlain is
	// false when encoding/json could read the id otherwise (no such
	// member, another spelling it matches ignoring case, a repeat, a
	// value that is not a string).
	id      []byte
	idRaw   bool
	idPlain bool
	idSeen  bool
}

type scanner struct {
	s     jsonscan.Scanner
	codes map[string]struct{}
	res   scanResult
}

// Roles of the value being scanned.
const (
	roleNone = iota
	roleCode
	roleResourceType
	roleID
)

// scan checks line and gathers what the decoder needs to choose a path.
func scan(line []byte, codeSet map[string]struct{}) (scanResult, error) {
	s := scanner{codes: codeSet}
	s.s.Reset(line)
	if s.s.Peek() == jsonscan.Object {
		s.res.object = true
		if err := s.object(true); err != nil {
			return scanResult{}, err
		}
	} else if _, err := s.s.Skip(); err != nil {
		return scanResult{}, err
	}
	if err := s.s.End(); err != nil {
		return scanResult{}, err
	}
	return s.res, nil
}

func (s *scanner) value(role int) error {
	k := s.s.Peek()
	if role == roleResourceType && k != jsonscan.String {
		s.res.rtBad = true
	}
	if role == roleID && k != jsonscan.String {
		s.res.idPlain = false
	}
	switch k {
	case jsonscan.Object:
		return s.object(false)
	case jsonscan.Array:
		return s.array()
	case jsonscan.String:
		text, raw, err := s.s.Str()
		if err != nil {
			return err
		}
		switch role {
		case roleCode:
			s.checkCode(text, raw)
		case roleResourceType:
			s.res.rt, s.res.hasRT = text, true
			if !raw {
				s.res.rt = []byte(jsonscan.Unquote(text, raw))
			}
		case roleID:
			s.res.id, s.res.idRaw = text, raw
		}
		return nil
	}
	_, err := s.s.Skip()
	return err
}

func (s *scanner) checkCode(text []byte, raw bool) {
	if s.res.candidate {
		return
	}
	if !raw {
		text = []byte(jsonscan.Unquote(text, raw))
	}
	if _, ok := s.codes[string(text)]; ok {
		s.res.candidate = true
	}
}

var (
	codeName = []byte("code")
	idName   = []byte("id")
)

func (s *scanner) object(top bool) error {
	if err := s.s.Object(); err != nil {
		return err
	}
	for first := true; ; first = false {
		name, more, err := s.s.Member(first)
		if err != nil || !more {
			return err
		}
		role := roleNone
		switch {
		case top && string(name) == "resourceType":
			role = roleResourceType
		case top && len(name) <= 8 && bytes.EqualFold(name, idName):
			// encoding/json takes the last member it matches ignoring
			// case; only one spelled exactly so is read here.
			role = roleID
			s.res.idPlain = !s.res.idSeen && string(name) == "id"
			s.res.idSeen = true
		case len(name) <= 16 && bytes.EqualFold(name, codeName):
			role = roleCode
		}
		if err := s.value(role); err != nil {
			return err
		}
	}
}

func (s *scanner) array() error {
	if err := s.s.Array(); err != nil {
		return err
	}
	for first := true; ; first = false {
		more, err := s.s.Elem(first)
		if err != nil || !more {
			return err
		}
		if err := s.value(roleNone); err != nil {
			return err
		}
	}
}
