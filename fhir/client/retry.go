package client

import (
	"context"
	"errors"
	"fmt"
	"io"
	"math/rand/v2"
	"net"
	"net/http"
	"net/url"
	"strconv"
	"strings"
	"syscall"
	"time"
)

// parseRetryAfter reads Retry-After as delay-seconds or an HTTP-date (RFC 9110 §10.2.3). A date
// in the past means "now". ok is false for anything else, including negative numbers.
func parseRetryAfter(v string, now time.Time) (d time.Duration, ok bool) {
	v = strings.TrimSpace(v)
	if v == "" {
		return 0, false
	}
	if v[0] >= '0' && v[0] <= '9' {
		if strings.TrimLeft(v, "0123456789") != "" {
			return 0, false
		}
		n, err := strconv.ParseUint(v, 10, 64)
		if err != nil {
			// All digits but too large for uint64 still means "a very long time".
			return maxDuration, true
		}
		if n > uint64(maxDuration/time.Second) {
			return maxDuration, true
		}
		return time.Duration(n) * time.Second, true
	}
	t, err := http.ParseTime(v)
	if err != nil {
		return 0, false
	}
	if d := t.Sub(now); d > 0 {
		return d, true
	}
	return 0, true
}

const maxDuration = time.Duration(1<<63 - 1)

// backoff is "full jitter": a uniform draw from [0, min(max, base·2^attempt)]. Spreading
// retries over the whole interval keeps many clients that failed together from retrying
// together.
func backoff(attempt int, base, max time.Duration, jitter func(time.Duration) time.Duration) time.Duration {
	ceil := base
	for i := 0; i < attempt && ceil < max; i++ {
		ceil *= 2
	}
	if ceil > max || ceil <= 0 {
		ceil = max
	}
	return jitter(ceil)
}

func defaultJitter(ceil time.Duration) time.Duration {
	if ceil <= 0 {
		return 0
	}
	return rand.N(ceil + 1)
}

func defaultSleep(ctx context.Context, d time.Duration) error {
	if d <= 0 {
		return ctx.Err()
	}
	t := time.NewTimer(d)
	defer t.Stop()
	select {
	case <-ctx.Done():
		return ctx.Err()
	case <-t.C:
		return nil
	}
}

// retryableStatus says whether a status is transient. 429 and 503 mean the server did not do
// the work, so they are safe to retry for any request; 408 and other 5xx may come after the
// work was done.
func retryableStatus(status int, repeatable bool) bool {
	switch status {
	case http.StatusTooManyRequests, http.StatusServiceUnavailable:
		return true
	case http.StatusRequestTimeout, http.StatusInternalServerError, http.StatusBadGateway, http.StatusGatewayTimeout:
		return repeatable
	}
	return false
}

// neverSent reports transport errors that prove the request did not reach the server, so even a
// plain POST may be retried.
func neverSent(err error) bool {
	var op *net.OpError
	if errors.As(err, &op) && op.Op == "dial" {
		return true
	}
	var dns *net.DNSError
	if errors.As(err, &dns) {
		return true
	}
	return errors.Is(err, syscall.ECONNREFUSED)
}

// stripURL drops the *url.Error wrapper that net/http puts around transport errors: its message
// contains the full request URL, and search URLs carry patient references.
func stripURL(err error) error {
	var ue *url.Error
	for errors.As(err, &ue) {
		err = ue.Err
	}
	if errors.Is(err, io.ErrUnexpectedEOF) || errors.Is(err, io.EOF) {
		return fmt.Errorf("connection closed before a complete response: %w", err)
	}
	return err
}
