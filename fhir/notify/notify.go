package notify

import (
	"encoding/json"
	"errors"
	"fmt"
	"time"

	"github.com/deadspace-fhir/deadspace/fhir/jsonscan"
)

// Type is the notification type (http://hl7.org/fhir/subscription-notification-type).
type Type string

// Notification types. Unknown codes are passed through as given.
const (
	TypeHandshake   Type = "handshake"
	TypeHeartbeat   Type = "heartbeat"
	TypeEvent       Type = "event-notification"
	TypeQueryStatus Type = "query-status"
	TypeQueryEvent  Type = "query-event"
)

// Content is how much of the changed resources a notification carries.
type Content string

// Payload contents (backport-content-code-system).
const (
	ContentEmpty        Content = "empty"
	ContentIDOnly       Content = "id-only"
	ContentFullResource Content = "full-resource"
)

// Shape is which representation of the subscription status the body used.
type Shape string

// Shapes of the status entry.
const (
	ShapeParameters         Shape = "Parameters"         // R4 backport
	ShapeBasic              Shape = "Basic"              // R4, later IG build
	ShapeSubscriptionStatus Shape = "SubscriptionStatus" // R4B, R5
)

// Notification is a parsed subscription notification.
type Notification struct {
	// Subscription is the Subscription reference as the server wrote it,
	// often an absolute URL.
	Subscription string
	// Topic is the SubscriptionTopic canonical, empty when absent.
	Topic string
	// Status is the subscription status code (requested, active, error,
	// off, entered-in-error), empty when absent.
	Status string
	Type   Type
	// EventsSinceStart is the server's count of events since the
	// subscription started, which handshakes and heartbeats do not
	// increment. HasEventsSinceStart says whether the body had it.
	EventsSinceStart    uint64
	HasEventsSinceStart bool
	Events              []Event
	// Errors are the status's error codes, as "system|code", "code" or
	// text when a CodeableConcept has no coding.
	Errors []string
	// Content is inferred from the body; see the package documentation.
	Content Content
	// Resources are the Bundle entries after the status that carry a
	// resource, in Bundle order: focus resources and additional context.
	Resources []Entry
	Shape     Shape
}

// Event is one notification-event.
type Event struct {
	Number uint64
	// Timestamp is zero when the event has none.
	Timestamp time.Time
	// Focus is the focus reference as given, possibly an absolute URL or a
	// versioned reference; empty for empty-content notifications.
	Focus             string
	AdditionalContext []string
	// Resource is the focus resource when the Bundle includes it, matched
	// by fullUrl, or else by type and id; nil otherwise.
	Resource json.RawMessage
}

// Entry is a Bundle entry that carries a resource.
type Entry struct {
	FullURL      string
	ResourceType string
	ID           string
	Resource     json.RawMessage
}

// statusPath is where the subscription status sits in every notification.
const statusPath = "Bundle.entry[0].resource"

// Parse reads a notification body. See the package documentation for the
// shapes it accepts and the errors it returns.
//
// The body is read in one pass (see reader); resources come back as slices
// of body, not copies, so the caller must not change body while it uses the
// Notification.
func Parse(body []byte) (Notification, error) {
	r := reader{body: body}
	if err := r.read(); err != nil {
		return Notification{}, &Error{Kind: ErrNotJSON, Detail: syntaxDetail(body)}
	}
	return r.notification()
}

// notification interprets what read found, reporting problems in the order
// the encoding/json parser before it did: the body, the Bundle's members,
// the Bundle's type, the status entry, the other entries.
func (r *reader) notification() (Notification, error) {
	switch r.top {
	case jsonscan.Object:
	case jsonscan.Null:
		return Notification{}, &Error{Kind: ErrNotJSON, Detail: "not an object"}
	default:
		return Notification{}, &Error{Kind: ErrNotJSON, Detail: "a JSON " + r.top.String() + " where an object was expected"}
	}
	if r.rtKind != jsonscan.String || len(r.rt.b) == 0 {
		return Notification{}, &Error{Kind: ErrNotBundle, Detail: "no resourceType"}
	}
	if !r.rt.is("Bundle") {
		rt := resourceTypeName(r.rt)
		return Notification{}, &Error{Kind: ErrNotBundle, Detail: "resourceType is " + safeToken(rt), ResourceType: rt}
	}
	if r.bundleErr.found() {
		return Notification{}, malformed("Bundle", r.bundleErr.detail())
	}
	// Only subscription-notification says so outright; a history Bundle is a
	// notification only if its first entry is a status.
	explicit := r.bundleType.is("subscription-notification")
	if !explicit && !r.bundleType.is("history") {
		return Notification{}, &Error{Kind: ErrNotNotification, Path: "Bundle.type", Detail: "type is " + safeToken(r.bundleType.String())}
	}
	notNotification := func(detail string) error {
		if explicit {
			return malformed("Bundle.entry[0]", detail)
		}
		return &Error{Kind: ErrNotNotification, Path: "Bundle.entry[0]", Detail: detail}
	}
	st := &r.status
	if r.entries == 0 || st.kind == jsonscan.Invalid || st.kind == jsonscan.Null {
		return Notification{}, notNotification("no subscription status entry")
	}
	if st.kind != jsonscan.Object {
		return Notification{}, malformed(statusPath, "resource is a JSON "+st.kind.String()+", want an object")
	}
	rt, _, err := st.head.check(statusPath)
	if err != nil {
		return Notification{}, err
	}
	var n Notification
	switch rt {
	case "Parameters":
		n, err = r.parameters()
	case "SubscriptionStatus":
		n, err = r.subscriptionStatus()
	case "Basic":
		var found bool
		n, found, err = r.basic()
		if err == nil && !found {
			return Notification{}, notNotification("Basic without a subscription status extension")
		}
	default:
		return Notification{}, notNotification("first entry is " + safeToken(rt))
	}
	if err != nil {
		return Notification{}, err
	}
	if err := n.check(statusPath); err != nil {
		return Notification{}, err
	}
	if r.entryErr != nil {
		return Notification{}, r.entryErr
	}
	n.Resources = r.resources
	n.matchResources()
	return n, nil
}

// check enforces the cardinalities the webhook depends on: without the
// subscription and the type a notification cannot be attributed or acted on.
// Status is 1..1 in the R4 profile but 0..1 in R5, and nothing here needs
// it, so it is not required.
func (n *Notification) check(path string) error {
	if n.Subscription == "" {
		return malformed(path, "no subscription reference")
	}
	if n.Type == "" {
		return malformed(path, "no notification type")
	}
	return nil
}

// smallMatch is the number of resources up to which matchResources
// compares references one by one instead of building maps: one or two
// resources is the usual notification.
const smallMatch = 8

// matchResources attaches included resources to events and infers Content.
// A focus matches the first resource with the same fullUrl, or else the
// first with the same type and id.
func (n *Notification) matchResources() {
	type key struct{ typ, id string }
	var byURL map[string]int
	var byKey map[key]int
	if len(n.Resources) > smallMatch {
		byURL = make(map[string]int, len(n.Resources))
		byKey = make(map[key]int, len(n.Resources))
		for i, e := range n.Resources {
			if _, dup := byURL[e.FullURL]; e.FullURL != "" && !dup {
				byURL[e.FullURL] = i
			}
			if _, dup := byKey[key{e.ResourceType, e.ID}]; e.ID != "" && !dup {
				byKey[key{e.ResourceType, e.ID}] = i
			}
		}
	}
	byURLFind := func(u string) (int, bool) {
		if byURL != nil {
			j, ok := byURL[u]
			return j, ok
		}
		for j, e := range n.Resources {
			if e.FullURL == u {
				return j, true
			}
		}
		return 0, false
	}
	byKeyFind := func(typ, id string) (int, bool) {
		if byKey != nil {
			j, ok := byKey[key{typ, id}]
			return j, ok
		}
		for j, e := range n.Resources {
			if e.ID != "" && e.ID == id && e.ResourceType == typ {
				return j, true
			}
		}
		return 0, false
	}
	focused, included := 0, 0
	for i := range n.Events {
		ev := &n.Events[i]
		if ev.Focus == "" {
			continue
		}
		focused++
		j, ok := byURLFind(ev.Focus)
		if !ok {
			// A versioned focus still matches: full-resource content is the
			// version that triggered the event, and the entry's own
			// meta.versionId is what the caller should trust.
			if typ, id, rok := RelativeRef(ev.Focus, ""); rok {
				j, ok = byKeyFind(typ, id)
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

// syntaxDetail keeps the position of a JSON syntax error but never the
// offending text. encoding/json finds the position, as it did before the
// body was read in one pass, so the answer to a sender is unchanged.
func syntaxDetail(body []byte) string {
	var raw json.RawMessage
	if e, ok := errors.AsType[*json.SyntaxError](json.Unmarshal(body, &raw)); ok {
		return fmt.Sprintf("invalid JSON at offset %d", e.Offset)
	}
	return "invalid JSON"
}

// safeToken quotes a code from the body only if it looks like a code, so an
// error never carries arbitrary text (or an identifier) from the sender.
func safeToken(s string) string {
	if s == "" {
		return "empty"
	}
	if len(s) > 40 {
		return "an unrecognised value"
	}
	for _, r := range s {
		if !(r >= 'a' && r <= 'z' || r >= 'A' && r <= 'Z' || r >= '0' && r <= '9' || r == '-') {
			return "an unrecognised value"
		}
	}
	return fmt.Sprintf("%q", s)
}
