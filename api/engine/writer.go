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
	"time"

	"github.com/samply/golang-fhir-models/fhir-models/fhir"

	"github.com/deadspace-fhir/deadspace/api/store"
	"github.com/deadspace-fhir/deadspace/fhir/client"
	"github.com/deadspace-fhir/deadspace/fhir/encode"
)

// errWaiting means a write depends on an earlier one that the server has not
// acknowledged yet (an update of an Observation whose create is pending).
var errWaiting = errors.New("waiting for an earlier write")

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
func (e *Engine) drain(ctx context.Context) time.Duration {
	for ctx.Err() == nil {
		due, err := e.cfg.Store.DueWrites(ctx, e.now(), 16)
		if err != nil {
			e.log.ErrorContext(ctx, "reading the outbox failed", "err", err)
			return time.Second
		}
		if len(due) == 0 {
			st, err := e.cfg.Store.Stats(ctx)
			if err == nil && st.OutboxDepth == 0 {
				e.mu.Lock()
				e.outboxBlocked = time.Time{}
				e.mu.Unlock()
				return 30 * time.Second
			}
			return 250 * time.Millisecond
		}
		for _, w := range due {
			if ctx.Err() != nil {
				return 0
			}
			e.attempt(ctx, w)
		}
	}
	return 0
}

// attempt sends one write and records the outcome.
func (e *Engine) attempt(ctx context.Context, w store.Write) {
	server, err := e.send(ctx, w)
	now := e.now()
	switch {
	case err == nil:
		if aerr := e.cfg.Store.Acknowledge(ctx, w.ID, server); aerr != nil {
			// The server has it; the next attempt's conditional creates
			// will find it again rather than write it twice.
			e.log.ErrorContext(ctx, "recording an acknowledged write failed", "write", w.ID, "err", aerr)
			return
		}
		e.writeResult("acknowledged")
		e.mu.Lock()
		e.outboxBlocked = time.Time{}
		e.mu.Unlock()
	case errors.Is(err, errWaiting):
		_ = e.cfg.Store.Reschedule(ctx, w.ID, now.Add(time.Second), err.Error())
	case ctx.Err() != nil:
		// Shutting down: the write stays in the outbox as it was.
	case permanent(err):
		reason := err.Error()
		if berr := e.cfg.Store.Bury(ctx, w.ID, reason, now); berr != nil {
			e.log.ErrorContext(ctx, "moving a refused write to the dead letters failed", "write", w.ID, "err", berr)
			return
		}
		e.writeResult("dead-letter")
		if e.cfg.Hooks.DeadLetter != nil {
			e.cfg.Hooks.DeadLetter()
		}
		e.log.ErrorContext(ctx, "the FHIR server refused a write; moved to the dead letters", "write", w.ID, "reason", reason)
	default:
		wait := backoff(w.Attempts)
		var ce *client.Error
		if errors.As(err, &ce) && ce.RetryAfter > wait {
			wait = ce.RetryAfter
		}
		_ = e.cfg.Store.Reschedule(ctx, w.ID, now.Add(wait), err.Error())
		e.writeResult("retry")
		e.mu.Lock()
		if e.outboxBlocked.IsZero() {
			e.outboxBlocked = now
		}
		e.mu.Unlock()
		e.log.WarnContext(ctx, "write failed; will retry", "write", w.ID, "attempt", w.Attempts+1, "wait", wait, "err", err)
	}
}

func (e *Engine) writeResult(outcome string) {
	if e.cfg.Hooks.WriteResult != nil {
		e.cfg.Hooks.WriteResult(outcome)
	}
}

// permanent reports whether the server refused the write for a reason a
// retry cannot change: a 4xx other than 408 and 429.
func permanent(err error) bool {
	var ce *client.Error
	if !errors.As(err, &ce) {
		return false
	}
	return ce.Status >= 400 && ce.Status < 500 && ce.Status != http.StatusRequestTimeout && ce.Status != http.StatusTooManyRequests
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

// send builds the write's transaction, posts it, and returns the server's
// id and version of each series it carried.
func (e *Engine) send(ctx context.Context, w store.Write) (map[string][2]string, error) {
	var body writeBody
	if err := json.Unmarshal(w.Body, &body); err != nil {
		return nil, &client.Error{Op: "decode outbox write", Status: http.StatusBadRequest, Outcome: err.Error()}
	}
	enc := e.cfg.Encoder
	opts := enc.Options()
	device := enc.Device()
	deviceURN := urn(enc.DeviceRef())
	rewrite := map[string]string{enc.DeviceRef(): deviceURN}
	device.Id = nil
	deviceJSON, err := json.Marshal(device)
	if err != nil {
		return nil, fmt.Errorf("engine: encode device: %w", err)
	}
	entries := []txEntry{{
		FullURL: deviceURN, Resource: deviceJSON,
		Request: txRequest{Method: "POST", URL: "Device", IfNoneExist: "identifier=" + *device.Identifier[0].System + "|" + *device.Identifier[0].Value},
	}}

	var bundle encode.Bundle
	observations := make([]fhir.Observation, len(body.Observations))
	for i, raw := range body.Observations {
		o, err := fhir.UnmarshalObservation(raw)
		if err != nil {
			return nil, &client.Error{Op: "decode outbox write", Status: http.StatusBadRequest, Outcome: err.Error()}
		}
		observations[i] = o
	}
	switch body.Kind {
	case writeCreate:
		prov, err := fhir.UnmarshalProvenance(body.Provenance)
		if err != nil {
			return nil, &client.Error{Op: "decode outbox write", Status: http.StatusBadRequest, Outcome: err.Error()}
		}
		for i := range observations {
			rewrite["Observation/"+*observations[i].Id] = urn(body.Series[i])
		}
		bundle = encode.Bundle{Observations: observations, Provenance: prov}
	case writeRevise, writeWithdraw:
		var previous []string
		for i := range observations {
			en, err := e.cfg.Store.Entry(ctx, body.Series[i])
			if err != nil {
				return nil, fmt.Errorf("engine: %w", err)
			}
			if en.ServerID == "" {
				return nil, errWaiting
			}
			observations[i].Id = &en.ServerID
			observations[i].Meta = nil
			if en.ServerVersion != "" {
				v := en.ServerVersion
				observations[i].Meta = &fhir.Meta{VersionId: &v}
				previous = append(previous, "Observation/"+en.ServerID+"/_history/"+en.ServerVersion)
			}
		}
		if body.Kind == writeWithdraw {
			bundle, err = enc.Withdrawal(observations[0], body.Why)
		} else {
			prov, perr := fhir.UnmarshalProvenance(body.Provenance)
			if perr != nil {
				return nil, &client.Error{Op: "decode outbox write", Status: http.StatusBadRequest, Outcome: perr.Error()}
			}
			bundle = encode.Bundle{Observations: observations, Provenance: prov}
			if len(previous) > 0 {
				bundle, err = enc.Revision(bundle, previous)
			}
		}
		if err != nil {
			return nil, &client.Error{Op: "encode revision", Status: http.StatusBadRequest, Outcome: err.Error()}
		}
	default:
		return nil, &client.Error{Op: "decode outbox write", Status: http.StatusBadRequest, Outcome: "unknown write kind " + body.Kind}
	}

	for i, o := range bundle.Observations {
		req := txRequest{Method: "PUT", URL: "Observation/" + *o.Id}
		fullURL := ""
		if body.Kind == writeCreate {
			key, _ := identifiers(o)
			req = txRequest{Method: "POST", URL: "Observation", IfNoneExist: "identifier=" + opts.IdentifierSystem + "|" + key}
			fullURL = urn(body.Series[i])
			o.Id = nil
		} else {
			o.Meta = nil
		}
		raw, err := marshalRewritten(o, rewrite)
		if err != nil {
			return nil, err
		}
		entries = append(entries, txEntry{FullURL: fullURL, Resource: raw, Request: req})
	}
	prov := bundle.Provenance
	tag := *prov.Id
	prov.Id = nil
	prov.Meta = &fhir.Meta{Tag: []fhir.Coding{{System: &e.cfg.ProvenanceTagSystem, Code: &tag}}}
	provJSON, err := marshalRewritten(prov, rewrite)
	if err != nil {
		return nil, err
	}
	entries = append(entries, txEntry{
		FullURL: urn("Provenance/" + tag), Resource: provJSON,
		Request: txRequest{Method: "POST", URL: "Provenance", IfNoneExist: "_tag=" + e.cfg.ProvenanceTagSystem + "|" + tag},
	})
	tx, err := json.Marshal(struct {
		ResourceType string    `json:"resourceType"`
		Type         string    `json:"type"`
		Entry        []txEntry `json:"entry"`
	}{"Bundle", "transaction", entries})
	if err != nil {
		return nil, fmt.Errorf("engine: encode transaction: %w", err)
	}
	resp, err := e.cfg.Client.Transaction(ctx, tx)
	if err != nil {
		var ce *client.Error
		if errors.As(err, &ce) && ce.Status > 0 {
			e.serverAnswered()
		}
		return nil, err
	}
	e.serverAnswered()
	if len(resp.Entries) != len(entries) {
		return nil, fmt.Errorf("engine: transaction response has %d entries for %d requests", len(resp.Entries), len(entries))
	}
	server := make(map[string][2]string, len(body.Series))
	for i, s := range body.Series {
		r := resp.Entries[i+1]
		server[s] = [2]string{r.ID, r.VersionID}
	}
	return server, nil
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
