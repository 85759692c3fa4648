package notify

import (
	"bytes"
	"strconv"

	"github.com/deadspace-fhir/deadspace/fhir/jsonscan"
)

// The body is read once. Before, encoding/json decoded the whole Bundle,
// then each entry's resourceType and id, then the status resource again,
// then each parameter and value once more; the resources were copied on
// each decode. The reader walks the text once with jsonscan, keeps the few
// members it needs, hands resources on as slices of the body, and checks
// the whole text on the way, because a syntax error anywhere made the body
// ErrNotJSON before.
//
// It keeps the rules encoding/json applied to the structs it replaces:
// members that map onto a struct field are matched case-insensitively
// (bytes.EqualFold, as encoding/json folds), members read from a map by
// name ("resourceType" of the body; "name", "url", "part", "extension" and
// value[x] inside parameters and extensions) are matched exactly, null
// leaves a string unset, and a member of the wrong JSON type is an error
// reported before the checks that follow decoding. A member given twice
// counts once, the last; encoding/json merged repeated objects into one,
// which no sender relies on.
//
// Problems are noted, not returned, while reading (except syntax errors)
// and reported afterwards in the order the earlier parser found them, so
// that the same body gets the same error kind and path as before.

// text is a string member's text as jsonscan found it, decoded on demand.
type text struct {
	b   []byte
	raw bool // b needs no decoding
	set bool
}

func (t text) String() string {
	if !t.set {
		return ""
	}
	return jsonscan.Unquote(t.b, t.raw)
}

// is compares the decoded text with s, without decoding plain text.
func (t text) is(s string) bool {
	if t.raw || !t.set {
		return string(t.b) == s
	}
	return t.String() == s
}

// code returns the text, as one of the known codes when it is one, which
// spares an allocation for the codes every notification carries.
func (t text) code(known ...string) string {
	if t.raw {
		for _, k := range known {
			if string(t.b) == k {
				return k
			}
		}
	}
	return t.String()
}

// resourceTypeName is the resource type, without an allocation for the
// types notifications usually carry.
func resourceTypeName(t text) string {
	return t.code("Observation", "Patient", "Encounter", "Parameters", "SubscriptionStatus", "Basic",
		"Bundle", "Device", "Provenance", "Condition", "Procedure", "MedicationAdministration")
}

// typeErr is the first member of the wrong JSON type in one decoding scope
// of the earlier parser.
type typeErr struct {
	field, sub string // the member's path is field+sub
	got        jsonscan.Kind
	want       string
}

func (e *typeErr) note(field string, got jsonscan.Kind, want string) {
	e.noteAt(field, "", got, want)
}

func (e *typeErr) noteAt(field, sub string, got jsonscan.Kind, want string) {
	if e.got == jsonscan.Invalid {
		*e = typeErr{field: field, sub: sub, got: got, want: want}
	}
}

func (e *typeErr) found() bool { return e.got != jsonscan.Invalid }

func (e *typeErr) detail() string {
	return e.field + e.sub + " is a JSON " + e.got.String() + ", want " + e.want
}

// head is a resource's resourceType and id.
type head struct {
	rt, id text
	err    typeErr
}

// member reads name's value into h if it is resourceType or id, and says
// whether it was.
func (h *head) member(s *jsonscan.Scanner, name []byte) (bool, error) {
	switch {
	case bytes.EqualFold(name, []byte("resourceType")):
		// A null resourceType unsets it, as it set the *string to nil.
		h.rt = text{}
		return true, readString(s, &h.rt, &h.err, "resourceType")
	case bytes.EqualFold(name, []byte("id")):
		return true, readString(s, &h.id, &h.err, "id")
	}
	return false, nil
}

func (h *head) check(path string) (rt, id string, err error) {
	if h.err.found() {
		return "", "", malformed(path, h.err.detail())
	}
	if !h.rt.set || len(h.rt.b) == 0 {
		return "", "", malformed(path, "resource has no resourceType")
	}
	return resourceTypeName(h.rt), h.id.String(), nil
}

// readString reads a string member into dst; null leaves dst as it is, and
// any other value is noted in te.
func readString(s *jsonscan.Scanner, dst *text, te *typeErr, field string) error {
	switch k := s.Peek(); k {
	case jsonscan.String:
		b, raw, err := s.Str()
		*dst = text{b: b, raw: raw, set: true}
		return err
	case jsonscan.Null:
	default:
		te.note(field, k, "string")
	}
	_, err := s.Skip()
	return err
}

// readRef reads a Reference's reference into dst (a null Reference leaves
// it unset).
func readRef(s *jsonscan.Scanner, dst *text, te *typeErr, field string) error {
	if ok, err := enter(s, te, field, jsonscan.Object); !ok || err != nil {
		*dst = text{}
		return err
	}
	for first := true; ; first = false {
		name, more, err := s.Member(first)
		if err != nil || !more {
			return err
		}
		if !bytes.EqualFold(name, []byte("reference")) {
			_, err = s.Skip()
		} else if k := s.Peek(); k == jsonscan.String {
			b, raw, serr := s.Str()
			*dst, err = text{b: b, raw: raw, set: true}, serr
		} else {
			if k != jsonscan.Null {
				te.noteAt(field, ".reference", k, "string")
			}
			_, err = s.Skip()
		}
		if err != nil {
			return err
		}
	}
}

// readConcept reads a CodeableConcept as "system|code", "code" or its text.
func readConcept(s *jsonscan.Scanner, te *typeErr, field string) (string, error) {
	if ok, err := enter(s, te, field, jsonscan.Object); !ok || err != nil {
		return "", err
	}
	var system, code, txt text
	found := false
	for first := true; ; first = false {
		name, more, err := s.Member(first)
		if err != nil {
			return "", err
		}
		if !more {
			break
		}
		switch {
		case bytes.EqualFold(name, []byte("coding")):
			err = eachElem(s, te, field+".coding", func() error {
				var sys, c text
				err := eachMember(s, te, field+".coding", func(name []byte) error {
					switch {
					case bytes.EqualFold(name, []byte("system")):
						return readString(s, &sys, te, field+".coding.system")
					case bytes.EqualFold(name, []byte("code")):
						return readString(s, &c, te, field+".coding.code")
					}
					_, err := s.Skip()
					return err
				})
				if !found && len(c.b) > 0 {
					system, code, found = sys, c, true
				}
				return err
			})
		case bytes.EqualFold(name, []byte("text")):
			err = readString(s, &txt, te, field+".text")
		default:
			_, err = s.Skip()
		}
		if err != nil {
			return "", err
		}
	}
	switch {
	case found && len(system.b) > 0:
		return system.String() + "|" + code.String(), nil
	case found:
		return code.String(), nil
	}
	return txt.String(), nil
}

// enter opens the next value if it is of kind want, an object or an array,
// as encoding/json decoded into a struct or a slice: null is skipped (and
// leaves what it would have filled empty), any other value is noted in te
// and skipped.
func enter(s *jsonscan.Scanner, te *typeErr, field string, want jsonscan.Kind) (ok bool, err error) {
	switch k := s.Peek(); k {
	case want:
		if want == jsonscan.Object {
			return true, s.Object()
		}
		return true, s.Array()
	case jsonscan.Null:
	default:
		te.note(field, k, "an "+want.String())
	}
	_, err = s.Skip()
	return false, err
}

// eachElem calls fn at each element of an array (null is an empty array);
// any other value is noted in te.
func eachElem(s *jsonscan.Scanner, te *typeErr, field string, fn func() error) error {
	if ok, err := enter(s, te, field, jsonscan.Array); !ok || err != nil {
		return err
	}
	for first := true; ; first = false {
		more, err := s.Elem(first)
		if err != nil || !more {
			return err
		}
		if err := fn(); err != nil {
			return err
		}
	}
}

// eachMember calls fn at each member of an object (null is an empty
// object); any other value is noted in te.
func eachMember(s *jsonscan.Scanner, te *typeErr, field string, fn func(name []byte) error) error {
	if ok, err := enter(s, te, field, jsonscan.Object); !ok || err != nil {
		return err
	}
	for first := true; ; first = false {
		name, more, err := s.Member(first)
		if err != nil || !more {
			return err
		}
		if err := fn(name); err != nil {
			return err
		}
	}
}

// reader is one pass over a body; see the comment at the top of the file.
type reader struct {
	s    jsonscan.Scanner
	body []byte

	top    jsonscan.Kind // the body's value
	rtKind jsonscan.Kind // the body's "resourceType", Invalid when absent
	rt     text
	// bundleErr is the first member of the wrong type in the Bundle's
	// members, its entries and their fullUrls.
	bundleErr  typeErr
	bundleType text
	entries    int
	status     statusEntry
	// resources are the later entries that carry a resource with a
	// resourceType; entryErr is the first later entry that carries
	// something else.
	resources []Entry
	entryErr  error
	// nodes holds the parameters (and parts) or extensions of the status,
	// linked by index.
	nodes []node
}

// statusEntry is what entry[0].resource held, read as each of the three
// status shapes at once, because its resourceType may come last.
type statusEntry struct {
	kind jsonscan.Kind // Invalid when the entry has no resource
	head head
	// Parameters and Basic.
	params, exts nodeList
	// SubscriptionStatus.
	sub                 text
	topic, state, ntype text
	since               []byte
	events              []statusEvent
	errors              []string
	statusErr           typeErr
}

type statusEvent struct {
	number  []byte // nil when absent
	ts      text
	focus   text
	context []string
}

// nodeList is a list of parameters or extensions.
type nodeList struct {
	first int32 // -1 when empty
	te    typeErr
	err   error
}

func (r *reader) read() error {
	r.s.Reset(r.body)
	r.top = r.s.Peek()
	if r.top != jsonscan.Object {
		if _, err := r.s.Skip(); err != nil {
			return err
		}
		return r.s.End()
	}
	if err := r.s.Object(); err != nil {
		return err
	}
	for first := true; ; first = false {
		name, more, err := r.s.Member(first)
		if err != nil {
			return err
		}
		if !more {
			break
		}
		switch {
		case string(name) == "resourceType":
			// Read by exact name to tell a Bundle from a single resource,
			// and checked as a string like every Bundle member.
			r.rtKind, r.rt = r.s.Peek(), text{}
			err = readString(&r.s, &r.rt, &r.bundleErr, "resourceType")
		case bytes.EqualFold(name, []byte("resourceType")):
			var ignored text
			err = readString(&r.s, &ignored, &r.bundleErr, "resourceType")
		case bytes.EqualFold(name, []byte("type")):
			err = readString(&r.s, &r.bundleType, &r.bundleErr, "type")
		case bytes.EqualFold(name, []byte("entry")):
			r.entries, r.status, r.resources, r.entryErr = 0, statusEntry{}, nil, nil
			err = eachElem(&r.s, &r.bundleErr, "entry", r.entry)
		default:
			_, err = r.s.Skip()
		}
		if err != nil {
			return err
		}
	}
	return r.s.End()
}

// entry reads one Bundle entry.
func (r *reader) entry() error {
	i := r.entries
	r.entries++
	var fullURL text
	var res []byte
	kind := jsonscan.Invalid
	var h head
	if i == 0 {
		r.status = statusEntry{params: nodeList{first: -1}, exts: nodeList{first: -1}}
	}
	err := eachMember(&r.s, &r.bundleErr, "entry", func(name []byte) error {
		switch {
		case bytes.EqualFold(name, []byte("fullUrl")):
			return readString(&r.s, &fullURL, &r.bundleErr, "entry.fullUrl")
		case bytes.EqualFold(name, []byte("resource")):
			kind = r.s.Peek()
			start := r.s.Pos()
			var err error
			switch {
			case kind != jsonscan.Object:
				_, err = r.s.Skip()
			case i == 0:
				r.status = statusEntry{kind: kind, params: nodeList{first: -1}, exts: nodeList{first: -1}}
				err = r.statusResource()
			default:
				h = head{}
				err = eachMember(&r.s, &h.err, "resource", func(name []byte) error {
					ok, err := h.member(&r.s, name)
					if !ok && err == nil {
						_, err = r.s.Skip()
					}
					return err
				})
			}
			res = r.body[start:r.s.Pos():r.s.Pos()]
			return err
		}
		_, err := r.s.Skip()
		return err
	})
	if err != nil || i == 0 {
		r.status.kind = kind
		return err
	}
	if kind == jsonscan.Invalid || kind == jsonscan.Null {
		return nil // id-only entries carry only fullUrl and request
	}
	path := func() string { return "Bundle.entry[" + strconv.Itoa(i) + "].resource" }
	if kind != jsonscan.Object {
		if r.entryErr == nil {
			r.entryErr = malformed(path(), "resource is a JSON "+kind.String()+", want an object")
		}
		return nil
	}
	rt, id, herr := h.check("")
	if herr != nil {
		if r.entryErr == nil {
			herr.(*Error).Path = path()
			r.entryErr = herr
		}
		return nil
	}
	r.resources = append(r.resources, Entry{FullURL: fullURL.String(), ResourceType: rt, ID: id, Resource: res})
	return nil
}

// statusResource reads entry[0].resource, an object, as a Parameters, a
// Basic and a SubscriptionStatus at once.
func (r *reader) statusResource() error {
	st := &r.status
	s := &r.s
	return eachMember(s, &st.head.err, "resource", func(name []byte) error {
		if ok, err := st.head.member(s, name); ok || err != nil {
			return err
		}
		fold := func(n string) bool { return bytes.EqualFold(name, []byte(n)) }
		switch {
		case fold("parameter"):
			return r.readNodes(&st.params, nodeParameter, "parameter")
		case fold("extension"):
			return r.readNodes(&st.exts, nodeExtension, "extension")
		case fold("subscription"):
			return readRef(s, &st.sub, &st.statusErr, "subscription")
		case fold("topic"):
			return readString(s, &st.topic, &st.statusErr, "topic")
		case fold("status"):
			return readString(s, &st.state, &st.statusErr, "status")
		case fold("type"):
			return readString(s, &st.ntype, &st.statusErr, "type")
		case fold("eventsSinceSubscriptionStart"):
			raw, err := s.Skip()
			st.since = raw
			return err
		case fold("notificationEvent"):
			st.events = st.events[:0]
			return eachElem(s, &st.statusErr, "notificationEvent", func() error {
				st.events = append(st.events, statusEvent{})
				return r.statusEvent(&st.events[len(st.events)-1])
			})
		case fold("error"):
			st.errors = st.errors[:0]
			return eachElem(s, &st.statusErr, "error", func() error {
				c, err := readConcept(s, &st.statusErr, "error")
				if c != "" {
					st.errors = append(st.errors, c)
				}
				return err
			})
		}
		_, err := s.Skip()
		return err
	})
}

func (r *reader) statusEvent(ev *statusEvent) error {
	s := &r.s
	te := &r.status.statusErr
	return eachMember(s, te, "notificationEvent", func(name []byte) error {
		fold := func(n string) bool { return bytes.EqualFold(name, []byte(n)) }
		switch {
		case fold("eventNumber"):
			raw, err := s.Skip()
			ev.number = raw
			return err
		case fold("timestamp"):
			return readString(s, &ev.ts, te, "notificationEvent.timestamp")
		case fold("focus"):
			return readRef(s, &ev.focus, te, "notificationEvent.focus")
		case fold("additionalContext"):
			ev.context = ev.context[:0]
			return eachElem(s, te, "notificationEvent.additionalContext", func() error {
				var ref text
				err := readRef(s, &ref, te, "notificationEvent.additionalContext")
				if len(ref.b) > 0 {
					ev.context = append(ev.context, ref.String())
				}
				return err
			})
		}
		_, err := s.Skip()
		return err
	})
}

// Node kinds.
const (
	nodeParameter = iota // Parameters.parameter and its parts
	nodeExtension        // Basic.extension and its sub-extensions
)

// node is one parameter or extension: its name, its one value[x], and its
// parts or sub-extensions. Parameters and Basic share the interpretation
// in status.go because both flatten the same R5 elements into name +
// value[x] + children.
type node struct {
	elem      elem
	statusExt bool // the name ends in SubscriptionStatus
	kind      uint8
	index     int32 // position in its list
	parent    int32 // -1 at the top
	child     int32 // first child, -1 for none
	next      int32 // next sibling, -1 for none
	key       []byte
	value     []byte
}

// maxDepth bounds the nesting of parts and sub-extensions read on hostile
// input; the deepest real structure (parameter → part) is two levels.
const maxDepth = 8

// readNodes reads the top-level parameters or extensions of the status,
// whose member name is matched case-insensitively (a struct field).
func (r *reader) readNodes(l *nodeList, kind uint8, field string) error {
	if r.s.Peek() != jsonscan.Array {
		*l = nodeList{first: -1, te: l.te}
		_, err := enter(&r.s, &l.te, field, jsonscan.Array)
		return err
	}
	var err error
	l.first, l.err, err = r.nodeArray(kind, -1, 0)
	return err
}

// nodeArray reads an array of parameters or extensions under parent. It
// returns the first node and the first problem in the order the earlier
// parser checked: each element in turn, and within it its name, its
// value[x], its children.
func (r *reader) nodeArray(kind uint8, parent int32, depth int) (first int32, problem error, err error) {
	first = -1
	if depth > maxDepth {
		_, err = r.s.Skip()
		return -1, malformed(r.listPath(kind, parent), "nested too deeply"), err
	}
	if err := r.s.Array(); err != nil {
		return -1, nil, err
	}
	last := int32(-1)
	for i := int32(0); ; i++ {
		more, err := r.s.Elem(i == 0)
		if err != nil || !more {
			return first, problem, err
		}
		idx := int32(len(r.nodes))
		if r.nodes == nil {
			// An R4 status is about a dozen parameters and parts.
			r.nodes = make([]node, 0, 16)
		}
		r.nodes = append(r.nodes, node{kind: uint8(kind), index: i, parent: parent, child: -1, next: -1})
		if last < 0 {
			first = idx
		} else {
			r.nodes[last].next = idx
		}
		last = idx
		p, err := r.nodeObject(idx, depth)
		if err != nil {
			return first, problem, err
		}
		if problem == nil {
			problem = p
		}
	}
}

func (r *reader) nodeObject(idx int32, depth int) (problem error, err error) {
	kind := r.nodes[idx].kind
	what, nameKey, childKey := "parameter", "name", "part"
	if kind == nodeExtension {
		what, nameKey, childKey = "extension", "url", "extension"
	}
	if k := r.s.Peek(); k != jsonscan.Object {
		_, err := r.s.Skip()
		return malformed(r.nodePath(idx), what+" is not an object"), err
	}
	if err := r.s.Object(); err != nil {
		return nil, err
	}
	var name text
	values := 0
	var childProblem error
	for first := true; ; first = false {
		member, more, err := r.s.Member(first)
		if err != nil {
			return nil, err
		}
		if !more {
			break
		}
		switch {
		case string(member) == nameKey:
			name = text{}
			var ignored typeErr
			err = readString(&r.s, &name, &ignored, nameKey)
			if ignored.found() {
				name = text{}
			}
		case len(member) > len("value") && string(member[:len("value")]) == "value":
			values++
			var raw []byte
			raw, err = r.s.Skip()
			r.nodes[idx].key, r.nodes[idx].value = member, raw
		case string(member) == childKey:
			switch k := r.s.Peek(); k {
			case jsonscan.Array:
				var child int32
				var p error
				child, p, err = r.nodeArray(kind, idx, depth+1)
				r.nodes[idx].child, childProblem = child, p
			case jsonscan.Null:
				// An absent list, but it was still checked for depth.
				r.nodes[idx].child, childProblem = -1, nil
				if depth+1 > maxDepth {
					childProblem = malformed(r.listPath(kind, idx), "nested too deeply")
				}
				_, err = r.s.Skip()
			default:
				childProblem = malformed(r.listPath(kind, idx), childKey+" is not an array")
				_, err = r.s.Skip()
			}
		default:
			_, err = r.s.Skip()
		}
		if err != nil {
			return nil, err
		}
	}
	if !name.set || len(name.b) == 0 {
		return malformed(r.nodePath(idx), what+" has no "+nameKey), nil
	}
	if values > 1 {
		return malformed(r.nodePath(idx), "more than one value[x]"), nil
	}
	nd := &r.nodes[idx]
	n := name.b
	if !name.raw {
		n = []byte(name.String())
	}
	if kind == nodeExtension {
		// Sub-extensions of a complex extension are named by a bare url
		// ("status"); top-level ones by a full URL whose last segment,
		// after "/" or ".", is the element name.
		if j := bytes.LastIndexAny(n, "/.#"); j >= 0 {
			n = n[j+1:]
		}
	}
	nd.elem, nd.statusExt = elemOf(n)
	return childProblem, nil
}

// nodePath is a node's FHIRPath-like location, built only for errors.
func (r *reader) nodePath(idx int32) string {
	nd := r.nodes[idx]
	return r.listPath(nd.kind, nd.parent) + "[" + strconv.Itoa(int(nd.index)) + "]"
}

func (r *reader) listPath(kind uint8, parent int32) string {
	switch {
	case parent < 0 && kind == nodeParameter:
		return statusPath + ".parameter"
	case parent < 0:
		return statusPath + ".extension"
	case kind == nodeParameter:
		return r.nodePath(parent) + ".part"
	}
	return r.nodePath(parent) + ".extension"
}
