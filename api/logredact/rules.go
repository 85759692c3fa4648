package logredact

import (
	"cmp"
	"regexp"
	"slices"
	"strings"
)

// Every rule marks the parts of the original text it removes; the parts are
// replaced together at the end. No rule sees another's output, so a rule's
// match cannot hide an identifier from the next (a JSON value that swallowed
// the quote opening a quoted id, say).

// Pieces of the patterns. An id runs to the next delimiter and does not end
// in "." or ":", which are left to the sentence; a separator is a slash,
// also percent-encoded once or twice.
const (
	delims = "\\s/?#&\"'<>()\\[\\]{}|\\\\,;`"
	idTok  = "[^" + delims + "]*[^" + delims + ".:]"
	slash  = "(?:/|%2[Ff]|%252[Ff])"
	// paramValue: a search parameter's value, up to "&" (also encoded) or a
	// space, and the words after a space that hold a digit ("MRN 998877").
	paramValue = `(?:[^&\s%"'#<>]|%(?:[013-9A-Fa-f][0-9A-Fa-f]|2[0-57-9A-Fa-f]))+(?:[ \t]+[^\s&"'<>]*[0-9][^\s&"'<>]*)*`
	// paramName: what may follow a parameter's name, a modifier or a chain
	// ("subject:Patient=", "patient.identifier="), and "=".
	paramName = `((?:(?:[.:]|%3[Aa])[\w\-]+)*)(=|%3[Dd])`
)

var (
	// serverText: the tail of an error after an HTTP status (with its
	// reason phrase or an OAuth error code) or after a quoted response body.
	serverText = regexp.MustCompile(`(?im)\b(?:HTTP \d{3}(?: [A-Za-z][\w' -]*)?|response body): ([^\n]*?)(?: \(after \d+ attempts\))?$`)
	// referenceID: what follows a resource type and a slash: an id of any
	// length, optionally /_history/ and a version.
	referenceID = regexp.MustCompile(`^(` + idTok + `)(?:` + slash + `_history` + slash + idTok + `)?`)
	urnUUIDs    = regexp.MustCompile(`(?i)\burn:uuid:(` + idTok + `)`)
	// uuids: a UUID, or 32 hex digits in a row.
	uuids = regexp.MustCompile(`(?i)[0-9a-f]{8}-[0-9a-f]{4}-[0-9a-f]{4}-[0-9a-f]{4}-[0-9a-f]{12}|\b[0-9a-f]{32}\b`)
	// idParams: search parameters that carry identifiers, wherever they are.
	idParams = regexp.MustCompile(`(?i)\b(?:identifier|subject|patient|encounter|focus|performer|requester|author|_id|id|_tag|_has|mrn|reference)` + paramName + `(` + paramValue + `)`)
	// queryParams: any parameter of a query string ("?" or "&", also
	// encoded); the value goes unless the parameter is in safeParams.
	queryParams = regexp.MustCompile(`(?i)(?:\?|&|%3F|%26)([\w\-]+)` + paramName + `(` + paramValue + `)`)
	// idKeys: a word naming an id or a reference, then the id quoted, in
	// brackets ("ID[12]", as HAPI writes it), after "=" or ":", or after a
	// space; see markIDKeys.
	idKeys = regexp.MustCompile(`(?i)\b(id|identifier|_id|mrn|logical id|resource id|subject|patient|encounter|reference)\b(?:(?:\s*[:=]\s*|\s+)("(?:[^"\\\n]|\\.)*"|'[^'\n]*'|` + "`[^`\\n]*`" + `)|\s*(\[[^\]\n]*\])|[:=](` + idTok + `)|(?:\s*:\s+|\s+)([^\s"'<>()\[\]{},;` + "`" + `]*[^\s"'<>()\[\]{},;.:` + "`" + `]))`)
	// contained: a reference to a contained resource ("#p1").
	contained = regexp.MustCompile(`(?i)\b(?:reference|ref|contained)\b[\s:="']*#(` + idTok + `)`)
)

// safeParams are search parameters whose values never identify anyone.
var safeParams = keySet(
	"_count", "_sort", "_summary", "_elements", "_format", "_include", "_revinclude", "_total",
	"_offset", "_pretty", "_lastUpdated", "_since", "_type", "_outputFormat", "_contained",
	"_containedType", "_getpagesoffset", "_bundletype", "code", "status", "category", "date",
)

// mark adds to r what every rule but the withholding of server text removes
// from s. Each rule first looks for a character it needs, as most of what
// is logged ("POST", "/notify") has nothing to remove.
func mark(r *ranges, s string) {
	if strings.IndexByte(s, '"') >= 0 && strings.IndexByte(s, ':') >= 0 {
		markJSON(r, s)
	}
	if strings.ContainsAny(s, "/%") {
		markReferences(r, s)
	}
	if strings.IndexByte(s, ':') >= 0 {
		for _, m := range urnUUIDs.FindAllStringSubmatchIndex(s, -1) {
			r.add(m[2], m[3])
		}
	}
	if len(s) >= 32 {
		for _, m := range uuids.FindAllStringIndex(s, -1) {
			// The rest of the word goes with it ("obs-<uuid>-2").
			from, to := m[0], m[1]
			for from > 0 && (isWordByte(s[from-1]) || s[from-1] == '-' || s[from-1] == '.') {
				from--
			}
			for to < len(s) && (isWordByte(s[to]) || s[to] == '-' || s[to] == '.') {
				to++
			}
			for s[to-1] == '.' {
				to--
			}
			r.add(from, to)
		}
	}
	if strings.ContainsAny(s, "=%") {
		if strings.ContainsAny(s, "?&%") {
			for _, m := range queryParams.FindAllStringSubmatchIndex(s, -1) {
				if !safeParams[strings.ToLower(s[m[2]:m[3]])] {
					markValue(r, s, m[8], m[9])
				}
			}
		}
		for _, m := range idParams.FindAllStringSubmatchIndex(s, -1) {
			markValue(r, s, m[6], m[7])
		}
	}
	if slices.ContainsFunc(keyWords, func(w string) bool { return containsFold(s, w) }) {
		markIDKeys(r, s)
	}
	if strings.IndexByte(s, '#') >= 0 {
		for _, m := range contained.FindAllStringSubmatchIndex(s, -1) {
			r.add(m[2], m[3])
		}
	}
}

// isResourceType holds the resource types in lower case.
var isResourceType = func() map[string]bool {
	m := make(map[string]bool, len(resourceTypes))
	for _, t := range resourceTypes {
		m[strings.ToLower(t)] = true
	}
	return m
}()

// longestType is the length of the longest resource type name.
var longestType = func() int {
	n := 0
	for _, t := range resourceTypes {
		n = max(n, len(t))
	}
	return n
}()

// markReferences adds the id and version of every reference: a resource
// type in any case, even glued to what precedes it ("x2Patient/1",
// ".../fhirPatient/1"), a slash, also percent-encoded, and an id of any
// length. The words a server writes after a type ("_search", "_history",
// "$everything") are not ids.
func markReferences(r *ranges, s string) {
	var lower [64]byte
	for i := 0; i < len(s); i++ {
		sep := separatorAt(s, i)
		if sep == 0 {
			continue
		}
		// The letters before the separator must end with a type's name.
		j := i
		for j > 0 && i-j < longestType && isLetter(s[j-1]) {
			j--
		}
		found := false
		for k := j; k <= i-4 && !found; k++ {
			n := copy(lower[:], s[k:i])
			for x := range n {
				lower[x] |= 0x20
			}
			found = isResourceType[string(lower[:n])]
		}
		if !found {
			continue
		}
		from := i + sep
		m := referenceID.FindStringSubmatchIndex(s[from:])
		if m == nil {
			continue
		}
		if id := s[from+m[2] : from+m[3]]; strings.HasPrefix(id, "$") || id == "_search" || id == "_history" {
			continue
		}
		r.add(from, from+m[1])
		i = from + m[1] - 1
	}
}

// separatorAt returns the length of the slash at s[i] ("/", "%2F", "%252F"),
// 0 if there is none.
func separatorAt(s string, i int) int {
	switch {
	case s[i] == '/':
		return 1
	case s[i] != '%':
		return 0
	case len(s) >= i+3 && s[i+1] == '2' && s[i+2]|0x20 == 'f':
		return 3
	case len(s) >= i+5 && s[i+1:i+4] == "252" && s[i+4]|0x20 == 'f':
		return 5
	}
	return 0
}

func isLetter(c byte) bool { return c|0x20 >= 'a' && c|0x20 <= 'z' }

// containsFold reports whether s holds word (lower case) in any case.
func containsFold(s, word string) bool {
	for i := 0; i+len(word) <= len(s); i++ {
		j := 0
		for j < len(word) && s[i+j]|0x20 == word[j] {
			j++
		}
		if j == len(word) {
			return true
		}
	}
	return false
}

// markWithheld adds to r the server's answers quoted in s.
func markWithheld(r *ranges, s string) {
	if !strings.Contains(s, ": ") {
		return
	}
	for _, m := range serverText.FindAllStringSubmatchIndex(s, -1) {
		r.addAs(m[2], m[3], withheld)
	}
}

// markValue adds a parameter's value s[from:to], less the punctuation that
// ends the sentence or closes a bracket opened before it.
func markValue(r *ranges, s string, from, to int) {
	for to > from {
		v, c := s[from:to], s[to-1]
		if strings.IndexByte(".,;:", c) >= 0 ||
			c == ')' && strings.Count(v, "(") < strings.Count(v, ")") ||
			c == ']' && strings.Count(v, "[") < strings.Count(v, "]") {
			to--
			continue
		}
		break
	}
	r.add(from, to)
}

// markIDKeys adds what follows a word naming an id: always when quoted, in
// brackets or right after "=" or ":", and after a space when it looks like
// an id (a digit, or "-", "_", ".", ":" or "|" inside it) rather than a
// word, or is a word followed by a number ("identifier MRN 998877"). After
// "subject", "patient", "encounter" and "reference", which are words in
// sentences too, only what is quoted or in brackets goes. After a quoted
// value it looks for the next key inside the quotes, since what looked like
// an opening quote may close something else.
func markIDKeys(r *ranges, s string) {
	for pos := 0; pos < len(s); {
		m := idKeys.FindStringSubmatchIndex(s[pos:])
		if m == nil {
			return
		}
		offset(m, pos)
		pos = m[1]
		if m[0] > 0 && isWordByte(s[m[0]-1]) {
			pos = m[0] + 1 // "\b" at the start of s[pos:] saw no word before it
			continue
		}
		idWord := !referenceWords[strings.ToLower(s[m[2]:m[3]])]
		switch {
		case m[4] >= 0: // quoted
			r.add(m[4]+1, m[5]-1)
			pos = m[4] + 1
		case m[6] >= 0: // in brackets: "ID[12]" becomes "ID[redacted]"
			r.add(m[6], m[7])
		case !idWord:
		case m[8] >= 0: // after "=" or ":"
			r.add(m[8], m[9])
		case strings.ContainsAny(s[m[10]:m[11]], "0123456789-_.:|"):
			r.add(m[10], m[11])
		default:
			if w := nextWord(s, m[11]); strings.ContainsAny(w, "0123456789") {
				r.add(m[10], m[11]+strings.Index(s[m[11]:], w)+len(w))
			}
		}
	}
}

// keyWords are what every key of idKeys contains.
var keyWords = []string{"id", "mrn", "subject", "patient", "encounter", "reference"}

// referenceWords name a reference in idKeys.
var referenceWords = keySet("subject", "patient", "encounter", "reference")

// nextWord returns the word after the spaces at s[i:].
func nextWord(s string, i int) string {
	rest := strings.TrimLeft(s[i:], " \t")
	if len(rest) == len(s[i:]) {
		return ""
	}
	end := strings.IndexAny(rest, " \t\r\n\"'<>()[]{},;`")
	if end < 0 {
		end = len(rest)
	}
	return strings.TrimRight(rest[:end], ".:")
}

// offset moves submatch indices of s[pos:] to s; -1 (no match) stays.
func offset(m []int, pos int) {
	for i := range m {
		if m[i] >= 0 {
			m[i] += pos
		}
	}
}

func isWordByte(c byte) bool {
	return c == '_' || c >= '0' && c <= '9' || c >= 'a' && c <= 'z' || c >= 'A' && c <= 'Z'
}

func keySet(keys ...string) map[string]bool {
	m := make(map[string]bool, len(keys))
	for _, k := range keys {
		m[strings.ToLower(k)] = true
	}
	return m
}

// ranges are parts of a text to replace, with [Redacted] unless said.
type ranges []part

type part struct {
	from, to int
	with     string
}

func (r *ranges) add(from, to int) { r.addAs(from, to, Redacted) }

func (r *ranges) addAs(from, to int, with string) {
	if to > from {
		*r = append(*r, part{from, to, with})
	}
}

// apply replaces each part of s in r, and parts that overlap or touch as
// one; a withheld server answer stays withheld when merged.
func (r ranges) apply(s string) string {
	if len(r) == 0 {
		return s
	}
	slices.SortFunc(r, func(a, b part) int { return cmp.Compare(a.from, b.from) })
	var b strings.Builder
	last := 0
	for i := 0; i < len(r); {
		p := r[i]
		for i++; i < len(r) && r[i].from <= p.to; i++ {
			p.to = max(p.to, r[i].to)
			if r[i].with == withheld {
				p.with = withheld
			}
		}
		b.WriteString(s[last:p.from])
		b.WriteString(p.with)
		last = p.to
	}
	b.WriteString(s[last:])
	return b.String()
}

// textTokens are the words of free text, and percent escapes ("%2F"),
// which are not words.
var textTokens = regexp.MustCompile(`%[0-9A-Fa-f]{2}|[A-Za-z0-9_](?:[A-Za-z0-9_\-.]*[A-Za-z0-9_])?`)

// codeShape is an error code such as HAPI-0989, kept in free text.
var codeShape = regexp.MustCompile(`^[A-Z]+-[0-9]+$`)

// countWords come before a number that counts or points rather than
// identifies.
var countWords = keySet("http", "page", "line", "col", "column", "entry", "after", "attempt", "attempts", "index", "position")

// markWords adds every word of free text that may be an id: any with a
// digit, however short, except error codes and numbers that count.
func markWords(r *ranges, s string) {
	for _, l := range textTokens.FindAllStringIndex(s, -1) {
		if !keepInText(s, l[0], l[1]) {
			r.add(l[0], l[1])
		}
	}
}

// keepInText tells whether the word s[from:to] stays in free text: it has no
// digit, it is an error code, or it is a number that counts (after "HTTP",
// "page", "line", ... or an index in brackets).
func keepInText(s string, from, to int) bool {
	tok := s[from:to]
	if tok[0] == '%' || !strings.ContainsAny(tok, "0123456789") || codeShape.MatchString(tok) {
		return true
	}
	if strings.Trim(tok, "0123456789") != "" {
		return false
	}
	if from > 0 && to < len(s) && s[from-1] == '[' && s[to] == ']' {
		return true
	}
	before := strings.TrimRight(s[:from], " ")
	if len(before) == from {
		return false
	}
	i := strings.LastIndexFunc(before, func(r rune) bool { return !(r >= 'a' && r <= 'z' || r >= 'A' && r <= 'Z') })
	return countWords[strings.ToLower(before[i+1:])]
}
