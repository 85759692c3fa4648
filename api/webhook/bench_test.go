package webhook_test

import (
	"bytes"
	"context"
	"encoding/json"
	"io"
	"log/slog"
	"net/http"
	"strconv"
	"testing"

	"github.com/deadspace-fhir/deadspace/api/webhook"
	"github.com/deadspace-fhir/deadspace/fhir/notify"
)

// acceptSink takes everything and keeps nothing, so the benchmark measures
// the handler alone.
type acceptSink struct{}

func (acceptSink) Resources(_ context.Context, _ webhook.Source, rs []json.RawMessage) (webhook.Receipt, error) {
	return webhook.Receipt{Accepted: len(rs)}, nil
}
func (acceptSink) Fetch(context.Context, webhook.Source, []string) error { return nil }
func (acceptSink) Status(context.Context, webhook.Source, notify.Notification) error {
	return nil
}
func (acceptSink) Notification(_ context.Context, _ webhook.Source, rs []json.RawMessage, _ notify.Notification) (webhook.Receipt, error) {
	return webhook.Receipt{Accepted: len(rs)}, nil
}
func (acceptSink) Changed(context.Context, webhook.Source) error { return nil }
func (acceptSink) Deleted(context.Context, webhook.Source, []webhook.Deletion) error {
	return nil
}

// discardWriter is a ResponseWriter that reuses its header map, so the
// allocations counted are the handler's own.
type discardWriter struct {
	h    http.Header
	code int
}

func (w *discardWriter) Header() http.Header         { return w.h }
func (w *discardWriter) WriteHeader(code int)        { w.code = code }
func (w *discardWriter) Write(p []byte) (int, error) { return len(p), nil }

// BenchmarkHandler posts the shape of the live benchmark's requests (an R4
// backport notification carrying one end-tidal CO2 Observation) through
// the handler to a sink that does nothing. The baseline decodes the same
// body once with encoding/json into a generic value, in the same run, as a
// yardstick for what one plain parse of the body costs.
func BenchmarkHandler(b *testing.B) {
	body := []byte(r4Notification("event-notification", "3", "Observation/abg-1", obs))
	b.Run("baseline=json.Unmarshal-any", func(b *testing.B) {
		b.ReportAllocs()
		b.SetBytes(int64(len(body)))
		for b.Loop() {
			var v any
			if err := json.Unmarshal(body, &v); err != nil {
				b.Fatal(err)
			}
		}
	})
	b.Run("handler/notification", func(b *testing.B) {
		h, err := webhook.New(webhook.Config{Sink: acceptSink{}, Secret: secret, Logger: slog.New(slog.DiscardHandler)})
		if err != nil {
			b.Fatal(err)
		}
		rd := bytes.NewReader(body)
		req, err := http.NewRequest(http.MethodPost, "http://127.0.0.1/notify", rd)
		if err != nil {
			b.Fatal(err)
		}
		req.Header.Set("Authorization", "Bearer "+secret)
		req.Header.Set("Content-Type", "application/fhir+json")
		req.Header.Set("X-Request-Id", "bench-1")
		req.Header.Set("Content-Length", strconv.Itoa(len(body)))
		w := &discardWriter{h: http.Header{}}
		b.ReportAllocs()
		b.SetBytes(int64(len(body)))
		for b.Loop() {
			rd.Reset(body)
			req.Body = io.NopCloser(rd)
			req.ContentLength = int64(len(body))
			clear(w.h)
			h.ServeHTTP(w, req)
			if w.code != http.StatusOK {
				b.Fatalf("status %d", w.code)
			}
		}
	})
}
