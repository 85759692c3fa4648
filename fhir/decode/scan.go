package decode

import (
	"bytes"
	"encoding/json"
	"errors"
	"fmt"
)

// The prefilter: one pass over the raw bytes that validates the JSON exactly
// as encoding/json does (json.Valid, including its nesting limit), finds the
// top-level resourceType, and notes whether any string value of a member
// named "code" (at any depth) is one of the table's codes. It decodes only
// the few strings it must compare, so a line of an unrelated Observation
// costs one scan and no allocation.
//
// It never drops a relevant line: the full decode finds codings through
// encoding/json, which matches member names case-insensitively, so member
// names are compared with bytes.EqualFold as encoding/json does; names and
// code values containing an escape or a non-ASCII byte are decoded with
// encoding/json before they are compared.

// maxDepth is encoding/json's nesting limit (scanner.go, maxNestingDepth).
const maxDepth = 10000

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
}

type scanner struct {
	b     []byte
	i     int
	depth int
	codes map[string]struct{}
	res   scanResult
}

// Roles of the value being scanned.
const (
	roleNone = iota
	roleCode
	roleResourceType
)

// String flags.
const (
	strEscape = 1 << iota
	strHigh
)

var errEnd = errors.New("unexpected end of JSON")

// scan checks line and gathers what the decoder needs to choose a path.
func scan(line []byte, codeSet map[string]struct{}) (scanResult, error) {
	s := scanner{b: line, codes: codeSet}
	s.skipSpace()
	if s.i < len(s.b) && s.b[s.i] == '{' {
		s.res.object = true
		if err := s.object(true); err != nil {
			return scanResult{}, err
		}
	} else if err := s.value(roleNone); err != nil {
		return scanResult{}, err
	}
	s.skipSpace()
	if s.i != len(s.b) {
		return scanResult{}, s.errorf("data after the top-level value")
	}
	return s.res, nil
}

func (s *scanner) errorf(format string, args ...any) error {
	return fmt.Errorf("invalid JSON at byte %d: %s", s.i, fmt.Sprintf(format, args...))
}

func (s *scanner) skipSpace() {
	for s.i < len(s.b) {
		switch s.b[s.i] {
		case ' ', '\t', '\n', '\r':
			s.i++
		default:
			return
		}
	}
}

func (s *scanner) value(role int) error {
	s.skipSpace()
	if s.i >= len(s.b) {
		return errEnd
	}
	c := s.b[s.i]
	if role == roleResourceType && c != '"' {
		s.res.rtBad = true
	}
	switch {
	case c == '{':
		return s.object(false)
	case c == '[':
		return s.array()
	case c == '"':
		start := s.i
		flags, err := s.str()
		if err != nil {
			return err
		}
		switch role {
		case roleCode:
			s.checkCode(s.b[start:s.i], flags)
		case roleResourceType:
			s.res.rt, s.res.hasRT = s.b[start+1:s.i-1], true
			if flags&strEscape != 0 {
				s.res.rt = s.unquote(s.b[start:s.i])
			}
		}
		return nil
	case c == 't':
		return s.literal("true")
	case c == 'f':
		return s.literal("false")
	case c == 'n':
		return s.literal("null")
	case c == '-' || (c >= '0' && c <= '9'):
		return s.number()
	}
	return s.errorf("unexpected character %q", c)
}

func (s *scanner) literal(lit string) error {
	if !bytes.HasPrefix(s.b[s.i:], []byte(lit)) {
		return s.errorf("invalid literal")
	}
	s.i += len(lit)
	return nil
}

func (s *scanner) number() error {
	b, i := s.b, s.i
	if b[i] == '-' {
		i++
	}
	switch {
	case i >= len(b):
		return errEnd
	case b[i] == '0':
		i++
	case b[i] >= '1' && b[i] <= '9':
		for i++; i < len(b) && b[i] >= '0' && b[i] <= '9'; i++ {
		}
	default:
		s.i = i
		return s.errorf("invalid number")
	}
	if i < len(b) && b[i] == '.' {
		i++
		if i >= len(b) || b[i] < '0' || b[i] > '9' {
			s.i = i
			return s.errorf("invalid number")
		}
		for ; i < len(b) && b[i] >= '0' && b[i] <= '9'; i++ {
		}
	}
	if i < len(b) && (b[i] == 'e' || b[i] == 'E') {
		i++
		if i < len(b) && (b[i] == '+' || b[i] == '-') {
			i++
		}
		if i >= len(b) || b[i] < '0' || b[i] > '9' {
			s.i = i
			return s.errorf("invalid number")
		}
		for ; i < len(b) && b[i] >= '0' && b[i] <= '9'; i++ {
		}
	}
	s.i = i
	return nil
}

// plain marks bytes that need no attention inside a string.
var plain = func() (t [256]bool) {
	for c := 0x20; c < 0x80; c++ {
		t[c] = c != '"' && c != '\\'
	}
	return t
}()

// str scans a string starting at its opening quote and leaves s.i after the
// closing quote.
func (s *scanner) str() (flags int, err error) {
	b := s.b
	i := s.i + 1
	for {
		for i < len(b) && plain[b[i]] {
			i++
		}
		if i >= len(b) {
			s.i = i
			return 0, errEnd
		}
		switch c := b[i]; {
		case c == '"':
			s.i = i + 1
			return flags, nil
		case c == '\\':
			flags |= strEscape
			if i+1 >= len(b) {
				s.i = i
				return 0, errEnd
			}
			switch b[i+1] {
			case '"', '\\', '/', 'b', 'f', 'n', 'r', 't':
				i += 2
			case 'u':
				if i+6 > len(b) {
					s.i = i
					return 0, errEnd
				}
				for _, h := range b[i+2 : i+6] {
					if !isHex(h) {
						s.i = i
						return 0, s.errorf("invalid \\u escape")
					}
				}
				i += 6
			default:
				s.i = i
				return 0, s.errorf("invalid escape")
			}
		case c < 0x20:
			s.i = i
			return 0, s.errorf("control character in string")
		default:
			flags |= strHigh
			i++
		}
	}
}

func isHex(c byte) bool {
	return (c >= '0' && c <= '9') || (c >= 'a' && c <= 'f') || (c >= 'A' && c <= 'F')
}

// unquote decodes a scanned JSON string (quotes included) as encoding/json
// would, replacing invalid UTF-8 with U+FFFD. The scanner has checked the
// string, so failure is not expected; if it happens the line is sent to the
// full decode rather than risk dropping it.
func (s *scanner) unquote(q []byte) []byte {
	var v string
	if err := json.Unmarshal(q, &v); err != nil {
		s.res.candidate = true
		return q
	}
	return []byte(v)
}

func (s *scanner) checkCode(q []byte, flags int) {
	if s.res.candidate {
		return
	}
	raw := q[1 : len(q)-1]
	if flags != 0 {
		raw = s.unquote(q)
	}
	if _, ok := s.codes[string(raw)]; ok {
		s.res.candidate = true
	}
}

var codeName = []byte("code")

func (s *scanner) object(top bool) error {
	s.depth++
	if s.depth > maxDepth {
		return s.errorf("exceeded max depth")
	}
	s.i++
	s.skipSpace()
	if s.i < len(s.b) && s.b[s.i] == '}' {
		s.i++
		s.depth--
		return nil
	}
	for {
		s.skipSpace()
		if s.i >= len(s.b) {
			return errEnd
		}
		if s.b[s.i] != '"' {
			return s.errorf("expected a member name")
		}
		start := s.i
		flags, err := s.str()
		if err != nil {
			return err
		}
		name := s.b[start+1 : s.i-1]
		if flags&strEscape != 0 {
			name = s.unquote(s.b[start:s.i])
		}
		role := roleNone
		switch {
		case top && string(name) == "resourceType":
			role = roleResourceType
		case len(name) <= 16 && bytes.EqualFold(name, codeName):
			role = roleCode
		}
		s.skipSpace()
		if s.i >= len(s.b) {
			return errEnd
		}
		if s.b[s.i] != ':' {
			return s.errorf("expected ':'")
		}
		s.i++
		if err := s.value(role); err != nil {
			return err
		}
		s.skipSpace()
		if s.i >= len(s.b) {
			return errEnd
		}
		switch s.b[s.i] {
		case ',':
			s.i++
		case '}':
			s.i++
			s.depth--
			return nil
		default:
			return s.errorf("expected ',' or '}'")
		}
	}
}

func (s *scanner) array() error {
	s.depth++
	if s.depth > maxDepth {
		return s.errorf("exceeded max depth")
	}
	s.i++
	s.skipSpace()
	if s.i < len(s.b) && s.b[s.i] == ']' {
		s.i++
		s.depth--
		return nil
	}
	for {
		if err := s.value(roleNone); err != nil {
			return err
		}
		s.skipSpace()
		if s.i >= len(s.b) {
			return errEnd
		}
		switch s.b[s.i] {
		case ',':
			s.i++
		case ']':
			s.i++
			s.depth--
			return nil
		default:
			return s.errorf("expected ',' or ']'")
		}
	}
}
