package engine

import (
	"errors"
	"net/http"
	"sync"
	"time"

	"github.com/deadspace-fhir/deadspace/fhir/client"
)

// factsUnavailableFor is how long a patient whose Patient resource the
// server does not give (404 Not Found, 410 Gone, another refusal for good)
// is evaluated with unknown facts without reading it again: each
// evaluation of such a patient (every few seconds while readings arrive)
// would otherwise cost the server a read that fails the same way.
const factsUnavailableFor = 10 * time.Minute

// maxFactsUnavailable bounds how many such patients are remembered; past
// it the expired ones are dropped, and then the oldest.
const maxFactsUnavailable = 4096

// factsUnavailable remembers the patients whose Patient read failed for
// good, until when. It lives in memory only: a restart reads them again.
type factsUnavailable struct {
	mu    sync.Mutex
	until map[string]time.Time
}

// known says whether subject's facts were found unavailable and that is
// still remembered at now.
func (f *factsUnavailable) known(subject string, now time.Time) bool {
	f.mu.Lock()
	defer f.mu.Unlock()
	until, ok := f.until[subject]
	if ok && !now.Before(until) {
		delete(f.until, subject)
		return false
	}
	return ok
}

// remember notes that subject's facts are unavailable from now on, for
// factsUnavailableFor.
func (f *factsUnavailable) remember(subject string, now time.Time) {
	f.mu.Lock()
	defer f.mu.Unlock()
	if f.until == nil {
		f.until = make(map[string]time.Time)
	}
	if len(f.until) >= maxFactsUnavailable {
		var oldest string
		for s, until := range f.until {
			if !now.Before(until) {
				delete(f.until, s)
			} else if oldest == "" || until.Before(f.until[oldest]) {
				oldest = s
			}
		}
		if len(f.until) >= maxFactsUnavailable {
			delete(f.until, oldest)
		}
	}
	f.until[subject] = now.Add(factsUnavailableFor)
}

// factsReadRefused says whether a failed Patient read is a refusal no
// retry changes, so the patient is evaluated with unknown facts rather
// than left pending for ever: 404 Not Found and 410 Gone (no such
// patient, or deleted or merged away), and any other 4xx but 401 (a
// credential being renewed), 408 and 429 (the server asks for a retry).
// 403 counts: the service may not read that patient's record, which
// waiting does not change. Transport failures and 5xx keep the patient
// pending: its facts are read again when the server answers.
func factsReadRefused(err error) bool {
	if errors.Is(err, client.ErrNotFound) || errors.Is(err, client.ErrGone) {
		return true
	}
	var ce *client.Error
	if !errors.As(err, &ce) || ce.Status < 400 || ce.Status >= 500 {
		return false
	}
	switch ce.Status {
	case http.StatusUnauthorized, http.StatusRequestTimeout, http.StatusTooManyRequests:
		return false
	}
	return true
}
