// Package notify parses the bodies FHIR servers POST to a subscription
// endpoint into one shape, whatever the FHIR version the server speaks.
//
// It is pure parsing: no I/O, no logging, no clock. The webhook (package
// api/webhook) decides what to do with a [Notification]; this package only
// says what the body claims.
//
// # Shapes recognised
//
// A notification is a Bundle whose first entry is the subscription status
// (HL7 FHIR Subscriptions R5 Backport IG STU 1.1.0,
// https://hl7.org/fhir/uv/subscriptions-backport/STU1.1/):
//
//   - R4 backport: Bundle.type "history", entry[0] a Parameters (profile
//     backport-subscription-status-r4) with the parameters subscription,
//     topic, status, type, events-since-subscription-start,
//     notification-event (parts event-number, timestamp, focus,
//     additional-context) and error.
//   - R4B and R5: Bundle.type "history" or "subscription-notification",
//     entry[0] a SubscriptionStatus with subscription.reference, topic,
//     status, type, eventsSinceSubscriptionStart and
//     notificationEvent[{eventNumber, timestamp, focus, additionalContext}].
//   - R4 with a Basic in entry[0]: a later build of the IG describes the
//     status as "a Basic resource with a complex extension". That text was
//     not checked against a published version, so the mapping is a best
//     guess modelled on the FHIR cross-version extensions: the elements are
//     looked for as sub-extensions of an extension whose URL ends in
//     "SubscriptionStatus", or else directly in Basic.extension, named by
//     their R5 element names or by the Parameters names.
//
// Counters (events-since-subscription-start, event-number) are string in the
// R4 profile and integer64 in R5, which JSON also writes as a string; servers
// have been seen sending plain JSON numbers too, so any value[x] holding a
// non-negative integer as a string or as a number is accepted.
// eventsInNotification, which only drafts had, is ignored.
//
// # Content
//
// Notification.Content is inferred from the body rather than trusted from
// the Subscription, because the webhook does not know which Subscription a
// body belongs to before parsing it: no events, or events without a focus,
// is [ContentEmpty]; a focus whose resource is not in the Bundle makes it
// [ContentIDOnly]; a focus whose resource is included makes it
// [ContentFullResource]. A full-resource notification may still leave a
// resource out ("If a resource can't be included, request/response are filled
// in instead", same IG), so a mix of present and absent focus resources is
// full-resource, and each [Event] says for itself whether its resource came.
//
// # Reading
//
// A body is read once, without encoding/json decoding it into Go values:
// the reader (read.go) walks the text with package fhir/jsonscan, keeps the members it
// needs, and hands each resource on as a slice of the body, which the
// caller passes to the decoder as it is. It matches member names and treats
// nulls and values of the wrong type as the encoding/json structs it
// replaced did, and a differential fuzz test holds it to the earlier parser.
//
// # Errors
//
// Every error wraps one of [ErrNotJSON], [ErrNotBundle], [ErrNotNotification]
// or [ErrMalformed], and is a [*Error] saying where. A single resource (an
// Observation PUT by a classic R4 rest-hook) gives ErrNotBundle, and a
// transaction, batch or searchset Bundle gives ErrNotNotification: callers
// treat those as classic payloads.
package notify
