package notify

import (
	"encoding/json"
	"fmt"
	"strconv"
	"strings"
	"time"
)

// node is one name/value pair of a Parameters parameter or an extension,
// with its parts or sub-extensions. Parameters and Basic share the
// interpretation below because both flatten the same R5 elements into
// name + value[x] + children.
type node struct {
	name     string // normalised, see normName
	key      string // the value[x] member, e.g. "valueString"
	value    json.RawMessage
	children []node
	path     string
}

// normName folds "events-since-subscription-start" (Parameters) and
// "eventsSinceSubscriptionStart" (R5 element, cross-version extension) to
// one spelling.
func normName(s string) string {
	return nameFolder.Replace(strings.ToLower(s))
}

// nameFolder is built once: a Replacer builds its tables on first use,
// which cost more than the rest of parsing a notification.
var nameFolder = strings.NewReplacer("-", "", "_", "")

type rawParameters struct {
	Parameter []json.RawMessage `json:"parameter"`
}

func parseParameters(raw json.RawMessage, path string) (Notification, error) {
	var p rawParameters
	if err := json.Unmarshal(raw, &p); err != nil {
		return Notification{}, malformed(path, jsonDetail(err))
	}
	nodes, err := paramNodes(p.Parameter, path+".parameter", 0)
	if err != nil {
		return Notification{}, err
	}
	n, err := fromNodes(nodes)
	n.Shape = ShapeParameters
	return n, err
}

// maxDepth bounds recursion on hostile input; the deepest real structure
// (parameter → part) is two levels.
const maxDepth = 8

func paramNodes(list []json.RawMessage, path string, depth int) ([]node, error) {
	if depth > maxDepth {
		return nil, malformed(path, "nested too deeply")
	}
	out := make([]node, 0, len(list))
	for i, raw := range list {
		p := fmt.Sprintf("%s[%d]", path, i)
		var m map[string]json.RawMessage
		if err := json.Unmarshal(raw, &m); err != nil || m == nil {
			return nil, malformed(p, "parameter is not an object")
		}
		var name string
		if err := json.Unmarshal(m["name"], &name); err != nil || name == "" {
			return nil, malformed(p, "parameter has no name")
		}
		nd := node{name: normName(name), path: p}
		if err := setValue(&nd, m); err != nil {
			return nil, err
		}
		if parts, ok := m["part"]; ok {
			var list []json.RawMessage
			if err := json.Unmarshal(parts, &list); err != nil {
				return nil, malformed(p+".part", "part is not an array")
			}
			var err error
			if nd.children, err = paramNodes(list, p+".part", depth+1); err != nil {
				return nil, err
			}
		}
		out = append(out, nd)
	}
	return out, nil
}

func setValue(nd *node, m map[string]json.RawMessage) error {
	for k, v := range m {
		if !strings.HasPrefix(k, "value") || len(k) == len("value") {
			continue
		}
		if nd.key != "" {
			return malformed(nd.path, "more than one value[x]")
		}
		nd.key, nd.value = k, v
	}
	return nil
}

type rawBasic struct {
	Extension []json.RawMessage `json:"extension"`
}

// parseBasic reports found=false when the Basic carries nothing that looks
// like a subscription status, so that a history Bundle of Basic resources is
// not mistaken for a notification.
func parseBasic(raw json.RawMessage, path string) (n Notification, found bool, err error) {
	var b rawBasic
	if err := json.Unmarshal(raw, &b); err != nil {
		return Notification{}, false, malformed(path, jsonDetail(err))
	}
	nodes, err := extNodes(b.Extension, path+".extension", 0)
	if err != nil {
		return Notification{}, false, err
	}
	for _, nd := range nodes {
		if strings.HasSuffix(nd.name, "subscriptionstatus") {
			nodes = nd.children
			found = true
			break
		}
	}
	if !found {
		// Flat extensions: both required elements must be there, or any
		// Basic with a "type" extension would pass for a status.
		var sub, typ bool
		for _, nd := range nodes {
			sub = sub || nd.name == "subscription"
			typ = typ || nd.name == "type"
		}
		found = sub && typ
	}
	if !found {
		return Notification{}, false, nil
	}
	n, err = fromNodes(nodes)
	n.Shape = ShapeBasic
	return n, true, err
}

func extNodes(list []json.RawMessage, path string, depth int) ([]node, error) {
	if depth > maxDepth {
		return nil, malformed(path, "nested too deeply")
	}
	out := make([]node, 0, len(list))
	for i, raw := range list {
		p := fmt.Sprintf("%s[%d]", path, i)
		var m map[string]json.RawMessage
		if err := json.Unmarshal(raw, &m); err != nil || m == nil {
			return nil, malformed(p, "extension is not an object")
		}
		var u string
		if err := json.Unmarshal(m["url"], &u); err != nil || u == "" {
			return nil, malformed(p, "extension has no url")
		}
		// Sub-extensions of a complex extension are named by a bare url
		// ("status"); top-level ones by a full URL whose last segment, after
		// "/" or ".", is the element name.
		if j := strings.LastIndexAny(u, "/.#"); j >= 0 {
			u = u[j+1:]
		}
		nd := node{name: normName(u), path: p}
		if err := setValue(&nd, m); err != nil {
			return nil, err
		}
		if sub, ok := m["extension"]; ok {
			var list []json.RawMessage
			if err := json.Unmarshal(sub, &list); err != nil {
				return nil, malformed(p+".extension", "extension is not an array")
			}
			var err error
			if nd.children, err = extNodes(list, p+".extension", depth+1); err != nil {
				return nil, err
			}
		}
		out = append(out, nd)
	}
	return out, nil
}

// fromNodes interprets the flattened status. Names it does not know
// (eventsInNotification from drafts, extensions) are ignored.
func fromNodes(nodes []node) (Notification, error) {
	var n Notification
	seen := map[string]string{}
	once := func(nd node) error {
		if first, dup := seen[nd.name]; dup {
			return malformed(nd.path, "repeats "+first)
		}
		seen[nd.name] = nd.path
		return nil
	}
	var err error
	for _, nd := range nodes {
		switch nd.name {
		case "subscription", "topic", "status", "type", "eventssincesubscriptionstart":
			if err := once(nd); err != nil {
				return n, err
			}
		}
		switch nd.name {
		case "subscription":
			n.Subscription, err = refValue(nd)
		case "topic":
			n.Topic, err = stringValue(nd)
		case "status":
			n.Status, err = stringValue(nd)
		case "type":
			var s string
			s, err = stringValue(nd)
			n.Type = Type(s)
		case "eventssincesubscriptionstart":
			n.EventsSinceStart, err = countValue(nd)
			n.HasEventsSinceStart = err == nil
		case "notificationevent":
			var ev Event
			ev, err = eventFromNodes(nd)
			n.Events = append(n.Events, ev)
		case "error":
			var s string
			s, err = conceptValue(nd)
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

func eventFromNodes(parent node) (Event, error) {
	var ev Event
	var hasNumber, hasTime, hasFocus bool
	for _, nd := range parent.children {
		var err error
		switch nd.name {
		case "eventnumber":
			if hasNumber {
				return ev, malformed(nd.path, "repeats event-number")
			}
			hasNumber = true
			ev.Number, err = countValue(nd)
		case "timestamp":
			if hasTime {
				return ev, malformed(nd.path, "repeats timestamp")
			}
			hasTime = true
			ev.Timestamp, err = timeValue(nd)
		case "focus":
			if hasFocus {
				return ev, malformed(nd.path, "repeats focus")
			}
			hasFocus = true
			ev.Focus, err = refValue(nd)
		case "additionalcontext":
			var r string
			r, err = refValue(nd)
			if r != "" {
				ev.AdditionalContext = append(ev.AdditionalContext, r)
			}
		}
		if err != nil {
			return ev, err
		}
	}
	// event-number is 1..1: without it gap detection cannot place the event.
	if !hasNumber {
		return ev, malformed(parent.path, "notification-event has no event-number")
	}
	return ev, nil
}

type rawRef struct {
	Reference string `json:"reference"`
}

// refValue reads a Reference, or a bare string for servers that put the URL
// in a valueUri, valueCanonical or valueString.
func refValue(nd node) (string, error) {
	switch nd.key {
	case "valueReference":
		var r rawRef
		if err := json.Unmarshal(nd.value, &r); err != nil {
			return "", malformed(nd.path, "valueReference is not a Reference")
		}
		return r.Reference, nil
	case "valueUri", "valueUrl", "valueCanonical", "valueString":
		return stringValue(nd)
	case "":
		return "", nil
	default:
		return "", malformed(nd.path, nd.key+" where a Reference was expected")
	}
}

func stringValue(nd node) (string, error) {
	if nd.key == "" {
		return "", nil
	}
	var s string
	if err := json.Unmarshal(nd.value, &s); err != nil {
		return "", malformed(nd.path, nd.key+" is not a string")
	}
	return s, nil
}

func countValue(nd node) (uint64, error) {
	if nd.key == "" {
		return 0, malformed(nd.path, "counter has no value")
	}
	return parseCount(nd.value, nd.path+"."+nd.key)
}

// parseCount accepts a non-negative integer written as a JSON string
// (R4 string, R5 integer64) or as a JSON number (what some servers send).
func parseCount(raw json.RawMessage, path string) (uint64, error) {
	var s string
	if err := json.Unmarshal(raw, &s); err != nil {
		var num json.Number
		if err := json.Unmarshal(raw, &num); err != nil {
			return 0, malformed(path, "counter is neither a string nor a number")
		}
		s = num.String()
	}
	if s == "" || len(s) > 20 {
		return 0, malformed(path, "counter is not a non-negative integer")
	}
	for _, r := range s {
		if r < '0' || r > '9' {
			return 0, malformed(path, "counter is not a non-negative integer")
		}
	}
	v, err := strconv.ParseUint(s, 10, 64)
	if err != nil {
		return 0, malformed(path, "counter is out of range")
	}
	return v, nil
}

func timeValue(nd node) (time.Time, error) {
	s, err := stringValue(nd)
	if err != nil || s == "" {
		return time.Time{}, err
	}
	return parseInstant(s, nd.path+"."+nd.key)
}

// parseInstant reads a FHIR instant. RFC 3339 parsing in Go takes any
// number of fractional digits, which matters because the IG's own examples
// have seven ("2020-05-29T11:44:13.1882432-05:00").
func parseInstant(s, path string) (time.Time, error) {
	t, err := time.Parse(time.RFC3339Nano, s)
	if err != nil {
		return time.Time{}, malformed(path, "timestamp is not an instant")
	}
	return t, nil
}

type rawConcept struct {
	Coding []struct {
		System string `json:"system"`
		Code   string `json:"code"`
	} `json:"coding"`
	Text string `json:"text"`
}

func (c rawConcept) String() string {
	for _, cd := range c.Coding {
		switch {
		case cd.Code != "" && cd.System != "":
			return cd.System + "|" + cd.Code
		case cd.Code != "":
			return cd.Code
		}
	}
	return c.Text
}

func conceptValue(nd node) (string, error) {
	switch nd.key {
	case "valueCodeableConcept":
		var c rawConcept
		if err := json.Unmarshal(nd.value, &c); err != nil {
			return "", malformed(nd.path, "valueCodeableConcept is not a CodeableConcept")
		}
		return c.String(), nil
	case "valueCode", "valueString":
		return stringValue(nd)
	case "":
		return "", nil
	default:
		return "", malformed(nd.path, nd.key+" where a CodeableConcept was expected")
	}
}

// rawStatus is SubscriptionStatus as R4B and R5 define it. Counters stay
// raw so that both string and number forms can be accepted.
type rawStatus struct {
	Subscription                 *rawRef         `json:"subscription"`
	Topic                        string          `json:"topic"`
	Status                       string          `json:"status"`
	Type                         string          `json:"type"`
	EventsSinceSubscriptionStart json.RawMessage `json:"eventsSinceSubscriptionStart"`
	NotificationEvent            []struct {
		EventNumber       json.RawMessage `json:"eventNumber"`
		Timestamp         string          `json:"timestamp"`
		Focus             *rawRef         `json:"focus"`
		AdditionalContext []rawRef        `json:"additionalContext"`
	} `json:"notificationEvent"`
	Error []rawConcept `json:"error"`
}

func parseSubscriptionStatus(raw json.RawMessage, path string) (Notification, error) {
	var s rawStatus
	if err := json.Unmarshal(raw, &s); err != nil {
		return Notification{}, malformed(path, jsonDetail(err))
	}
	n := Notification{Topic: s.Topic, Status: s.Status, Type: Type(s.Type), Shape: ShapeSubscriptionStatus}
	if s.Subscription != nil {
		n.Subscription = s.Subscription.Reference
	}
	if !isNull(s.EventsSinceSubscriptionStart) {
		v, err := parseCount(s.EventsSinceSubscriptionStart, path+".eventsSinceSubscriptionStart")
		if err != nil {
			return Notification{}, err
		}
		n.EventsSinceStart, n.HasEventsSinceStart = v, true
	}
	for i, e := range s.NotificationEvent {
		p := fmt.Sprintf("%s.notificationEvent[%d]", path, i)
		if isNull(e.EventNumber) {
			return Notification{}, malformed(p, "notificationEvent has no eventNumber")
		}
		num, err := parseCount(e.EventNumber, p+".eventNumber")
		if err != nil {
			return Notification{}, err
		}
		ev := Event{Number: num}
		if e.Timestamp != "" {
			if ev.Timestamp, err = parseInstant(e.Timestamp, p+".timestamp"); err != nil {
				return Notification{}, err
			}
		}
		if e.Focus != nil {
			ev.Focus = e.Focus.Reference
		}
		for _, c := range e.AdditionalContext {
			if c.Reference != "" {
				ev.AdditionalContext = append(ev.AdditionalContext, c.Reference)
			}
		}
		n.Events = append(n.Events, ev)
	}
	for _, c := range s.Error {
		if t := c.String(); t != "" {
			n.Errors = append(n.Errors, t)
		}
	}
	return n, nil
}
