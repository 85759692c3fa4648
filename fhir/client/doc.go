// Package client is the service's FHIR R4 REST client: JSON only, context first, built on
// net/http from the standard library.
//
// # Operations
//
// [Client.Read], [Client.VRead], [Client.Create], [Client.ConditionalCreate], [Client.Update],
// [Client.Search] and [Client.Transaction] take and return raw JSON. Turning resources into
// typed values is the caller's job (package fhir does it with the samply R4 models), so this
// package never drops fields it does not know.
//
// # Paging
//
// [Client.Search] follows Bundle.link[relation=next] exactly as the server wrote it and stops only
// when a page has no next link. It never builds page URLs itself and never treats a short page as
// the last one: R4 lets a server return fewer entries than _count on any page
// (https://hl7.org/fhir/R4/http.html#paging). A next link on another scheme or host is refused
// rather than followed, so credentials are never sent to a server the caller did not configure.
//
// # Retries
//
// Each call makes up to 1+MaxRetries attempts. Between attempts it waits for exponential backoff
// with full jitter (a uniform draw from [0, min(BackoffMax, BackoffBase·2^attempt)]) unless the
// server answered 429 or 503 with Retry-After, in which case it waits exactly that long (seconds
// or HTTP-date, RFC 9110 §10.2.3), capped at MaxRetryAfter. Which failures are retried:
//
//   - 429 and 503, for every operation: the server says it did not do the work.
//   - Failures to connect (dial errors), for every operation: nothing reached the server.
//   - 408, 500, 502, 504 and lost responses (reset, EOF, timeout after sending), only when the
//     operation is safe to repeat: reads, searches, PUT, conditional create, and transactions or
//     batches whose every entry is a GET, PUT, DELETE or a POST with ifNoneExist. A plain POST
//     might have been applied already, and repeating it would store a duplicate.
//   - Nothing else: other 4xx come back at once as [*Error].
//
// Waits end early when the context is cancelled, and a wait that would outlast the context's
// deadline is not started. The wait function is [Config.Sleep], so tests can record waits
// instead of sleeping.
//
// # Errors
//
// Failures are [*Error] values carrying the HTTP status, the OperationOutcome text (diagnostics,
// else details.text) when the body is FHIR JSON, otherwise a short cleaned prefix of the body,
// and whether the failure was transient. Match them with errors.Is against the sentinels
// ([ErrNotFound], [ErrPreconditionFailed], [ErrThrottled], ...) or errors.As for the details.
//
// # Logging and metrics
//
// Every attempt is logged at debug level with the operation, the resource type, the status and
// the attempt number. URLs are never logged, because search queries carry patient references,
// and neither are bodies. [Config.Observer] receives (operation, status, duration) per attempt,
// so the service can export histograms without this package importing a metrics library.
package client
