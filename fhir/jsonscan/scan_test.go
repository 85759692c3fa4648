package jsonscan_test

import (
	"encoding/json"
	"strings"
	"testing"

	"github.com/deadspace-fhir/deadspace/fhir/jsonscan"
)

// walk reads one whole text through the Scanner's structural calls, as a
// caller would, decoding every string and member name.
func walk(data []byte) (strs []string, err error) {
	var s jsonscan.Scanner
	s.Reset(data)
	var value func() error
	value = func() error {
		switch s.Peek() {
		case jsonscan.Object:
			if err := s.Object(); err != nil {
				return err
			}
			for first := true; ; first = false {
				name, more, err := s.Member(first)
				if err != nil || !more {
					return err
				}
				strs = append(strs, string(name))
				if err := value(); err != nil {
					return err
				}
			}
		case jsonscan.Array:
			if err := s.Array(); err != nil {
				return err
			}
			for first := true; ; first = false {
				more, err := s.Elem(first)
				if err != nil || !more {
					return err
				}
				if err := value(); err != nil {
					return err
				}
			}
		case jsonscan.String:
			text, raw, err := s.Str()
			if err != nil {
				return err
			}
			strs = append(strs, jsonscan.Unquote(text, raw))
			return nil
		default:
			_, err := s.Skip()
			return err
		}
	}
	if err := value(); err != nil {
		return nil, err
	}
	return strs, s.End()
}

func TestScannerAgreesWithEncodingJSON(t *testing.T) {
	t.Parallel()
	for _, tc := range []struct{ name, in string }{
		{"empty", ``},
		{"space only", "  \n"},
		{"object", `{"a":1,"b":[true,false,null,"x\u00e9\n"],"c":{}}`},
		{"trailing comma in object", `{"a":1,}`},
		{"trailing comma in array", `[1,]`},
		{"leading comma", `[,1]`},
		{"missing colon", `{"a" 1}`},
		{"missing comma", `{"a":1 "b":2}`},
		{"leading zero", `01`},
		{"bare minus", `-`},
		{"fraction without digits", `1.`},
		{"exponent without digits", `1e+`},
		{"control character", "\"a\tb\""},
		{"bad escape", `"\x"`},
		{"short unicode escape", `"\u12"`},
		{"invalid utf-8", "\"\xff\""},
		{"lone surrogate", `"\ud800"`},
		{"data after value", `{} {}`},
		{"bad literal", `nul`},
		{"deep but allowed", strings.Repeat("[", jsonscan.MaxDepth) + strings.Repeat("]", jsonscan.MaxDepth)},
		{"too deep", strings.Repeat("[", jsonscan.MaxDepth+1) + strings.Repeat("]", jsonscan.MaxDepth+1)},
		{"escaped member name", `{"resource\u0054ype":"x"}`},
	} {
		t.Run(tc.name, func(t *testing.T) { agree(t, []byte(tc.in)) })
	}
}

func FuzzScanner(f *testing.F) {
	for _, s := range []string{`{"a":[1,2.5e3,-0,"\u00e9"],"b":null}`, `[{"x":"\ud83d\ude00"}]`, "\"\xff\"", `{"a":}`, `[[[]]]`} {
		f.Add([]byte(s))
	}
	f.Fuzz(func(t *testing.T, data []byte) { agree(t, data) })
}

func agree(t *testing.T, data []byte) {
	t.Helper()
	strs, err := walk(data)
	if valid := json.Valid(data); valid != (err == nil) {
		t.Fatalf("encoding/json says valid=%v, scanner says %v", valid, err)
	}
	if err != nil {
		return
	}
	// Every decoded string and name must be what encoding/json gives.
	var want []string
	dec := json.NewDecoder(strings.NewReader(string(data)))
	for {
		tok, err := dec.Token()
		if err != nil {
			break
		}
		if s, ok := tok.(string); ok {
			want = append(want, s)
		}
	}
	if len(want) != len(strs) {
		t.Fatalf("%d strings, encoding/json %d", len(strs), len(want))
	}
	for i := range want {
		if want[i] != strs[i] {
			t.Fatalf("string %d is %q, encoding/json %q", i, strs[i], want[i])
		}
	}
}

// Members reads only what encoding/json would read the same way: a name
// encoding/json could match by folding case, or a known member twice
// (encoding/json keeps the last), sends the caller back to it.
func TestMembers(t *testing.T) {
	names := []string{"resourceType", "id"}
	for _, tc := range []struct {
		name, doc string
		ok        bool
		seen      string // indexes of the members given to member, in order
	}{
		{"both, in any order", `{"id":"x","resourceType":"Patient"}`, true, "10"},
		{"an unknown member skipped", `{"meta":{"a":[1,2]},"id":"x"}`, true, "1"},
		{"empty object", `{}`, true, ""},
		{"a known member twice", `{"id":"x","id":"y"}`, false, "1"},
		{"a name in another case", `{"ID":"x"}`, false, ""},
		{"a name outside ASCII", `{"ıd":"x"}`, false, ""},
		{"not an object", `["id"]`, false, ""},
		{"malformed", `{"id" "x"}`, false, ""},
	} {
		t.Run(tc.name, func(t *testing.T) {
			var s jsonscan.Scanner
			s.Reset([]byte(tc.doc))
			var seen []byte
			ok := s.Members(names, func(i int) bool {
				seen = append(seen, byte('0'+i))
				_, err := s.Skip()
				return err == nil
			})
			if ok != tc.ok || string(seen) != tc.seen {
				t.Errorf("Members = %v after %q, want %v after %q", ok, seen, tc.ok, tc.seen)
			}
		})
	}
}
