package webhook_test

import (
	"bytes"
	"context"
	"encoding/json"
	"slices"
	"sync"

	"github.com/deadspace-fhir/deadspace/api/webhook"
	"github.com/deadspace-fhir/deadspace/fhir/notify"
)

// fakeSink records calls and, unless an Fn says otherwise, accepts
// everything. It does not check that resources are valid FHIR: that is the
// engine's job, not the webhook's.
type fakeSink struct {
	ResourcesFn func(ctx context.Context, src webhook.Source, rs []json.RawMessage) (webhook.Receipt, error)
	FetchFn     func(ctx context.Context, src webhook.Source, refs []string) error
	StatusFn    func(ctx context.Context, src webhook.Source, n notify.Notification) error
	// NotificationFn answers Notification; without it, Notification
	// answers as ResourcesFn would.
	NotificationFn func(ctx context.Context, src webhook.Source, rs []json.RawMessage, n notify.Notification) (webhook.Receipt, error)
	ChangedFn      func(ctx context.Context, src webhook.Source) error
	DeletedFn      func(ctx context.Context, src webhook.Source, deleted []webhook.Deletion) error

	mu    sync.Mutex
	calls []call
}

var _ webhook.Sink = (*fakeSink)(nil)

type call struct {
	method    string
	src       webhook.Source
	resources []json.RawMessage
	refs      []string
	n         notify.Notification
	deleted   []webhook.Deletion
}

// record keeps a copy of the resources, which the webhook reuses after
// the call (see Sink).
func (f *fakeSink) record(c call) {
	if c.resources != nil {
		rs := make([]json.RawMessage, len(c.resources))
		for i, r := range c.resources {
			rs[i] = bytes.Clone(r)
		}
		c.resources = rs
	}
	c.n.Events = slices.Clone(c.n.Events)
	for i := range c.n.Events {
		c.n.Events[i].Resource = bytes.Clone(c.n.Events[i].Resource)
	}
	c.n.Resources = slices.Clone(c.n.Resources)
	for i := range c.n.Resources {
		c.n.Resources[i].Resource = bytes.Clone(c.n.Resources[i].Resource)
	}
	f.mu.Lock()
	defer f.mu.Unlock()
	f.calls = append(f.calls, c)
}

func (f *fakeSink) Calls() []call {
	f.mu.Lock()
	defer f.mu.Unlock()
	return append([]call(nil), f.calls...)
}

func (f *fakeSink) Resources(ctx context.Context, src webhook.Source, rs []json.RawMessage) (webhook.Receipt, error) {
	f.record(call{method: "Resources", src: src, resources: rs})
	if f.ResourcesFn != nil {
		return f.ResourcesFn(ctx, src, rs)
	}
	return webhook.Receipt{Accepted: len(rs)}, nil
}

func (f *fakeSink) Fetch(ctx context.Context, src webhook.Source, refs []string) error {
	f.record(call{method: "Fetch", src: src, refs: refs})
	if f.FetchFn != nil {
		return f.FetchFn(ctx, src, refs)
	}
	return nil
}

func (f *fakeSink) Status(ctx context.Context, src webhook.Source, n notify.Notification) error {
	f.record(call{method: "Status", src: src, n: n})
	if f.StatusFn != nil {
		return f.StatusFn(ctx, src, n)
	}
	return nil
}

func (f *fakeSink) Notification(ctx context.Context, src webhook.Source, rs []json.RawMessage, n notify.Notification) (webhook.Receipt, error) {
	f.record(call{method: "Notification", src: src, resources: rs, n: n})
	switch {
	case f.NotificationFn != nil:
		return f.NotificationFn(ctx, src, rs, n)
	case f.ResourcesFn != nil:
		return f.ResourcesFn(ctx, src, rs)
	}
	return webhook.Receipt{Accepted: len(rs)}, nil
}

func (f *fakeSink) Changed(ctx context.Context, src webhook.Source) error {
	f.record(call{method: "Changed", src: src})
	if f.ChangedFn != nil {
		return f.ChangedFn(ctx, src)
	}
	return nil
}

func (f *fakeSink) Deleted(ctx context.Context, src webhook.Source, deleted []webhook.Deletion) error {
	f.record(call{method: "Deleted", src: src, deleted: slices.Clone(deleted)})
	if f.DeletedFn != nil {
		return f.DeletedFn(ctx, src, deleted)
	}
	return nil
}
