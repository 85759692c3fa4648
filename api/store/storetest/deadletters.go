package storetest

import (
	"bytes"
	"slices"
	"testing"
	"time"

	"github.com/deadspace-fhir/deadspace/api/store"
)

// DeadLetterStore is a store with the operator's dead-letter calls.
type DeadLetterStore interface {
	store.Store
	store.DeadLetterStore
}

// RunDeadLetters runs the dead-letter contract against stores made by
// open, with the same rules for open as [Run].
func RunDeadLetters(t *testing.T, open func(t *testing.T) DeadLetterStore) {
	t.Helper()
	tests := []struct {
		name string
		fn   func(t *testing.T, open func(t *testing.T) DeadLetterStore)
	}{
		{"DeadLetter/Unknown", testDeadLetterUnknown},
		{"DeadLetter/ShowAndRetry", testDeadLetterRetry},
		{"DeadLetter/RetriedThenBuriedAgain", testDeadLetterRoundTrip},
	}
	for _, tc := range tests {
		t.Run(tc.name, func(t *testing.T) {
			t.Parallel()
			tc.fn(t, open)
		})
	}
}

func testDeadLetterUnknown(t *testing.T, open func(t *testing.T) DeadLetterStore) {
	s := open(t)
	ctx := t.Context()
	_, err := s.DeadLetter(ctx, 42)
	mustNotFound(t, "DeadLetter", err)
	_, err = s.RetryDeadLetter(ctx, 42, t0)
	mustNotFound(t, "RetryDeadLetter", err)
	// A write still in the outbox is not a dead letter.
	must(t, s.Commit(ctx, store.Change{Subject: "Patient/d", Writes: []store.Write{writeFor("s1")}}, t0))
	due, err := s.DueWrites(ctx, t0, 10)
	must(t, err)
	_, err = s.DeadLetter(ctx, due[0].ID)
	mustNotFound(t, "DeadLetter of a write in the outbox", err)
	_, err = s.RetryDeadLetter(ctx, due[0].ID, t0)
	mustNotFound(t, "RetryDeadLetter of a write in the outbox", err)
	wantStats(t, s, store.Stats{OutboxDepth: 1, OldestWrite: t0})
}

// buryTwo commits two writes and buries both; it returns them as written.
func buryTwo(t *testing.T, s DeadLetterStore) (store.Write, store.Write) {
	t.Helper()
	ctx := t.Context()
	const subj = "Patient/d"
	must(t, s.Commit(ctx, store.Change{Subject: subj,
		Entries: []store.Entry{entry(subj, "s1", "k1", t0), entry(subj, "s2", "k2", t0)},
		Writes:  []store.Write{writeFor("s1"), writeFor("s2")},
	}, t0))
	due, err := s.DueWrites(ctx, t0, 10)
	must(t, err)
	if len(due) != 2 {
		t.Fatalf("%d writes due, want 2", len(due))
	}
	must(t, s.Reschedule(ctx, due[0].ID, t0, "HTTP 503"))
	must(t, s.Bury(ctx, due[0].ID, "HTTP 422: refused", t0.Add(time.Hour)))
	must(t, s.Bury(ctx, due[1].ID, "HTTP 400: bad", t0.Add(2*time.Hour)))
	return due[0], due[1]
}

func testDeadLetterRetry(t *testing.T, open func(t *testing.T) DeadLetterStore) {
	s := open(t)
	ctx := t.Context()
	w1, w2 := buryTwo(t, s)
	dl, err := s.DeadLetter(ctx, w2.ID)
	must(t, err)
	if dl.ID != w2.ID || dl.Reason != "HTTP 400: bad" || !dl.At.Equal(t0.Add(2*time.Hour)) || dl.Subject != "Patient/d" ||
		!slices.Equal(dl.Series, []string{"s2"}) || !bytes.Equal(dl.Body, w2.Body) {
		t.Errorf("DeadLetter(%d) = %+v", w2.ID, dl)
	}
	// One failed attempt rescheduled, then the refused one.
	if dl, _ := s.DeadLetter(ctx, w1.ID); dl.Attempts != 2 || dl.LastError != "HTTP 503" {
		t.Errorf("DeadLetter(%d) = %+v, want 2 attempts (the refused one counts) and the error before", w1.ID, dl)
	}
	if dl, _ := s.DeadLetter(ctx, w2.ID); dl.Attempts != 1 {
		t.Errorf("DeadLetter(%d) = %+v, want 1 attempt: refused at the first", w2.ID, dl)
	}

	now := t0.Add(3 * time.Hour)
	w, err := s.RetryDeadLetter(ctx, w1.ID, now)
	must(t, err)
	if w.ID <= w2.ID || w.Attempts != 0 || !w.NotBefore.Equal(now) || !w.CreatedAt.Equal(now) ||
		w.Subject != "Patient/d" || !slices.Equal(w.Series, []string{"s1"}) || !bytes.Equal(w.Body, w1.Body) {
		t.Errorf("retried write %+v: want a new id after every earlier write, no attempts, due and created now, the same content", w)
	}
	_, err = s.DeadLetter(ctx, w1.ID)
	mustNotFound(t, "DeadLetter after retry", err)
	_, err = s.RetryDeadLetter(ctx, w1.ID, now)
	mustNotFound(t, "second RetryDeadLetter", err)
	wantStats(t, s, store.Stats{OutboxDepth: 1, OldestWrite: now, DeadLetters: 1})
	due, err := s.DueWrites(ctx, now, 10)
	must(t, err)
	if len(due) != 1 || due[0].ID != w.ID || !bytes.Equal(due[0].Body, w1.Body) {
		t.Errorf("due after retry: %+v, want the retried write", due)
	}
	dls, err := s.DeadLetters(ctx, 10)
	must(t, err)
	if len(dls) != 1 || dls[0].ID != w2.ID {
		t.Errorf("dead letters after retry: %+v, want only write %d", dls, w2.ID)
	}
	must(t, s.Acknowledge(ctx, w.ID, map[string][2]string{"s1": {"obs-1", "1"}}))
	wantStats(t, s, store.Stats{DeadLetters: 1})
}

func testDeadLetterRoundTrip(t *testing.T, open func(t *testing.T) DeadLetterStore) {
	s := open(t)
	ctx := t.Context()
	w1, _ := buryTwo(t, s)
	w, err := s.RetryDeadLetter(ctx, w1.ID, t0.Add(3*time.Hour))
	must(t, err)
	must(t, s.Bury(ctx, w.ID, "HTTP 422: still refused", t0.Add(4*time.Hour)))
	dl, err := s.DeadLetter(ctx, w.ID)
	must(t, err)
	if dl.Reason != "HTTP 422: still refused" || !bytes.Equal(dl.Body, w1.Body) {
		t.Errorf("buried again: %+v", dl)
	}
	wantStats(t, s, store.Stats{DeadLetters: 2})
}
