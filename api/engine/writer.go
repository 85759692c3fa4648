package engine

import (
	"bytes"
	"context"
	"crypto/sha256"
	"encoding/hex"
	"encoding/json"
	"errors"
	"fmt"
	"math/rand/v2"
	"net/http"
	"net/url"
	"regexp"
	"time"

	"github.com/samply/golang-fhir-models/fhir-models/fhir"

	"github.com/deadspace-fhir/deadspace/api/store"
	"github.com/deadspace-fhir/deadspace/fhir/client"
	"github.com/deadspace-fhir/deadspace/fhir/encode"
)

// errOrphan means a write updates a derived Observation the server never
// acknowledged creating: its create was refused. Writes of one series go in
// order, so by the time this write is sent no create can still be pending.
var errOrphan = errors.New("the derived Observation was never created on the server (its create was refused; see the dead letters)")

// Backoff bounds for outbox retries. The client already retries each call a
// few times; these are the longer waits between outbox attempts.
const (
	backoffBase = 500 * time.Millisecond
	backoffMax  = 2 * time.Minute
)

func (e *Engine) writeLoop(ctx context.Context) {
	for {
		wait := e.drain(ctx)
		t := time.NewTimer(wait)
		select {
		case <-ctx.Done():
			t.Stop()
			return
		case <-e.flush:
		case <-t.C:
		}
		t.Stop()
	}
}

// FlushNow sends every due write once, for tests and shutdown.
func (e *Engine) FlushNow(ctx context.Context) { e.drain(ctx) }

// drain sends due writes until none is due and returns how long to wait.
//
// Writes of one series go in the order they were queued: a write waits
// while an earlier write that carries any of its series is still in the
// outbox (not yet due, or failed in this pass). Otherwise a revision
// retried after an outage could overtake, and undo, a later withdrawal.
func (e *Engine) drain(ctx context.Context) time.Duration {
	for ctx.Err() == nil {
		pending, err := e.cfg.Store.DueWrites(ctx, farFuture, outboxScan)
		if err != nil {
			e.log.ErrorContext(ctx, "reading the outbox failed", "err", err)
			return time.Second
		}
		if len(pending) == 0 {
			e.mu.Lock()
			e.outboxBlocked = time.Time{}
			e.mu.Unlock()
			return 30 * time.Second
		}
		now := e.now()
		blocked := make(map[string]bool)
		progressed := false
		for _, w := range pending {
			if ctx.Err() != nil {
				return 0
			}
			waits := w.NotBefore.After(now)
			for _, s := range w.Series {
				waits = waits || blocked[s]
			}
			if !waits {
				ok, err := e.attempt(ctx, w)
				if err != nil {
					e.log.ErrorContext(ctx, "recording a write's outcome failed; backing off", "write", w.ID, "err", err)
					return time.Second
				}
				if ok {
					progressed = true
					continue
				}
			}
			for _, s := range w.Series {
				blocked[s] = true
			}
		}
		if !progressed {
			return 250 * time.Millisecond
		}
	}
	return 0
}

// farFuture makes DueWrites list the whole outbox, due or not.
var farFuture = time.Date(9999, 1, 1, 0, 0, 0, 0, time.UTC)

// outboxScan bounds one pass over the outbox.
const outboxScan = 512

// attempt sends one write and records the outcome. It reports whether the
// write left the outbox (acknowledged or buried); an error means the store
// could not record the outcome.
func (e *Engine) attempt(ctx context.Context, w store.Write) (bool, error) {
	server, err := e.send(ctx, w)
	now := e.now()
	switch {
	case err == nil:
		if aerr := e.cfg.Store.Acknowledge(ctx, w.ID, server); aerr != nil {
			// The server has it; the next attempt's conditional creates
			// will find it again rather than write it twice.
			return false, aerr
		}
		e.writeResult("acknowledged")
		e.mu.Lock()
		e.outboxBlocked = time.Time{}
		e.mu.Unlock()
		return true, nil
	case ctx.Err() != nil:
		// Shutting down: the write stays in the outbox as it was.
		return false, nil
	case permanent(err):
		reason := err.Error()
		if berr := e.cfg.Store.Bury(ctx, w.ID, reason, now); berr != nil {
			return false, berr
		}
		e.writeResult("dead-letter")
		if e.cfg.Hooks.DeadLetter != nil {
			e.cfg.Hooks.DeadLetter()
		}
		e.log.ErrorContext(ctx, "the FHIR server refused a write; moved to the dead letters", "write", w.ID, "reason", redact(reason))
		return true, nil
	default:
		wait := backoff(w.Attempts)
		var ce *client.Error
		if errors.As(err, &ce) && ce.RetryAfter > wait {
			wait = ce.RetryAfter
		}
		if rerr := e.cfg.Store.Reschedule(ctx, w.ID, now.Add(wait), err.Error()); rerr != nil {
			return false, rerr
		}
		e.writeResult("retry")
		e.mu.Lock()
		if e.outboxBlocked.IsZero() {
			e.outboxBlocked = now
		}
		e.mu.Unlock()
		e.log.WarnContext(ctx, "write failed; will retry", "write", w.ID, "attempt", w.Attempts+1, "wait", wait, "err", redact(err.Error()))
		return false, nil
	}
}

// refPattern matches FHIR references, which can name a patient.
var refPattern = regexp.MustCompile(`\b([A-Z][A-Za-z]{1,63})/[A-Za-z0-9\-.]{1,64}`)

// redact hides the ids in references inside a server's error text before it
// is logged: an OperationOutcome may say "Patient/123 not found". The
// dead-letter record keeps the text whole for the operator.
func redact(s string) string { return refPattern.ReplaceAllString(s, "$1/[redacted]") }

func (e *Engine) writeResult(outcome string) {
	if e.cfg.Hooks.WriteResult != nil {
		e.cfg.Hooks.WriteResult(outcome)
	}
}

// permanent reports whether the server refused the write for a reason a
// retry cannot change: the content (400, 422), the resource (404, 405,
// 410), or a create this write depends on that was itself refused.
// Authentication (401, 403) and conflicts (409, 412) are retried: a
// rotated credential or a concurrent edit must not send a whole backlog
// to the dead letters.
func permanent(err error) bool {
	if errors.Is(err, errOrphan) {
		return true
	}
	var ce *client.Error
	if !errors.As(err, &ce) {
		return false
	}
	switch ce.Status {
	case http.StatusBadRequest, http.StatusNotFound, http.StatusMethodNotAllowed, http.StatusGone, http.StatusUnprocessableEntity:
		return true
	}
	return false
}

// backoff is exponential with full jitter.
func backoff(attempts int) time.Duration {
	d := backoffBase << min(attempts, 16)
	if d <= 0 || d > backoffMax {
		d = backoffMax
	}
	return time.Duration(rand.Int64N(int64(d)) + 1)
}

// urn returns a stable urn:uuid for a name, so the same write always uses
// the same fullUrls.
func urn(name string) string {
	h := sha256.Sum256([]byte("deadspace fullUrl\x00" + name))
	h[6] = (h[6] & 0x0f) | 0x50 // version 5 style: name-based
	h[8] = (h[8] & 0x3f) | 0x80
	x := hex.EncodeToString(h[:16])
	return "urn:uuid:" + x[0:8] + "-" + x[8:12] + "-" + x[12:16] + "-" + x[16:20] + "-" + x[20:32]
}

type txEntry struct {
	FullURL  string          `json:"fullUrl,omitempty"`
	Resource json.RawMessage `json:"resource"`
	Request  txRequest       `json:"request"`
}

type txRequest struct {
	Method      string `json:"method"`
	URL         string `json:"url"`
	IfNoneExist string `json:"ifNoneExist,omitempty"`
}

// send builds the write's transactions, posts them, and returns the
// server's id and version of each series it carried.
//
// A server may cap the entries of a transaction that needs strict isolation
// (conditional creates do): Medplum's cap is 8. When a write fits, it is one
// transaction of Observations and Provenance; when it does not, the
// Observations go in transactions of at most MaxTransactionEntries and the
// Provenance follows on its own. Every request is conditional, so a crash
// between them is mended by sending the write again.
func (e *Engine) send(ctx context.Context, w store.Write) (map[string][2]string, error) {
	var body writeBody
	if err := json.Unmarshal(w.Body, &body); err != nil {
		return nil, &client.Error{Op: "decode outbox write", Status: http.StatusBadRequest, Outcome: err.Error()}
	}
	enc := e.cfg.Encoder
	opts := enc.Options()
	deviceRef, err := e.serverDevice(ctx)
	if err != nil {
		return nil, err
	}
	rewrite := map[string]string{enc.DeviceRef(): deviceRef}

	bundle, err := e.bundleOf(ctx, body)
	if err != nil {
		return nil, err
	}
	var obsEntries []txEntry
	for i, o := range bundle.Observations {
		req := txRequest{Method: "PUT", URL: "Observation/" + *o.Id}
		fullURL := ""
		if body.Kind == writeCreate {
			key, _ := identifiers(o)
			req = txRequest{Method: "POST", URL: "Observation", IfNoneExist: "identifier=" + opts.IdentifierSystem + "|" + key}
			fullURL = urn(body.Series[i])
			rewrite["Observation/"+*o.Id] = fullURL
			o.Id = nil
		} else {
			o.Meta = nil
		}
		raw, err := marshalRewritten(o, rewrite)
		if err != nil {
			return nil, err
		}
		obsEntries = append(obsEntries, txEntry{FullURL: fullURL, Resource: raw, Request: req})
	}
	prov := bundle.Provenance
	tag := *prov.Id
	prov.Id = nil
	prov.Meta = &fhir.Meta{Tag: []fhir.Coding{{System: &e.cfg.ProvenanceTagSystem, Code: &tag}}}
	provQuery := "_tag=" + e.cfg.ProvenanceTagSystem + "|" + tag

	server := make(map[string][2]string, len(body.Series))
	if len(obsEntries)+1 <= e.maxEntries() {
		provJSON, err := marshalRewritten(prov, rewrite)
		if err != nil {
			return nil, err
		}
		entries := append(obsEntries, txEntry{
			FullURL: urn("Provenance/" + tag), Resource: provJSON,
			Request: txRequest{Method: "POST", URL: "Provenance", IfNoneExist: provQuery},
		})
		resp, err := e.transaction(ctx, entries)
		if err != nil {
			return nil, err
		}
		for i, s := range body.Series {
			server[s] = [2]string{resp.Entries[i].ID, resp.Entries[i].VersionID}
		}
		return server, checkIDs(server)
	}
	for from := 0; from < len(obsEntries); from += e.maxEntries() {
		to := min(from+e.maxEntries(), len(obsEntries))
		resp, err := e.transaction(ctx, obsEntries[from:to])
		if err != nil {
			return nil, err
		}
		for i := from; i < to; i++ {
			r := resp.Entries[i-from]
			server[body.Series[i]] = [2]string{r.ID, r.VersionID}
			if body.Kind == writeCreate {
				rewrite["Observation/"+idOf(bundle.Observations[i])] = "Observation/" + r.ID
			}
		}
	}
	provJSON, err := marshalRewritten(prov, rewrite)
	if err != nil {
		return nil, err
	}
	if _, _, err := e.cfg.Client.ConditionalCreate(ctx, "Provenance", provJSON, mustQuery(provQuery)); err != nil {
		return nil, err
	}
	return server, checkIDs(server)
}

// checkIDs refuses an acknowledgement without a server id: every later
// update of the series would have nothing to address. The write is sent
// again; its conditional creates find the resources and return their ids.
func checkIDs(server map[string][2]string) error {
	for s, id := range server {
		if id[0] == "" {
			return fmt.Errorf("engine: the server gave no id for the Observation of series %s", s)
		}
	}
	return nil
}

func idOf(o fhir.Observation) string {
	if o.Id == nil {
		return ""
	}
	return *o.Id
}

func mustQuery(q string) url.Values {
	v, _ := url.ParseQuery(q)
	return v
}

func (e *Engine) maxEntries() int {
	if e.cfg.MaxTransactionEntries > 0 {
		return e.cfg.MaxTransactionEntries
	}
	return DefaultMaxTransactionEntries
}

// transaction posts entries as one transaction Bundle.
func (e *Engine) transaction(ctx context.Context, entries []txEntry) (client.TransactionResponse, error) {
	tx, err := json.Marshal(struct {
		ResourceType string    `json:"resourceType"`
		Type         string    `json:"type"`
		Entry        []txEntry `json:"entry"`
	}{"Bundle", "transaction", entries})
	if err != nil {
		return client.TransactionResponse{}, fmt.Errorf("engine: encode transaction: %w", err)
	}
	resp, err := e.cfg.Client.Transaction(ctx, tx)
	if err != nil {
		var ce *client.Error
		if errors.As(err, &ce) && ce.Status > 0 {
			e.serverAnswered()
		}
		return client.TransactionResponse{}, err
	}
	e.serverAnswered()
	if len(resp.Entries) != len(entries) {
		return client.TransactionResponse{}, fmt.Errorf("engine: transaction response has %d entries for %d requests", len(resp.Entries), len(entries))
	}
	return resp, nil
}

// bundleOf turns a write back into resources, resolving server ids for
// updates and withdrawals.
func (e *Engine) bundleOf(ctx context.Context, body writeBody) (encode.Bundle, error) {
	enc := e.cfg.Encoder
	observations := make([]fhir.Observation, len(body.Observations))
	for i, raw := range body.Observations {
		o, err := fhir.UnmarshalObservation(raw)
		if err != nil {
			return encode.Bundle{}, &client.Error{Op: "decode outbox write", Status: http.StatusBadRequest, Outcome: err.Error()}
		}
		observations[i] = o
	}
	if body.Kind == writeCreate {
		prov, err := fhir.UnmarshalProvenance(body.Provenance)
		if err != nil {
			return encode.Bundle{}, &client.Error{Op: "decode outbox write", Status: http.StatusBadRequest, Outcome: err.Error()}
		}
		return encode.Bundle{Observations: observations, Provenance: prov}, nil
	}
	if body.Kind != writeRevise && body.Kind != writeWithdraw {
		return encode.Bundle{}, &client.Error{Op: "decode outbox write", Status: http.StatusBadRequest, Outcome: "unknown write kind " + body.Kind}
	}
	var previous []string
	for i := range observations {
		en, err := e.cfg.Store.Entry(ctx, body.Series[i])
		if err != nil {
			return encode.Bundle{}, fmt.Errorf("engine: %w", err)
		}
		if en.ServerID == "" {
			return encode.Bundle{}, errOrphan
		}
		observations[i].Id = &en.ServerID
		observations[i].Meta = nil
		if en.ServerVersion != "" {
			v := en.ServerVersion
			observations[i].Meta = &fhir.Meta{VersionId: &v}
			previous = append(previous, "Observation/"+en.ServerID+"/_history/"+en.ServerVersion)
		}
	}
	var b encode.Bundle
	var err error
	if body.Kind == writeWithdraw {
		b, err = enc.Withdrawal(observations[0], body.Why)
	} else {
		prov, perr := fhir.UnmarshalProvenance(body.Provenance)
		if perr != nil {
			return encode.Bundle{}, &client.Error{Op: "decode outbox write", Status: http.StatusBadRequest, Outcome: perr.Error()}
		}
		b = encode.Bundle{Observations: observations, Provenance: prov}
		if len(previous) > 0 {
			b, err = enc.Revision(b, previous)
		}
	}
	if err != nil {
		return encode.Bundle{}, &client.Error{Op: "encode revision", Status: http.StatusBadRequest, Outcome: err.Error()}
	}
	return b, nil
}

// serverDevice returns the server's reference to the software Device,
// creating it (conditionally on its identifier) the first time.
func (e *Engine) serverDevice(ctx context.Context) (string, error) {
	e.mu.Lock()
	ref := e.deviceRef
	e.mu.Unlock()
	if ref != "" {
		return ref, nil
	}
	cursor := "device." + e.cfg.Encoder.DeviceRef()
	if v, err := e.cfg.Store.Cursor(ctx, cursor); err == nil && v != "" {
		ref = v
	} else {
		device := e.cfg.Encoder.Device()
		device.Id = nil
		raw, err := json.Marshal(device)
		if err != nil {
			return "", fmt.Errorf("engine: encode device: %w", err)
		}
		q := url.Values{"identifier": {*device.Identifier[0].System + "|" + *device.Identifier[0].Value}}
		_, meta, err := e.cfg.Client.ConditionalCreate(ctx, "Device", raw, q)
		if err != nil {
			return "", err
		}
		e.serverAnswered()
		if meta.ID == "" {
			return "", fmt.Errorf("engine: the server gave no id for the software Device")
		}
		ref = "Device/" + meta.ID
		if err := e.cfg.Store.SetCursor(ctx, cursor, ref); err != nil {
			return "", fmt.Errorf("engine: %w", err)
		}
	}
	e.mu.Lock()
	e.deviceRef = ref
	e.mu.Unlock()
	return ref, nil
}

// marshalRewritten encodes a resource with every reference named in rewrite
// replaced, so references between entries of one transaction use their
// fullUrls and the server resolves them to the ids it assigns.
func marshalRewritten(v any, rewrite map[string]string) (json.RawMessage, error) {
	raw, err := json.Marshal(v)
	if err != nil {
		return nil, fmt.Errorf("engine: encode resource: %w", err)
	}
	for from, to := range rewrite {
		raw = bytes.ReplaceAll(raw, []byte(`"reference":"`+from+`"`), []byte(`"reference":"`+to+`"`))
	}
	return raw, nil
}
