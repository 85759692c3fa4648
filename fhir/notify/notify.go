package notify

import (
	"bytes"
	"encoding/json"
	"fmt"
	"time"
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

type rawBundle struct {
	ResourceType string     `json:"resourceType"`
	Type         string     `json:"type"`
	Entry        []rawEntry `json:"entry"`
}

type rawEntry struct {
	FullURL  string          `json:"fullUrl"`
	Resource json.RawMessage `json:"resource"`
}

type resourceHead struct {
	ResourceType *string `json:"resourceType"`
	ID           string  `json:"id"`
}

// Parse reads a notification body. See the package documentation for the
// shapes it accepts and the errors it returns.
func Parse(body []byte) (Notification, error) {
	var probe map[string]json.RawMessage
	if err := json.Unmarshal(body, &probe); err != nil || probe == nil {
		return Notification{}, &Error{Kind: ErrNotJSON, Detail: jsonDetail(err)}
	}
	var rt string
	if raw, ok := probe["resourceType"]; !ok || json.Unmarshal(raw, &rt) != nil || rt == "" {
		return Notification{}, &Error{Kind: ErrNotBundle, Detail: "no resourceType"}
	}
	if rt != "Bundle" {
		return Notification{}, &Error{Kind: ErrNotBundle, Detail: "resourceType is " + safeToken(rt), ResourceType: rt}
	}
	var b rawBundle
	if err := json.Unmarshal(body, &b); err != nil {
		return Notification{}, malformed("Bundle", jsonDetail(err))
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
	if len(b.Entry) == 0 || isNull(b.Entry[0].Resource) {
		return Notification{}, notNotification("no subscription status entry")
	}
	head, err := readHead(b.Entry[0].Resource, "Bundle.entry[0].resource")
	if err != nil {
		return Notification{}, err
	}
	const statusPath = "Bundle.entry[0].resource"
	var n Notification
	switch head.rt {
	case "Parameters":
		n, err = parseParameters(b.Entry[0].Resource, statusPath)
	case "SubscriptionStatus":
		n, err = parseSubscriptionStatus(b.Entry[0].Resource, statusPath)
	case "Basic":
		var found bool
		n, found, err = parseBasic(b.Entry[0].Resource, statusPath)
		if err == nil && !found {
			return Notification{}, notNotification("Basic without a subscription status extension")
		}
	default:
		return Notification{}, notNotification("first entry is " + safeToken(head.rt))
	}
	if err != nil {
		return Notification{}, err
	}
	if err := n.check(statusPath); err != nil {
		return Notification{}, err
	}
	for i, e := range b.Entry[1:] {
		if isNull(e.Resource) {
			continue // id-only entries carry only fullUrl and request
		}
		path := fmt.Sprintf("Bundle.entry[%d].resource", i+1)
		h, err := readHead(e.Resource, path)
		if err != nil {
			return Notification{}, err
		}
		n.Resources = append(n.Resources, Entry{FullURL: e.FullURL, ResourceType: h.rt, ID: h.id, Resource: e.Resource})
	}
	n.matchResources()
	return n, nil
}

type head struct{ rt, id string }

func readHead(raw json.RawMessage, path string) (head, error) {
	var h resourceHead
	if err := json.Unmarshal(raw, &h); err != nil {
		return head{}, malformed(path, jsonDetail(err))
	}
	if bytes.TrimSpace(raw)[0] != '{' {
		return head{}, malformed(path, "resource is not an object")
	}
	if h.ResourceType == nil || *h.ResourceType == "" {
		return head{}, malformed(path, "resource has no resourceType")
	}
	return head{rt: *h.ResourceType, id: h.ID}, nil
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

// matchResources attaches included resources to events and infers Content.
func (n *Notification) matchResources() {
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

func isNull(raw json.RawMessage) bool {
	t := bytes.TrimSpace(raw)
	return len(t) == 0 || bytes.Equal(t, []byte("null"))
}

// jsonDetail keeps the position and kind of a JSON error but never the
// offending text.
func jsonDetail(err error) string {
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
