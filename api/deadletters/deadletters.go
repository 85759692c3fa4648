// Package deadletters is the operator's view of the dead letters: writes the
// FHIR server refused for good. It lists them, shows one with the server's
// answer (identifiers redacted), and moves one back to the outbox, either in
// the data directory itself while serve is stopped ([Local]) or through a
// running serve's gRPC API ([Remote]); `deadspace deadletters` is [Main].
//
// A dead letter is named by the id its write had in the outbox: the id the
// engine's log line names when it buries a write ("write": 12).
package deadletters

import (
	"context"
	"encoding/json"
	"errors"
	"fmt"
	"time"

	"github.com/deadspace-fhir/deadspace/api/logredact"
	"github.com/deadspace-fhir/deadspace/api/store"
	"github.com/deadspace-fhir/deadspace/fhir/encode"
)

// Limits of a list.
const (
	DefaultLimit = 100
	MaxLimit     = 1000
)

// ErrNotFound is returned, wrapped, for an id with no dead letter.
var ErrNotFound = errors.New("no dead letter with that id")

// View is a dead letter as an operator sees it. It names no patient; the
// series identify the derivations it carried (Explain takes them).
type View struct {
	ID        uint64
	BuriedAt  time.Time
	QueuedAt  time.Time
	Attempts  int
	Reason    string // the server's answer, identifiers redacted
	LastError string // the attempt before, identifiers redacted
	Series    []string
	// Superseded: the ledger records another value of one of its series
	// than the letter carries (a later derivation, or a withdrawal). A
	// retry sends only the values that are still current.
	Superseded bool
}

// Source is what the views are read from: the store.
type Source interface {
	store.DeadLetterStore
	Entry(ctx context.Context, series string) (store.Entry, error)
	Stats(ctx context.Context) (store.Stats, error)
}

// Operator lists, shows and retries dead letters, wherever they are.
type Operator interface {
	// List returns at most limit dead letters, oldest first, and how many
	// there are in all.
	List(ctx context.Context, limit int) ([]View, int, error)
	Show(ctx context.Context, id uint64) (View, error)
	// Retry moves a dead letter back to the outbox and returns the id of
	// the write there.
	Retry(ctx context.Context, id uint64) (uint64, error)
}

// Local works on a store directly.
func Local(src Source) Operator { return local{src: src, now: time.Now} }

type local struct {
	src Source
	now func() time.Time
}

// CheckLimit applies the default and refuses a limit out of range.
func CheckLimit(limit int) (int, error) {
	switch {
	case limit == 0:
		return DefaultLimit, nil
	case limit < 0 || limit > MaxLimit:
		return 0, fmt.Errorf("limit must be 1 to %d, got %d", MaxLimit, limit)
	}
	return limit, nil
}

func (l local) List(ctx context.Context, limit int) ([]View, int, error) {
	limit, err := CheckLimit(limit)
	if err != nil {
		return nil, 0, err
	}
	dls, err := l.src.DeadLetters(ctx, limit)
	if err != nil {
		return nil, 0, fmt.Errorf("dead letters: %w", err)
	}
	st, err := l.src.Stats(ctx)
	if err != nil {
		return nil, 0, fmt.Errorf("dead letters: %w", err)
	}
	out := make([]View, 0, len(dls))
	for _, dl := range dls {
		v, err := l.view(ctx, dl)
		if err != nil {
			return nil, 0, err
		}
		out = append(out, v)
	}
	return out, st.DeadLetters, nil
}

func (l local) Show(ctx context.Context, id uint64) (View, error) {
	dl, err := l.src.DeadLetter(ctx, id)
	if err != nil {
		return View{}, notFound(id, err)
	}
	return l.view(ctx, dl)
}

func (l local) Retry(ctx context.Context, id uint64) (uint64, error) {
	w, err := l.src.RetryDeadLetter(ctx, id, l.now())
	if err != nil {
		return 0, notFound(id, err)
	}
	return w.ID, nil
}

func notFound(id uint64, err error) error {
	if errors.Is(err, store.ErrNotFound) {
		return fmt.Errorf("dead letter %d: %w", id, ErrNotFound)
	}
	return fmt.Errorf("dead letter %d: %w", id, err)
}

// view redacts a dead letter and tells whether the ledger moved on.
func (l local) view(ctx context.Context, dl store.DeadLetter) (View, error) {
	v := View{
		ID: dl.ID, BuriedAt: dl.At, QueuedAt: dl.CreatedAt, Attempts: dl.Attempts,
		Reason: logredact.Text(dl.Reason), LastError: logredact.Text(dl.LastError),
		Series: append([]string(nil), dl.Series...),
	}
	// Superseded is decided by the values, as the writer decides what to
	// send: a letter whose write cannot be read is judged by time.
	var w encode.Write
	keys, kerr := map[string]string(nil), json.Unmarshal(dl.Body, &w)
	if kerr == nil {
		keys, kerr = w.Keys()
	}
	for _, s := range dl.Series {
		en, err := l.src.Entry(ctx, s)
		if errors.Is(err, store.ErrNotFound) {
			continue
		}
		if err != nil {
			return View{}, fmt.Errorf("dead letter %d: %w", dl.ID, err)
		}
		if (kerr != nil && en.UpdatedAt.After(dl.CreatedAt)) || (kerr == nil && !w.Current(keys, s, en.Key, en.Status)) {
			v.Superseded = true
		}
	}
	return v, nil
}
