package notify

import (
	"bytes"
	"strconv"
	"strings"
	"time"

	"github.com/deadspace-fhir/deadspace/fhir/jsonscan"
)

// elem is an element of the subscription status, whatever the shape names
// it by: "events-since-subscription-start" (Parameters) and
// "eventsSinceSubscriptionStart" (R5 element, cross-version extension) are
// one element.
type elem uint8

const (
	elemOther elem = iota
	elemSubscription
	elemTopic
	elemStatus
	elemType
	elemEventsSince
	elemNotificationEvent
	elemError
	elemEventNumber
	elemTimestamp
	elemFocus
	elemAdditionalContext
	elemCount
)

// elemOf folds a name to lower case without "-" and "_" and says which
// element it names, and whether it ends in "subscriptionstatus".
func elemOf(name []byte) (elem, bool) {
	var buf [48]byte
	folded := buf[:0]
	for _, c := range name {
		if c >= 0x80 || len(folded) == cap(folded) {
			// Non-ASCII names fold as strings.ToLower folds them (the Kelvin
			// sign is a k); long ones name no element, but may still end in
			// SubscriptionStatus.
			s := normName(string(name))
			return elemNamed([]byte(s)), strings.HasSuffix(s, "subscriptionstatus")
		}
		switch {
		case c == '-' || c == '_':
			continue
		case c >= 'A' && c <= 'Z':
			c += 'a' - 'A'
		}
		folded = append(folded, c)
	}
	return elemNamed(folded), bytes.HasSuffix(folded, []byte("subscriptionstatus"))
}

func normName(s string) string {
	return strings.NewReplacer("-", "", "_", "").Replace(strings.ToLower(s))
}

func elemNamed(name []byte) elem {
	switch string(name) {
	case "subscription":
		return elemSubscription
	case "topic":
		return elemTopic
	case "status":
		return elemStatus
	case "type":
		return elemType
	case "eventssincesubscriptionstart":
		return elemEventsSince
	case "notificationevent":
		return elemNotificationEvent
	case "error":
		return elemError
	case "eventnumber":
		return elemEventNumber
	case "timestamp":
		return elemTimestamp
	case "focus":
		return elemFocus
	case "additionalcontext":
		return elemAdditionalContext
	}
	return elemOther
}

// Known codes, returned without an allocation.
var (
	typeCodes   = []string{string(TypeEvent), string(TypeHeartbeat), string(TypeHandshake), string(TypeQueryStatus), string(TypeQueryEvent)}
	statusCodes = []string{"active", "requested", "error", "off", "entered-in-error"}
)

func (r *reader) parameters() (Notification, error) {
	l := &r.status.params
	if l.te.found() {
		return Notification{}, malformed(statusPath, l.te.detail())
	}
	if l.err != nil {
		return Notification{}, l.err
	}
	n, err := r.fromNodes(l.first)
	n.Shape = ShapeParameters
	return n, err
}

// basic reports found=false when the Basic carries nothing that looks like
// a subscription status, so that a history Bundle of Basic resources is not
// mistaken for a notification.
func (r *reader) basic() (n Notification, found bool, err error) {
	l := &r.status.exts
	if l.te.found() {
		return Notification{}, false, malformed(statusPath, l.te.detail())
	}
	if l.err != nil {
		return Notification{}, false, l.err
	}
	first := l.first
	for i := l.first; i >= 0; i = r.nodes[i].next {
		if r.nodes[i].statusExt {
			first, found = r.nodes[i].child, true
			break
		}
	}
	if !found {
		// Flat extensions: both required elements must be there, or any
		// Basic with a "type" extension would pass for a status.
		var sub, typ bool
		for i := l.first; i >= 0; i = r.nodes[i].next {
			sub = sub || r.nodes[i].elem == elemSubscription
			typ = typ || r.nodes[i].elem == elemType
		}
		found = sub && typ
	}
	if !found {
		return Notification{}, false, nil
	}
	n, err = r.fromNodes(first)
	n.Shape = ShapeBasic
	return n, true, err
}

// fromNodes interprets the flattened status. Names it does not know
// (eventsInNotification from drafts, extensions) are ignored.
func (r *reader) fromNodes(first int32) (Notification, error) {
	var n Notification
	var seen [elemCount]int32
	for i := range seen {
		seen[i] = -1
	}
	var err error
	for i := first; i >= 0; i = r.nodes[i].next {
		nd := &r.nodes[i]
		switch nd.elem {
		case elemSubscription, elemTopic, elemStatus, elemType, elemEventsSince:
			if j := seen[nd.elem]; j >= 0 {
				return n, malformed(r.nodePath(i), "repeats "+r.nodePath(j))
			}
			seen[nd.elem] = i
		}
		switch nd.elem {
		case elemSubscription:
			n.Subscription, err = r.refValue(i)
		case elemTopic:
			n.Topic, err = r.stringValue(i)
		case elemStatus:
			n.Status, err = r.codeValue(i, statusCodes)
		case elemType:
			var s string
			s, err = r.codeValue(i, typeCodes)
			n.Type = Type(s)
		case elemEventsSince:
			n.EventsSinceStart, err = r.countValue(i)
			n.HasEventsSinceStart = err == nil
		case elemNotificationEvent:
			var ev Event
			ev, err = r.eventFromNodes(i)
			n.Events = append(n.Events, ev)
		case elemError:
			var s string
			s, err = r.conceptValue(i)
			if s != "" {
				n.Errors = append(n.Errors, s)
			}
		}
		if err != nil {
			return n, err
		}
	}
	return n, nil
}

func (r *reader) eventFromNodes(parent int32) (Event, error) {
	var ev Event
	var hasNumber, hasTime, hasFocus bool
	for i := r.nodes[parent].child; i >= 0; i = r.nodes[i].next {
		var err error
		switch r.nodes[i].elem {
		case elemEventNumber:
			if hasNumber {
				return ev, malformed(r.nodePath(i), "repeats event-number")
			}
			hasNumber = true
			ev.Number, err = r.countValue(i)
		case elemTimestamp:
			if hasTime {
				return ev, malformed(r.nodePath(i), "repeats timestamp")
			}
			hasTime = true
			ev.Timestamp, err = r.timeValue(i)
		case elemFocus:
			if hasFocus {
				return ev, malformed(r.nodePath(i), "repeats focus")
			}
			hasFocus = true
			ev.Focus, err = r.refValue(i)
		case elemAdditionalContext:
			var ref string
			ref, err = r.refValue(i)
			if ref != "" {
				ev.AdditionalContext = append(ev.AdditionalContext, ref)
			}
		}
		if err != nil {
			return ev, err
		}
	}
	// event-number is 1..1: without it gap detection cannot place the event.
	if !hasNumber {
		return ev, malformed(r.nodePath(parent), "notification-event has no event-number")
	}
	return ev, nil
}

// valueScanner reads a node's value[x], text the reader has already
// checked.
func (r *reader) valueScanner(i int32) jsonscan.Scanner {
	var s jsonscan.Scanner
	s.Reset(r.nodes[i].value)
	return s
}

// refValue reads a Reference, or a bare string for servers that put the URL
// in a valueUri, valueCanonical or valueString.
func (r *reader) refValue(i int32) (string, error) {
	// No string of the key is made on the way to a value: it is needed
	// only for an error.
	switch string(r.nodes[i].key) {
	case "valueReference":
		var ref text
		var te typeErr
		s := r.valueScanner(i)
		if err := readRef(&s, &ref, &te, "valueReference"); err != nil || te.found() {
			return "", malformed(r.nodePath(i), "valueReference is not a Reference")
		}
		return ref.String(), nil
	case "valueUri", "valueUrl", "valueCanonical", "valueString":
		return r.stringValue(i)
	case "":
		return "", nil
	default:
		return "", malformed(r.nodePath(i), string(r.nodes[i].key)+" where a Reference was expected")
	}
}

func (r *reader) stringValue(i int32) (string, error) {
	t, err := r.textValue(i)
	return t.String(), err
}

func (r *reader) codeValue(i int32, known []string) (string, error) {
	t, err := r.textValue(i)
	return t.code(known...), err
}

func (r *reader) textValue(i int32) (text, error) {
	nd := &r.nodes[i]
	if len(nd.key) == 0 {
		return text{}, nil
	}
	var t text
	var te typeErr
	s := r.valueScanner(i)
	if err := readString(&s, &t, &te, ""); err != nil || te.found() {
		return text{}, malformed(r.nodePath(i), string(nd.key)+" is not a string")
	}
	return t, nil
}

func (r *reader) countValue(i int32) (uint64, error) {
	nd := &r.nodes[i]
	if len(nd.key) == 0 {
		return 0, malformed(r.nodePath(i), "counter has no value")
	}
	return parseCount(nd.value, func() string { return r.nodePath(i) + "." + string(nd.key) })
}

// parseCount accepts a non-negative integer written as a JSON string
// (R4 string, R5 integer64) or as a JSON number (what some servers send).
// raw is checked JSON text.
func parseCount(raw []byte, path func() string) (uint64, error) {
	var s jsonscan.Scanner
	s.Reset(raw)
	var digits []byte
	switch s.Peek() {
	case jsonscan.String:
		b, plain, _ := s.Str()
		if !plain {
			b = []byte(jsonscan.Unquote(b, plain))
		}
		digits = b
	case jsonscan.Null:
		// A null string is an empty one.
	case jsonscan.Number:
		digits = raw
	default:
		return 0, malformed(path(), "counter is neither a string nor a number")
	}
	if len(digits) == 0 || len(digits) > 20 {
		return 0, malformed(path(), "counter is not a non-negative integer")
	}
	for _, c := range digits {
		if c < '0' || c > '9' {
			return 0, malformed(path(), "counter is not a non-negative integer")
		}
	}
	v, err := strconv.ParseUint(string(digits), 10, 64)
	if err != nil {
		return 0, malformed(path(), "counter is out of range")
	}
	return v, nil
}

func (r *reader) timeValue(i int32) (time.Time, error) {
	s, err := r.stringValue(i)
	if err != nil || s == "" {
		return time.Time{}, err
	}
	return parseInstant(s, func() string { return r.nodePath(i) + "." + string(r.nodes[i].key) })
}

// parseInstant reads a FHIR instant. RFC 3339 parsing in Go takes any
// number of fractional digits, which matters because the IG's own examples
// have seven ("2020-05-29T11:44:13.1882432-05:00").
func parseInstant(s string, path func() string) (time.Time, error) {
	t, err := time.Parse(time.RFC3339Nano, s)
	if err != nil {
		return time.Time{}, malformed(path(), "timestamp is not an instant")
	}
	return t, nil
}

func (r *reader) conceptValue(i int32) (string, error) {
	switch string(r.nodes[i].key) {
	case "valueCodeableConcept":
		var te typeErr
		s := r.valueScanner(i)
		c, err := readConcept(&s, &te, "valueCodeableConcept")
		if err != nil || te.found() {
			return "", malformed(r.nodePath(i), "valueCodeableConcept is not a CodeableConcept")
		}
		return c, nil
	case "valueCode", "valueString":
		return r.stringValue(i)
	case "":
		return "", nil
	default:
		return "", malformed(r.nodePath(i), string(r.nodes[i].key)+" where a CodeableConcept was expected")
	}
}

// subscriptionStatus interprets a SubscriptionStatus as R4B and R5 define
// it. Counters were kept raw so that both string and number forms are
// accepted.
func (r *reader) subscriptionStatus() (Notification, error) {
	st := &r.status
	if st.statusErr.found() {
		return Notification{}, malformed(statusPath, st.statusErr.detail())
	}
	n := Notification{Subscription: st.sub.String(), Topic: st.topic.String(), Status: st.state.code(statusCodes...),
		Type: Type(st.ntype.code(typeCodes...)), Shape: ShapeSubscriptionStatus}
	if st.since != nil && string(st.since) != "null" {
		v, err := parseCount(st.since, func() string { return statusPath + ".eventsSinceSubscriptionStart" })
		if err != nil {
			return Notification{}, err
		}
		n.EventsSinceStart, n.HasEventsSinceStart = v, true
	}
	if len(st.events) > 0 {
		n.Events = make([]Event, 0, len(st.events))
	}
	for i, e := range st.events {
		p := func() string { return statusPath + ".notificationEvent[" + strconv.Itoa(i) + "]" }
		if e.number == nil || string(e.number) == "null" {
			return Notification{}, malformed(p(), "notificationEvent has no eventNumber")
		}
		num, err := parseCount(e.number, func() string { return p() + ".eventNumber" })
		if err != nil {
			return Notification{}, err
		}
		ev := Event{Number: num, Focus: e.focus.String(), AdditionalContext: e.context}
		if len(e.ts.b) > 0 {
			if ev.Timestamp, err = parseInstant(e.ts.String(), func() string { return p() + ".timestamp" }); err != nil {
				return Notification{}, err
			}
		}
		n.Events = append(n.Events, ev)
	}
	n.Errors = st.errors
	return n, nil
}
