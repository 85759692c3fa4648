// Package webhook is the inbound HTTP side of the live service: the
// endpoint FHIR servers deliver subscription notifications to. It
// authenticates the sender, bounds and classifies the body, hands what it
// found to a [Sink], and answers only after the sink has stored it.
//
// # Routes
//
// The handler answers under Config.Prefix ("/notify"); the caller mounts it,
// e.g. mux.Handle("/notify/", h) and mux.Handle("/notify", h).
//
//	POST|PUT /notify                 topic-based notification or classic rest-hook
//	PUT|POST /notify/{type}/{id}     classic rest-hook with payload (R4 PUTs to [endpoint]/[type]/[id])
//
// Both methods are accepted on both routes because servers differ (HAPI sent
// PUT where POST was expected, HAPI FHIR issue #807).
//
// On /notify the body decides:
//
//   - empty, or "{}": [Sink.Changed] (the classic R4 "go and search" POST).
//   - a notification Bundle (package fhir/notify): handshake and heartbeat
//     go to [Sink.Status] only. Otherwise included resources go to
//     [Sink.Resources], focus references without a resource to [Sink.Fetch],
//     and, when the notification names nothing readable (empty content),
//     [Sink.Changed]; then [Sink.Status]. The status comes last on purpose: if
//     storing the content fails, the stored counters stay behind and the next
//     notification reveals the gap.
//   - any other Bundle (batch, transaction, searchset, collection, a history
//     that is not a notification): the entries' resources go to
//     [Sink.Resources], and the resources its DELETE entries name (by
//     request.url, or the fullUrl of a conditional delete), with the
//     entry's response.lastModified when it has one, to [Sink.Deleted];
//     a Bundle with neither, or with a DELETE that names no resource, to
//     [Sink.Changed].
//   - any single resource: [Sink.Resources], since some servers POST the
//     changed resource itself.
//
// On /notify/{type}/{id} the type must be Observation or Patient (anything
// else is 400 not-supported: the path is well formed, the content is not
// something this service takes), the body must be a resource of that type,
// and its id must be present and equal the path id, as an R4 update requires
// (https://hl7.org/fhir/R4/http.html#update). An empty body there is taken as
// "this resource changed" and sent to [Sink.Fetch] as "{type}/{id}".
//
// # Authentication
//
// Every request, on every path, is authenticated first; nothing else is
// looked at before. The secret travels in a request header set through
// Subscription.channel.header: by default "Authorization: Bearer <secret>";
// when Config.Header names another header, that header's value is the secret
// itself ("X-Hook-Token: <secret>"). Comparison is constant-time over SHA-256
// digests. A missing, repeated or wrong credential is 401 with
// WWW-Authenticate: Bearer. New refuses an empty secret or one shorter than
// [MinSecretLen]; there is no unauthenticated mode.
//
// # Answers
//
// Every answer is an OperationOutcome (application/fhir+json), because some
// servers insist on a FHIR body in the hook response.
//
//	200  stored; an information issue sums up what was done, and each
//	     rejected resource adds a warning with its reason (rejections are
//	     permanent, so they are not retried)
//	400  not JSON, not a FHIR resource, a malformed notification, a wrong
//	     type or id on /notify/{type}/{id}, or a sink error wrapping ErrInvalid
//	401  authentication failed
//	404  a path that is neither route
//	405  a method other than POST and PUT, with Allow
//	413  a body over Config.MaxBodyBytes (4 MiB by default)
//	415  a Content-Type other than application/fhir+json, application/json
//	     or application/json+fhir (the DSTU2 name), a charset other than
//	     UTF-8, or a Content-Encoding; an empty body is accepted with any
//	     Content-Type
//	503  any other sink error: the sender keeps the notification and
//	     retries, so nothing unstored is acknowledged; with Retry-After
//	     when the sink says when to retry ([RetryLater]: a resource the
//	     notification names could not be read from the FHIR server in
//	     time)
//
// # Logging
//
// One line per request with the request id (X-Request-Id when the caller
// sent a plain token, else 16 random bytes in hex, echoed in the response),
// the method, the route template (never the path, which holds an id), the
// status and counts. Bodies, references and rejection details are never
// logged.
package webhook
