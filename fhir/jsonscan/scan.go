// Package jsonscan reads JSON text in place: one validating pass that hands
// back the raw bytes of values and member names without decoding them into
// Go values, so a caller can pick out the few members it needs and pass the
// rest on as slices of the original text.
//
// It accepts exactly the texts encoding/json accepts (RFC 8259, with
// encoding/json's nesting limit of 10,000), so a value it hands on can always
// be decoded by encoding/json, and strings it decodes itself are decoded as
// encoding/json would (invalid UTF-8 becomes U+FFFD).
//
// Typical use walks an object member by member:
//
//	if err := s.Object(); err != nil { ... }
//	for first := true; ; first = false {
//		name, more, err := s.Member(first)
//		if err != nil || !more { ... }
//		// read or skip the member's value
//	}
package jsonscan

import (
	"bytes"
	"encoding/json"
	"fmt"
)

// MaxDepth is encoding/json's nesting limit (scanner.go, maxNestingDepth).
const MaxDepth = 10000

// Kind is the kind of a JSON value, named as encoding/json names them in an
// UnmarshalTypeError.
type Kind byte

// Kinds. Invalid is what Peek answers where no value can start.
const (
	Invalid Kind = iota
	Null
	Bool
	Number
	String
	Array
	Object
)

func (k Kind) String() string {
	switch k {
	case Null:
		return "null"
	case Bool:
		return "bool"
	case Number:
		return "number"
	case String:
		return "string"
	case Array:
		return "array"
	case Object:
		return "object"
	}
	return "invalid value"
}

// SyntaxError is a text that is not JSON. Offset is where the scanner
// stopped, which need not be where encoding/json would report the error.
type SyntaxError struct {
	Offset int
	msg    string
}

func (e *SyntaxError) Error() string {
	return fmt.Sprintf("invalid JSON at byte %d: %s", e.Offset, e.msg)
}

// Scanner reads one JSON text. The zero value reads an empty text; use
// Reset to start on another.
type Scanner struct {
	data  []byte
	pos   int
	depth int
}

// Reset starts reading data from its beginning.
func (s *Scanner) Reset(data []byte) { *s = Scanner{data: data} }

// Pos is the offset of the next byte to read.
func (s *Scanner) Pos() int { return s.pos }

func (s *Scanner) fail(msg string) error { return &SyntaxError{Offset: s.pos, msg: msg} }

func (s *Scanner) end() error { return s.fail("unexpected end of JSON input") }

func (s *Scanner) skipSpace() {
	for s.pos < len(s.data) {
		switch s.data[s.pos] {
		case ' ', '\t', '\n', '\r':
			s.pos++
		default:
			return
		}
	}
}

// Peek skips white space and says what kind of value starts there, without
// reading it.
func (s *Scanner) Peek() Kind {
	s.skipSpace()
	if s.pos >= len(s.data) {
		return Invalid
	}
	switch c := s.data[s.pos]; {
	case c == '{':
		return Object
	case c == '[':
		return Array
	case c == '"':
		return String
	case c == 't' || c == 'f':
		return Bool
	case c == 'n':
		return Null
	case c == '-' || (c >= '0' && c <= '9'):
		return Number
	}
	return Invalid
}

// End checks that only white space is left.
func (s *Scanner) End() error {
	s.skipSpace()
	if s.pos != len(s.data) {
		return s.fail("data after the top-level value")
	}
	return nil
}

// Skip reads one value, checking it, and returns its text (without the
// white space around it).
func (s *Scanner) Skip() ([]byte, error) {
	s.skipSpace()
	start := s.pos
	if err := s.value(); err != nil {
		return nil, err
	}
	return s.data[start:s.pos:s.pos], nil
}

func (s *Scanner) value() error {
	if s.pos >= len(s.data) {
		return s.end()
	}
	switch c := s.data[s.pos]; {
	case c == '{':
		return s.skipObject()
	case c == '[':
		return s.skipArray()
	case c == '"':
		_, _, err := s.Str()
		return err
	case c == 't':
		return s.literal("true")
	case c == 'f':
		return s.literal("false")
	case c == 'n':
		return s.literal("null")
	case c == '-' || (c >= '0' && c <= '9'):
		return s.number()
	}
	return s.fail("unexpected character")
}

func (s *Scanner) skipObject() error {
	if err := s.Object(); err != nil {
		return err
	}
	for first := true; ; first = false {
		_, more, err := s.Member(first)
		if err != nil || !more {
			return err
		}
		s.skipSpace()
		if err := s.value(); err != nil {
			return err
		}
	}
}

func (s *Scanner) skipArray() error {
	if err := s.Array(); err != nil {
		return err
	}
	for first := true; ; first = false {
		more, err := s.Elem(first)
		if err != nil || !more {
			return err
		}
		if err := s.value(); err != nil {
			return err
		}
	}
}

func (s *Scanner) literal(lit string) error {
	if !bytes.HasPrefix(s.data[s.pos:], []byte(lit)) {
		return s.fail("invalid literal")
	}
	s.pos += len(lit)
	return nil
}

func (s *Scanner) number() error {
	b, i := s.data, s.pos
	if b[i] == '-' {
		i++
	}
	switch {
	case i >= len(b):
		s.pos = i
		return s.end()
	case b[i] == '0':
		i++
	case b[i] >= '1' && b[i] <= '9':
		for i++; i < len(b) && b[i] >= '0' && b[i] <= '9'; i++ {
		}
	default:
		s.pos = i
		return s.fail("invalid number")
	}
	if i < len(b) && b[i] == '.' {
		i++
		if i >= len(b) || b[i] < '0' || b[i] > '9' {
			s.pos = i
			return s.fail("invalid number")
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
			s.pos = i
			return s.fail("invalid number")
		}
		for ; i < len(b) && b[i] >= '0' && b[i] <= '9'; i++ {
		}
	}
	s.pos = i
	return nil
}

// plain marks bytes that need no attention inside a string.
var plain = func() (t [256]bool) {
	for c := 0x20; c < 0x80; c++ {
		t[c] = c != '"' && c != '\\'
	}
	return t
}()

// Str reads a string, which must start at the next non-space byte, and
// returns its text between the quotes. raw is false when the text holds an
// escape or a byte outside ASCII, and so must go through [Unquote] before
// use.
func (s *Scanner) Str() (text []byte, raw bool, err error) {
	s.skipSpace()
	b := s.data
	if s.pos >= len(b) || b[s.pos] != '"' {
		return nil, false, s.fail("expected a string")
	}
	start := s.pos + 1
	i := start
	raw = true
	for {
		for i < len(b) && plain[b[i]] {
			i++
		}
		if i >= len(b) {
			s.pos = i
			return nil, false, s.end()
		}
		switch c := b[i]; {
		case c == '"':
			s.pos = i + 1
			return b[start:i:i], raw, nil
		case c == '\\':
			raw = false
			if i+1 >= len(b) {
				s.pos = i
				return nil, false, s.end()
			}
			switch b[i+1] {
			case '"', '\\', '/', 'b', 'f', 'n', 'r', 't':
				i += 2
			case 'u':
				if i+6 > len(b) {
					s.pos = i
					return nil, false, s.end()
				}
				for _, h := range b[i+2 : i+6] {
					if !isHex(h) {
						s.pos = i
						return nil, false, s.fail("invalid \\u escape")
					}
				}
				i += 6
			default:
				s.pos = i
				return nil, false, s.fail("invalid escape")
			}
		case c < 0x20:
			s.pos = i
			return nil, false, s.fail("control character in string")
		default:
			raw = false
			i++
		}
	}
}

func isHex(c byte) bool {
	return (c >= '0' && c <= '9') || (c >= 'a' && c <= 'f') || (c >= 'A' && c <= 'F')
}

// Unquote turns a string's text, as [Scanner.Str] returned it, into a Go
// string as encoding/json decodes it.
func Unquote(text []byte, raw bool) string {
	if raw {
		return string(text)
	}
	// The scanner has checked the string; encoding/json decodes its escapes
	// and replaces invalid UTF-8, which is rare enough not to repeat here.
	q := make([]byte, 0, len(text)+2)
	q = append(append(append(q, '"'), text...), '"')
	var v string
	if err := json.Unmarshal(q, &v); err != nil {
		return string(text)
	}
	return v
}

// Object reads the opening brace of an object, which must start at the next
// non-space byte.
func (s *Scanner) Object() error { return s.open('{') }

// Array reads the opening bracket of an array, which must start at the next
// non-space byte.
func (s *Scanner) Array() error { return s.open('[') }

func (s *Scanner) open(c byte) error {
	s.skipSpace()
	if s.pos >= len(s.data) || s.data[s.pos] != c {
		return s.fail("expected " + string(c))
	}
	s.depth++
	if s.depth > MaxDepth {
		return s.fail("exceeded max depth")
	}
	s.pos++
	return nil
}

// Member reads up to the next member's value: the separator before it
// (first says whether one is expected), its name and the colon. It returns
// more=false, having read the closing brace, when the object ends. The name
// is its text between the quotes when it holds neither escapes nor bytes
// outside ASCII, and otherwise its decoded form.
func (s *Scanner) Member(first bool) (name []byte, more bool, err error) {
	s.skipSpace()
	if s.pos >= len(s.data) {
		return nil, false, s.end()
	}
	switch c := s.data[s.pos]; {
	case c == '}':
		s.pos++
		s.depth--
		return nil, false, nil
	case !first && c == ',':
		s.pos++
	case !first:
		return nil, false, s.fail("expected ',' or '}'")
	}
	text, raw, err := s.Str()
	if err != nil {
		return nil, false, err
	}
	if !raw {
		text = []byte(Unquote(text, false))
	}
	s.skipSpace()
	if s.pos >= len(s.data) {
		return nil, false, s.end()
	}
	if s.data[s.pos] != ':' {
		return nil, false, s.fail("expected ':'")
	}
	s.pos++
	return text, true, nil
}

// Elem reads up to the next element of an array: the separator before it,
// when first is false. It returns more=false, having read the closing
// bracket, when the array ends.
func (s *Scanner) Elem(first bool) (more bool, err error) {
	s.skipSpace()
	if s.pos >= len(s.data) {
		return false, s.end()
	}
	switch c := s.data[s.pos]; {
	case c == ']':
		s.pos++
		s.depth--
		return false, nil
	case !first && c == ',':
		s.pos++
		s.skipSpace()
	case !first:
		return false, s.fail("expected ',' or ']'")
	}
	return true, nil
}

// Members reads an object the way a fast path held to encoding/json must:
// member is called with the index in names of each member spelled exactly
// so, and other members are skipped. It reports false for a value that is
// not an object, malformed JSON, a known member given twice, a member whose
// name encoding/json might match to one of names although it is not spelled
// exactly so (an ASCII name equal to one ignoring case, or any name outside
// ASCII, where Unicode case folding is not worth repeating), or when member
// reports false; the caller then falls back to encoding/json. names holds at
// most 32 names.
func (s *Scanner) Members(names []string, member func(i int) bool) bool {
	if s.Peek() != Object || s.Object() != nil {
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
		i := nameIndex(names, name)
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

func nameIndex(names []string, name []byte) int {
	for i, n := range names {
		if string(name) == n {
			return i
		}
	}
	return -1
}

func foldsToName(names []string, name []byte) bool {
	for _, c := range name {
		if c >= 0x80 {
			return true
		}
	}
	for _, n := range names {
		if len(n) == len(name) && asciiEqualFold(n, name) {
			return true
		}
	}
	return false
}

func asciiEqualFold(a string, b []byte) bool {
	for i := range len(a) {
		if asciiLower(a[i]) != asciiLower(b[i]) {
			return false
		}
	}
	return true
}

func asciiLower(c byte) byte {
	if 'A' <= c && c <= 'Z' {
		return c + 'a' - 'A'
	}
	return c
}
