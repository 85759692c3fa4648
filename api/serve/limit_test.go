package serve

import (
	"net/http"
	"net/http/httptest"
	"sync"
	"testing"
)

func TestLimitConcurrencyRefusesBeyondTheCap(t *testing.T) {
	release := make(chan struct{})
	entered := make(chan struct{}, 3)
	h := limitConcurrency(http.HandlerFunc(func(w http.ResponseWriter, r *http.Request) {
		entered <- struct{}{}
		<-release
	}), 2)
	var done sync.WaitGroup
	for i := 0; i < 2; i++ {
		done.Add(1)
		go func() {
			defer done.Done()
			h.ServeHTTP(httptest.NewRecorder(), httptest.NewRequest(http.MethodPost, "/notify", nil))
		}()
	}
	<-entered
	<-entered
	rec := httptest.NewRecorder()
	h.ServeHTTP(rec, httptest.NewRequest(http.MethodPost, "/notify", nil))
	if rec.Code != http.StatusServiceUnavailable || rec.Header().Get("Retry-After") == "" {
		t.Errorf("third request: HTTP %d, Retry-After %q; want 503 with Retry-After", rec.Code, rec.Header().Get("Retry-After"))
	}
	close(release)
	done.Wait()
	rec = httptest.NewRecorder()
	h.ServeHTTP(rec, httptest.NewRequest(http.MethodPost, "/notify", nil))
	if rec.Code != http.StatusOK {
		t.Errorf("after the others finished: HTTP %d, want 200", rec.Code)
	}
}
