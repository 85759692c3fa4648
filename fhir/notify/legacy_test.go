package notify

// The parser as it was before the single-pass reader: encoding/json decodes
// the Bundle, then each entry's head, then the status again. It stays here,
// unchanged but for its names, as the reference the new reader is compared
// with (FuzzParseAgainstOld) and as the baseline of BenchmarkParse.

import (
	"bytes"
	"encoding/json"
	"fmt"
	"strconv"
	"strings"
	"time"
)

// OldParse is the former Parse, for the external tests.
func OldParse(body []byte) (Notification, error) { return oldParse(body) }

type oldRawBundle struct {
	ResourceType string        `json:"resourceType"`
	Type         string        `json:"type"`
	Entry        []oldRawEntry `json:"entry"`
}

type oldRawEntry struct {
	FullURL  string          `json:"fullUrl"`
	Resource json.RawMessage `json:"resource"`
}

type oldResourceHead struct {
	ResourceType *string `json:"resourceType"`
	ID           string  `json:"id"`
}

// Parse reads a notification body. See the package documentation for the
// shapes it accepts and the errors it returns.
func oldParse(body []byte) (Notification, error) {
	var probe map[string]json.RawMessage
	if err := json.Unmarshal(body, &probe); err != nil || probe == nil {
		return Notification{}, &Error{Kind: ErrNotJSON, Detail: oldJsonDetail(err)}
	}
	var rt string
	if raw, ok := probe["resourceType"]; !ok || json.Unmarshal(raw, &rt) != nil || rt == "" {
		return Notification{}, &Error{Kind: ErrNotBundle, Detail: "no resourceType"}
	}
	if rt != "Bundle" {
		return Notification{}, &Error{Kind: ErrNotBundle, Detail: "resourceType is " + safeToken(rt), ResourceType: rt}
	}
	var b oldRawBundle
	if err := json.Unmarshal(body, &b); err != nil {
		return Notification{}, malformed("Bundle", oldJsonDetail(err))
	}
	// Only subscription-notification says so outright; a history Bundle is a
	// notification only if its first entry is a status.
	explicit := b.Type == "subscription-notification"
	if !explicit && b.Type != "history" {
		return Notification{}, &Error{Kind: ErrNotNotification, Path: "Bundle.type", Detail: "type is " + safeToken(b.Type)}
	}
	notNotification := func(detail string) error {
		if explicit {
			return malformed("Bundle.entry[0]", detail)
		}
		return &Error{Kind: ErrNotNotification, Path: "Bundle.entry[0]", Detail: detail}
	}
	if len(b.Entry) == 0 || oldIsNull(b.Entry[0].Resource) {
		return Notification{}, notNotification("no subscription status entry")
	}
	oldHead, err := oldReadHead(b.Entry[0].Resource, "Bundle.entry[0].resource")
	if err != nil {
		return Notification{}, err
	}
	const statusPath = "Bundle.entry[0].resource"
	var n Notification
	switch oldHead.rt {
	case "Parameters":
		n, err = oldParseParameters(b.Entry[0].Resource, statusPath)
	case "SubscriptionStatus":
		n, err = oldParseSubscriptionStatus(b.Entry[0].Resource, statusPath)
	case "Basic":
		var found bool
		n, found, err = oldParseBasic(b.Entry[0].Resource, statusPath)
		if err == nil && !found {
			return Notification{}, notNotification("Basic without a subscription status extension")
		}
	default:
		return Notification{}, notNotification("first entry is " + safeToken(oldHead.rt))
	}
	if err != nil {
		return Notification{}, err
	}
	if err := n.check(statusPath); err != nil {
		return Notification{}, err
	}
	for i, e := range b.Entry[1:] {
		if oldIsNull(e.Resource) {
			continue // id-only entries carry only fullUrl and request
		}
		path := fmt.Sprintf("Bundle.entry[%d].resource", i+1)
		h, err := oldReadHead(e.Resource, path)
		if err != nil {
			return Notification{}, err
		}
		n.Resources = append(n.Resources, Entry{FullURL: e.FullURL, ResourceType: h.rt, ID: h.id, Resource: e.Resource})
	}
	n.oldMatchResources()
	return n, nil
}

type oldHead struct{ rt, id string }

func oldReadHead(raw json.RawMessage, path string) (oldHead, error) {
	var h oldResourceHead
	if err := json.Unmarshal(raw, &h); err != nil {
		return oldHead{}, malformed(path, oldJsonDetail(err))
	}
	if bytes.TrimSpace(raw)[0] != '{' {
		return oldHead{}, malformed(path, "resource is not an object")
	}
	if h.ResourceType == nil || *h.ResourceType == "" {
		return oldHead{}, malformed(path, "resource has no resourceType")
	}
	return oldHead{rt: *h.ResourceType, id: h.ID}, nil
}

// oldMatchResources attaches included resources to events and infers Content.
func (n *Notification) oldMatchResources() {
	byURL := make(map[string]int, len(n.Resources))
	type key struct{ typ, id string }
	byKey := make(map[key]int, len(n.Resources))
	for i, e := range n.Resources {
		if _, dup := byURL[e.FullURL]; e.FullURL != "" && !dup {
			byURL[e.FullURL] = i
		}
		if e.ID != "" {
			if _, dup := byKey[key{e.ResourceType, e.ID}]; !dup {
				byKey[key{e.ResourceType, e.ID}] = i
			}
		}
	}
	focused, included := 0, 0
	for i := range n.Events {
		ev := &n.Events[i]
		if ev.Focus == "" {
			continue
		}
		focused++
		j, ok := byURL[ev.Focus]
		if !ok {
			// A versioned focus still matches: full-resource content is the
			// version that triggered the event, and the entry's own
			// meta.versionId is what the caller should trust.
			if typ, id, rok := RelativeRef(ev.Focus, ""); rok {
				j, ok = byKey[key{typ, id}]
			}
		}
		if ok {
			ev.Resource = n.Resources[j].Resource
			included++
		}
	}
	switch {
	case focused == 0:
		n.Content = ContentEmpty
	case included == 0:
		n.Content = ContentIDOnly
	default:
		n.Content = ContentFullResource
	}
}

func oldIsNull(raw json.RawMessage) bool {
	t := bytes.TrimSpace(raw)
	return len(t) == 0 || bytes.Equal(t, []byte("null"))
}

// oldJsonDetail keeps the position and kind of a JSON error but never the
// offending text.
func oldJsonDetail(err error) string {
	switch e := err.(type) {
	case nil:
		return "not an object"
	case *json.SyntaxError:
		return fmt.Sprintf("invalid JSON at offset %d", e.Offset)
	case *json.UnmarshalTypeError:
		if e.Field != "" {
			return fmt.Sprintf("%s is a JSON %s, want %s", e.Field, e.Value, e.Type)
		}
		return fmt.Sprintf("a JSON %s where %s was expected", e.Value, e.Type)
	default:
		return "invalid JSON"
	}
}

type oldNode struct {
	name     string // normalised, see oldNormName
	key      string // the value[x] member, e.g. "valueString"
	value    json.RawMessage
	children []oldNode
	path     string
}

// oldNormName folds "events-since-subscription-start" (Parameters) and
// "eventsSinceSubscriptionStart" (R5 element, cross-version extension) to
// one spelling.
func oldNormName(s string) string {
	return oldNameFolder.Replace(strings.ToLower(s))
}

// oldNameFolder is built once: a Replacer builds its tables on first use,
// which cost more than the rest of parsing a notification.
var oldNameFolder = strings.NewReplacer("-", "", "_", "")

type oldRawParameters struct {
	Parameter []json.RawMessage `json:"parameter"`
}

func oldParseParameters(raw json.RawMessage, path string) (Notification, error) {
	var p oldRawParameters
	if err := json.Unmarshal(raw, &p); err != nil {
		return Notification{}, malformed(path, oldJsonDetail(err))
	}
	nodes, err := oldParamNodes(p.Parameter, path+".parameter", 0)
	if err != nil {
		return Notification{}, err
	}
	n, err := oldFromNodes(nodes)
	n.Shape = ShapeParameters
	return n, err
}

// oldMaxDepth bounds recursion on hostile input; the deepest real structure
// (parameter → part) is two levels.
const oldMaxDepth = 8

func oldParamNodes(list []json.RawMessage, path string, depth int) ([]oldNode, error) {
	if depth > oldMaxDepth {
		return nil, malformed(path, "nested too deeply")
	}
	out := make([]oldNode, 0, len(list))
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
		nd := oldNode{name: oldNormName(name), path: p}
		if err := oldSetValue(&nd, m); err != nil {
			return nil, err
		}
		if parts, ok := m["part"]; ok {
			var list []json.RawMessage
			if err := json.Unmarshal(parts, &list); err != nil {
				return nil, malformed(p+".part", "part is not an array")
			}
			var err error
			if nd.children, err = oldParamNodes(list, p+".part", depth+1); err != nil {
				return nil, err
			}
		}
		out = append(out, nd)
	}
	return out, nil
}

func oldSetValue(nd *oldNode, m map[string]json.RawMessage) error {
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

type oldRawBasic struct {
	Extension []json.RawMessage `json:"extension"`
}

// oldParseBasic reports found=false when the Basic carries nothing that looks
// like a subscription status, so that a history Bundle of Basic resources is
// not mistaken for a notification.
func oldParseBasic(raw json.RawMessage, path string) (n Notification, found bool, err error) {
	var b oldRawBasic
	if err := json.Unmarshal(raw, &b); err != nil {
		return Notification{}, false, malformed(path, oldJsonDetail(err))
	}
	nodes, err := oldExtNodes(b.Extension, path+".extension", 0)
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
	n, err = oldFromNodes(nodes)
	n.Shape = ShapeBasic
	return n, true, err
}

func oldExtNodes(list []json.RawMessage, path string, depth int) ([]oldNode, error) {
	if depth > oldMaxDepth {
		return nil, malformed(path, "nested too deeply")
	}
	out := make([]oldNode, 0, len(list))
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
		nd := oldNode{name: oldNormName(u), path: p}
		if err := oldSetValue(&nd, m); err != nil {
			return nil, err
		}
		if sub, ok := m["extension"]; ok {
			var list []json.RawMessage
			if err := json.Unmarshal(sub, &list); err != nil {
				return nil, malformed(p+".extension", "extension is not an array")
			}
			var err error
			if nd.children, err = oldExtNodes(list, p+".extension", depth+1); err != nil {
				return nil, err
			}
		}
		out = append(out, nd)
	}
	return out, nil
}

// oldFromNodes interprets the flattened status. Names it does not know
// (eventsInNotification from drafts, extensions) are ignored.
func oldFromNodes(nodes []oldNode) (Notification, error) {
	var n Notification
	seen := map[string]string{}
	once := func(nd oldNode) error {
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
			n.Subscription, err = oldRefValue(nd)
		case "topic":
			n.Topic, err = oldStringValue(nd)
		case "status":
			n.Status, err = oldStringValue(nd)
		case "type":
			var s string
			s, err = oldStringValue(nd)
			n.Type = Type(s)
		case "eventssincesubscriptionstart":
			n.EventsSinceStart, err = oldCountValue(nd)
			n.HasEventsSinceStart = err == nil
		case "notificationevent":
			var ev Event
			ev, err = oldEventFromNodes(nd)
			n.Events = append(n.Events, ev)
		case "error":
			var s string
			s, err = oldConceptValue(nd)
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

func oldEventFromNodes(parent oldNode) (Event, error) {
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
			ev.Number, err = oldCountValue(nd)
		case "timestamp":
			if hasTime {
				return ev, malformed(nd.path, "repeats timestamp")
			}
			hasTime = true
			ev.Timestamp, err = oldTimeValue(nd)
		case "focus":
			if hasFocus {
				return ev, malformed(nd.path, "repeats focus")
			}
			hasFocus = true
			ev.Focus, err = oldRefValue(nd)
		case "additionalcontext":
			var r string
			r, err = oldRefValue(nd)
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

type oldRawRef struct {
	Reference string `json:"reference"`
}

// oldRefValue reads a Reference, or a bare string for servers that put the URL
// in a valueUri, valueCanonical or valueString.
func oldRefValue(nd oldNode) (string, error) {
	switch nd.key {
	case "valueReference":
		var r oldRawRef
		if err := json.Unmarshal(nd.value, &r); err != nil {
			return "", malformed(nd.path, "valueReference is not a Reference")
		}
		return r.Reference, nil
	case "valueUri", "valueUrl", "valueCanonical", "valueString":
		return oldStringValue(nd)
	case "":
		return "", nil
	default:
		return "", malformed(nd.path, nd.key+" where a Reference was expected")
	}
}

func oldStringValue(nd oldNode) (string, error) {
	if nd.key == "" {
		return "", nil
	}
	var s string
	if err := json.Unmarshal(nd.value, &s); err != nil {
		return "", malformed(nd.path, nd.key+" is not a string")
	}
	return s, nil
}

func oldCountValue(nd oldNode) (uint64, error) {
	if nd.key == "" {
		return 0, malformed(nd.path, "counter has no value")
	}
	return oldParseCount(nd.value, nd.path+"."+nd.key)
}

// oldParseCount accepts a non-negative integer written as a JSON string
// (R4 string, R5 integer64) or as a JSON number (what some servers send).
func oldParseCount(raw json.RawMessage, path string) (uint64, error) {
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

func oldTimeValue(nd oldNode) (time.Time, error) {
	s, err := oldStringValue(nd)
	if err != nil || s == "" {
		return time.Time{}, err
	}
	return oldParseInstant(s, nd.path+"."+nd.key)
}

// oldParseInstant reads a FHIR instant. RFC 3339 parsing in Go takes any
// number of fractional digits, which matters because the IG's own examples
// have seven ("2020-05-29T11:44:13.1882432-05:00").
func oldParseInstant(s, path string) (time.Time, error) {
	t, err := time.Parse(time.RFC3339Nano, s)
	if err != nil {
		return time.Time{}, malformed(path, "timestamp is not an instant")
	}
	return t, nil
}

type oldRawConcept struct {
	Coding []struct {
		System string `json:"system"`
		Code   string `json:"code"`
	} `json:"coding"`
	Text string `json:"text"`
}

func (c oldRawConcept) String() string {
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

func oldConceptValue(nd oldNode) (string, error) {
	switch nd.key {
	case "valueCodeableConcept":
		var c oldRawConcept
		if err := json.Unmarshal(nd.value, &c); err != nil {
			return "", malformed(nd.path, "valueCodeableConcept is not a CodeableConcept")
		}
		return c.String(), nil
	case "valueCode", "valueString":
		return oldStringValue(nd)
	case "":
		return "", nil
	default:
		return "", malformed(nd.path, nd.key+" where a CodeableConcept was expected")
	}
}

// oldRawStatus is SubscriptionStatus as R4B and R5 define it. Counters stay
// raw so that both string and number forms can be accepted.
type oldRawStatus struct {
	Subscription                 *oldRawRef      `json:"subscription"`
	Topic                        string          `json:"topic"`
	Status                       string          `json:"status"`
	Type                         string          `json:"type"`
	EventsSinceSubscriptionStart json.RawMessage `json:"eventsSinceSubscriptionStart"`
	NotificationEvent            []struct {
		EventNumber       json.RawMessage `json:"eventNumber"`
		Timestamp         string          `json:"timestamp"`
		Focus             *oldRawRef      `json:"focus"`
		AdditionalContext []oldRawRef     `json:"additionalContext"`
	} `json:"notificationEvent"`
	Error []oldRawConcept `json:"error"`
}

func oldParseSubscriptionStatus(raw json.RawMessage, path string) (Notification, error) {
	var s oldRawStatus
	if err := json.Unmarshal(raw, &s); err != nil {
		return Notification{}, malformed(path, oldJsonDetail(err))
	}
	n := Notification{Topic: s.Topic, Status: s.Status, Type: Type(s.Type), Shape: ShapeSubscriptionStatus}
	if s.Subscription != nil {
		n.Subscription = s.Subscription.Reference
	}
	if !oldIsNull(s.EventsSinceSubscriptionStart) {
		v, err := oldParseCount(s.EventsSinceSubscriptionStart, path+".eventsSinceSubscriptionStart")
		if err != nil {
			return Notification{}, err
		}
		n.EventsSinceStart, n.HasEventsSinceStart = v, true
	}
	for i, e := range s.NotificationEvent {
		p := fmt.Sprintf("%s.notificationEvent[%d]", path, i)
		if oldIsNull(e.EventNumber) {
			return Notification{}, malformed(p, "notificationEvent has no eventNumber")
		}
		num, err := oldParseCount(e.EventNumber, p+".eventNumber")
		if err != nil {
			return Notification{}, err
		}
		ev := Event{Number: num}
		if e.Timestamp != "" {
			if ev.Timestamp, err = oldParseInstant(e.Timestamp, p+".timestamp"); err != nil {
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
