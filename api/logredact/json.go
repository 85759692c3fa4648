package logredact

import (
	"regexp"
	"strings"
)

// JSON inside text is redacted by a small scanner rather than by patterns,
// so that a value's end is found however deeply the JSON was quoted: plain
// ({"id":"x"}), quoted once ({\"id\":\"x\"}) or more, with escaped quotes
// inside the value, or cut short by a prefix limit.

// memberKeys are JSON members whose string or number value is removed.
var memberKeys = keySet(
	"id", "reference", "patient", "subject", "encounter", "focus", "fullUrl", "value",
	"birthDate", "versionId", "family", "given", "identifier", "display", "div", "location",
	"mrn", "patientId", "patient_id", "resourceId", "resource_id", "logicalId",
)

// spanKeys are JSON members whose object or array value is removed whole
// (every string and number in it; the member names stay): a HumanName, a
// Reference with its display, an Identifier, contact details.
var spanKeys = keySet(
	"name", "given", "subject", "patient", "encounter", "focus", "performer", "author",
	"requester", "recorder", "asserter", "identifier", "telecom", "address", "contact", "link",
	"generalPractitioner", "beneficiary", "individual", "actor", "who", "for", "owner", "sender",
	"recipient", "participant", "subscriber", "policyHolder", "basedOn", "partOf", "hasMember",
	"derivedFrom", "specimen", "context", "contained",
)

// jsonKey is a member name: n backslashes, a quote, the name, the same
// backslashes, a quote and a colon.
var jsonKey = regexp.MustCompile(`(\\*)"([A-Za-z_][A-Za-z0-9_]*)(\\*)"[ \t\r\n]*:[ \t\r\n]*`)

// markJSON adds the values of identifying members of any JSON in s.
// After each member it looks for the next one from inside the value, not
// after it: in text that is not JSON, what looked like a value may hold a
// member (" {"id":"x"}), and an object holds members quoted more deeply.
func markJSON(r *ranges, s string) {
	if !strings.Contains(s, `"`) || !strings.Contains(s, ":") {
		return
	}
	for pos := 0; pos < len(s); {
		m := jsonKey.FindStringSubmatchIndex(s[pos:])
		if m == nil {
			break
		}
		offset(m, pos)
		n := m[3] - m[2]
		key := strings.ToLower(s[m[4]:m[5]])
		v := m[1] // where the value starts
		pos = v
		if m[7]-m[6] != n || v >= len(s) {
			continue
		}
		switch c := s[v]; {
		case c == '\\' || c == '"':
			if !memberKeys[key] || !strings.HasPrefix(s[v:], strings.Repeat(`\`, n)+`"`) {
				continue
			}
			from := v + n + 1
			to, _ := stringEnd(s, from, n)
			r.add(from, to)
			pos = from
		case c == '-' || c >= '0' && c <= '9':
			if !memberKeys[key] {
				continue
			}
			end := numberEnd(s, v)
			r.add(v, end)
			pos = end
		case c == '[' || c == '{':
			if !spanKeys[key] {
				continue
			}
			markValues(r, s, v, spanEnd(s, v, n), n)
			pos = v + 1
		}
	}
}

// backslashesBefore counts the backslashes that end s[:i].
func backslashesBefore(s string, i int) int {
	k := 0
	for i-k > 0 && s[i-k-1] == '\\' {
		k++
	}
	return k
}

// closes reports whether a quote after k backslashes ends a string quoted
// with n: at n = 0 an even number (\\" is an escaped backslash and the end),
// at n = 1 one or five (\\\" is an inner escaped quote), and so on.
func closes(k, n int) bool {
	return k == n || k > n && (k-n)%(2*(n+1)) == 0
}

// stringEnd finds the end of a string whose content starts at from and
// whose quotes carry n backslashes: to is where the closing backslashes
// start, end is after the quote. A quote of a shallower level, or the end of
// s, ends it too (the JSON was cut short).
func stringEnd(s string, from, n int) (to, end int) {
	for j := from; j < len(s); j++ {
		if s[j] != '"' {
			continue
		}
		k := backslashesBefore(s[from:], j-from)
		if k < n {
			return j - k, j - k
		}
		if closes(k, n) {
			return j - n, j + 1
		}
	}
	return len(s), len(s)
}

func numberEnd(s string, i int) int {
	for i < len(s) && strings.IndexByte("+-.0123456789eE", s[i]) >= 0 {
		i++
	}
	return i
}

// spanEnd finds the end of the object or array that starts at i.
func spanEnd(s string, i, n int) int {
	depth := 0
	for j := i; j < len(s); j++ {
		switch s[j] {
		case '[', '{':
			depth++
		case ']', '}':
			depth--
			if depth == 0 {
				return j + 1
			}
		case '"':
			k := backslashesBefore(s, j)
			if k < n {
				return j - k
			}
			if k != n {
				continue
			}
			_, end := stringEnd(s, j+1, n)
			j = end - 1
		}
	}
	return len(s)
}

// markValues adds every string that is not a member name, and every
// number, in the JSON span s[from:to] to r.
func markValues(r *ranges, s string, from, to, n int) {
	prev := byte('[') // the last byte outside strings that is not a space
	for j := from; j < to; j++ {
		c := s[j]
		switch {
		case c == '"' && backslashesBefore(s[from:], j-from) == n:
			to2, end := stringEnd(s[:to], j+1, n)
			after := strings.TrimLeft(s[end:to], " \t\r\n")
			if !strings.HasPrefix(after, ":") {
				r.add(j+1, to2)
			}
			j = end - 1
			prev = '"'
		case (c == '-' || c >= '0' && c <= '9') && strings.IndexByte(":[,", prev) >= 0:
			end := numberEnd(s[:to], j)
			r.add(j, end)
			j = end - 1
			prev = '0'
		case c != ' ' && c != '\t' && c != '\r' && c != '\n' && c != '\\':
			prev = c
		}
	}
}
