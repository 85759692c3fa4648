package bulk_test

// The client against the Go Bulk Data endpoint in fhir/fhirtest/bulkfake,
// which follows the Bulk Data Access IG 2.0.0
// (https://hl7.org/fhir/uv/bulkdata/export.html). Waits are recorded, not
// slept, through the FHIR client's Sleep hook.

import (
	"context"
	"crypto/ecdsa"
	"crypto/elliptic"
	"crypto/rand"
	"encoding/json"
	"errors"
	"fmt"
	"net/http"
	"net/http/httptest"
	"net/url"
	"os"
	"path/filepath"
	"strings"
	"sync"
	"sync/atomic"
	"testing"
	"time"

	"github.com/deadspace-fhir/deadspace/fhir/bulk"
	"github.com/deadspace-fhir/deadspace/fhir/client"
	"github.com/deadspace-fhir/deadspace/fhir/fhirtest/bulkfake"
)

const token = "bulk-test-token"

func resources() []json.RawMessage {
	return []json.RawMessage{
		json.RawMessage(`{"resourceType":"Observation","id":"o1","meta":{"lastUpdated":"2026-03-14T22:32:00Z"},"code":{"coding":[{"system":"http://loinc.org","code":"2019-8"}]}}`),
		json.RawMessage(`{"resourceType":"Observation","id":"o2","meta":{"lastUpdated":"2026-03-14T22:40:00Z"},"code":{"coding":[{"system":"http://loinc.org","code":"8867-4"}]}}`),
		json.RawMessage(`{"resourceType":"Observation","id":"o3","meta":{"lastUpdated":"2026-03-13T10:00:00Z"},"code":{"coding":[{"system":"http://loinc.org","code":"19891-1"}]}}`),
		json.RawMessage(`{"resourceType":"Patient","id":"p1","meta":{"lastUpdated":"2026-03-14T22:00:00Z"}}`),
		json.RawMessage(`{"resourceType":"Encounter","id":"e1","meta":{"lastUpdated":"2026-03-14T22:00:00Z"}}`),
	}
}

// recorder records the waits the exporter asked for.
type recorder struct {
	mu    sync.Mutex
	waits []time.Duration
}

func (r *recorder) sleep(ctx context.Context, d time.Duration) error {
	r.mu.Lock()
	r.waits = append(r.waits, d)
	r.mu.Unlock()
	return ctx.Err()
}

type events struct {
	mu        sync.Mutex
	progress  []string
	throttled int
	filtered  []bool
	bytes     int64
	files     int
}

func newExporter(t *testing.T, base string, rec *recorder, ev *events) *bulk.Exporter {
	t.Helper()
	c, err := client.New(client.Config{BaseURL: base, Auth: client.BearerToken(token), Sleep: rec.sleep})
	if err != nil {
		t.Fatal(err)
	}
	x, err := bulk.New(bulk.Config{Client: c, Dir: t.TempDir(), Hooks: bulk.Hooks{
		KickedOff: func(f bool) { ev.mu.Lock(); ev.filtered = append(ev.filtered, f); ev.mu.Unlock() },
		Running:   func(p string, _ time.Duration) { ev.mu.Lock(); ev.progress = append(ev.progress, p); ev.mu.Unlock() },
		Throttled: func(time.Duration) { ev.mu.Lock(); ev.throttled++; ev.mu.Unlock() },
		Bytes:     func(n int64) { ev.mu.Lock(); ev.bytes += n; ev.mu.Unlock() },
		FileDone:  func(bulk.LocalFile) { ev.mu.Lock(); ev.files++; ev.mu.Unlock() },
	}})
	if err != nil {
		t.Fatal(err)
	}
	return x
}

var request = bulk.Request{
	Level: bulk.System, Types: []string{"Observation", "Patient"},
	TypeFilters: []string{"Observation?code=http://loinc.org|2019-8,http://loinc.org|19891-1"},
}

func TestExport(t *testing.T) {
	tests := []struct {
		name     string
		opts     bulkfake.Options
		req      bulk.Request
		wantErr  error
		wantText string // in the error
		check    func(t *testing.T, srv *bulkfake.Server, res bulk.Result, rec *recorder, ev *events)
	}{
		{
			name: "kick-off, 202 with Retry-After and X-Progress, manifest, files with the token",
			opts: bulkfake.Options{Resources: resources(), Token: token, RequiresAccessToken: true, Polls: 2, RetryAfter: 3},
			req:  request,
			check: func(t *testing.T, srv *bulkfake.Server, res bulk.Result, rec *recorder, ev *events) {
				reqs := srv.Requests()
				k := reqs[0]
				if k.Path != "/fhir/$export" || k.Header.Get("Prefer") != "respond-async" || k.Header.Get("Accept") != "application/fhir+json" {
					t.Errorf("kick-off %s with Prefer %q Accept %q", k.Path, k.Header.Get("Prefer"), k.Header.Get("Accept"))
				}
				if got := k.Query.Get("_type"); got != "Observation,Patient" {
					t.Errorf("_type = %q", got)
				}
				if got := k.Query.Get("_typeFilter"); !strings.Contains(got, "Observation?code=http://loinc.org|2019-8") {
					t.Errorf("_typeFilter = %q", got)
				}
				// Two in-progress answers, each asking for 3 s.
				if len(rec.waits) != 2 || rec.waits[0] != 3*time.Second || rec.waits[1] != 3*time.Second {
					t.Errorf("waits = %v, want two of 3s (Retry-After)", rec.waits)
				}
				if len(ev.progress) != 2 || ev.progress[0] != "33% complete" {
					t.Errorf("X-Progress reported = %q", ev.progress)
				}
				// _typeFilter kept the blood gas and EtCO2, dropped SpO2 (8867-4)
				// and the Encounter (not in _type); Patient comes first.
				if len(res.Files) != 2 || res.Files[0].Type != "Patient" || res.Files[1].Type != "Observation" {
					t.Fatalf("files = %+v", res.Files)
				}
				obs, _ := os.ReadFile(res.Files[1].Path)
				if n := strings.Count(string(obs), "\n"); n != 2 || strings.Contains(string(obs), "8867-4") {
					t.Errorf("observation file has %d lines:\n%s", n, obs)
				}
				if ev.bytes != res.Bytes || ev.files != 2 {
					t.Errorf("bytes reported %d, result %d; files %d", ev.bytes, res.Bytes, ev.files)
				}
				for _, r := range reqs {
					if r.Header.Get("Authorization") != "Bearer "+token {
						t.Errorf("%s %s without the token", r.Method, r.Path)
					}
				}
				if srv.Cancelled() != 1 {
					t.Errorf("the finished job was not deleted")
				}
				if res.Manifest.TransactionTime.IsZero() || !res.Manifest.RequiresAccessToken {
					t.Errorf("manifest %+v", res.Manifest)
				}
			},
		},
		{
			name: "files without requiresAccessToken get no token",
			opts: bulkfake.Options{Resources: resources(), Polls: 0},
			req:  bulk.Request{Level: bulk.Patient, Types: []string{"Patient"}, Since: time.Date(2026, 3, 14, 0, 0, 0, 0, time.UTC)},
			check: func(t *testing.T, srv *bulkfake.Server, res bulk.Result, rec *recorder, ev *events) {
				reqs := srv.Requests()
				if reqs[0].Path != "/fhir/Patient/$export" || reqs[0].Query.Get("_since") != "2026-03-14T00:00:00Z" {
					t.Errorf("kick-off %s ?%s", reqs[0].Path, reqs[0].Query.Encode())
				}
				for _, r := range reqs {
					if strings.HasPrefix(r.Path, "/files/") && r.Header.Get("Authorization") != "" {
						t.Errorf("file request carried credentials with requiresAccessToken false")
					}
				}
				if len(res.Files) != 1 || res.Files[0].Type != "Patient" {
					t.Errorf("files %+v", res.Files)
				}
			},
		},
		{
			name: "group level, _since filters by lastUpdated",
			opts: bulkfake.Options{Resources: resources()},
			req:  bulk.Request{Level: bulk.Group, GroupID: "icu-4", Types: []string{"Observation"}, Since: time.Date(2026, 3, 14, 0, 0, 0, 0, time.UTC)},
			check: func(t *testing.T, srv *bulkfake.Server, res bulk.Result, rec *recorder, ev *events) {
				if p := srv.Requests()[0].Path; p != "/fhir/Group/icu-4/$export" {
					t.Errorf("kick-off path %s", p)
				}
				obs, _ := os.ReadFile(res.Files[0].Path)
				if strings.Contains(string(obs), `"o3"`) || !strings.Contains(string(obs), `"o2"`) {
					t.Errorf("_since not applied:\n%s", obs)
				}
			},
		},
		{
			name: "429 on kick-off is waited out",
			opts: bulkfake.Options{Resources: resources(), Token: token, KickOffBusy: 2, RetryAfter: 7},
			req:  request,
			check: func(t *testing.T, srv *bulkfake.Server, res bulk.Result, rec *recorder, ev *events) {
				if ev.throttled != 2 || len(rec.waits) != 2 || rec.waits[0] != 7*time.Second {
					t.Errorf("throttled %d, waits %v", ev.throttled, rec.waits)
				}
				if srv.Jobs() != 1 || len(res.Files) != 2 {
					t.Errorf("jobs %d files %d", srv.Jobs(), len(res.Files))
				}
			},
		},
		{
			name: "429 on status is waited out",
			opts: bulkfake.Options{Resources: resources(), Token: token, StatusThrottle: 1, Polls: 1, RetryAfter: 5},
			req:  request,
			check: func(t *testing.T, srv *bulkfake.Server, res bulk.Result, rec *recorder, ev *events) {
				if ev.throttled != 1 || len(rec.waits) != 2 || rec.waits[0] != 5*time.Second {
					t.Errorf("throttled %d, waits %v", ev.throttled, rec.waits)
				}
			},
		},
		{
			name: "refused _typeFilter is asked again without it",
			opts: bulkfake.Options{Resources: resources(), Token: token, RefuseTypeFilter: true},
			req:  request,
			check: func(t *testing.T, srv *bulkfake.Server, res bulk.Result, rec *recorder, ev *events) {
				reqs := srv.Requests()
				if reqs[1].Query.Has("_typeFilter") || reqs[1].Query.Get("_type") != "Observation,Patient" {
					t.Errorf("second kick-off ?%s", reqs[1].Query.Encode())
				}
				if len(ev.filtered) != 1 || ev.filtered[0] {
					t.Errorf("kicked off with filter = %v", ev.filtered)
				}
				obs, _ := os.ReadFile(res.Files[1].Path)
				if !strings.Contains(string(obs), "8867-4") {
					t.Errorf("unfiltered export expected")
				}
			},
		},
		{
			name:     "job that fails reports its OperationOutcome",
			opts:     bulkfake.Options{Resources: resources(), Token: token, Polls: 1, Fail: "the export ran out of disk"},
			req:      request,
			wantErr:  bulk.ErrJobFailed,
			wantText: "the export ran out of disk",
		},
		{
			name:     "expired file URL is a clear error and the job is deleted",
			opts:     bulkfake.Options{Resources: resources(), Token: token, Expired: true},
			req:      request,
			wantErr:  bulk.ErrExpired,
			wantText: "run again to request a fresh export",
			check: func(t *testing.T, srv *bulkfake.Server, res bulk.Result, rec *recorder, ev *events) {
				if srv.Cancelled() != 1 {
					t.Errorf("job not deleted after the failure")
				}
			},
		},
		{
			name:     "wrong credentials",
			opts:     bulkfake.Options{Resources: resources(), Token: "another-token"},
			req:      request,
			wantErr:  bulk.ErrKickOff,
			wantText: "HTTP 401",
		},
		{
			name: "with _since, the deleted file is downloaded and its lines read",
			opts: bulkfake.Options{Resources: resources(), Token: token, Deleted: []bulkfake.Deletion{
				{Ref: "Observation/o9"},
				{Ref: "Observation/o8", At: time.Date(2026, 3, 15, 1, 0, 0, 0, time.UTC), Stamp: true},
				{Ref: "Observation/o7", At: time.Date(2026, 3, 13, 1, 0, 0, 0, time.UTC)}, // before _since
			}},
			req: bulk.Request{Level: bulk.System, Types: []string{"Observation"}, Since: time.Date(2026, 3, 14, 0, 0, 0, 0, time.UTC)},
			check: func(t *testing.T, srv *bulkfake.Server, res bulk.Result, rec *recorder, ev *events) {
				if len(res.Manifest.Deleted) != 1 || len(res.Deleted) != 1 || res.Deleted[0].Type != "Bundle" {
					t.Fatalf("deleted files: manifest %+v, downloaded %+v", res.Manifest.Deleted, res.Deleted)
				}
				f, err := os.Open(res.Deleted[0].Path)
				if err != nil {
					t.Fatal(err)
				}
				defer f.Close()
				var got []bulk.Deletion
				if err := bulk.EachLine(f, func(_ int, line []byte, _ error) error {
					ds, err := bulk.ParseDeletions(line)
					got = append(got, ds...)
					return err
				}); err != nil {
					t.Fatal(err)
				}
				if len(got) != 2 || got[0].Ref() != "Observation/o9" || !got[0].At.IsZero() || got[1].Ref() != "Observation/o8" || got[1].At.IsZero() {
					t.Errorf("deletions %+v", got)
				}
				if ev.files != 2 {
					t.Errorf("files reported done %d, want 2 (output and deleted)", ev.files)
				}
			},
		},
		{
			name: "without _since there is no deleted file",
			opts: bulkfake.Options{Resources: resources(), Token: token, Deleted: []bulkfake.Deletion{{Ref: "Observation/o9"}}},
			req:  request,
			check: func(t *testing.T, srv *bulkfake.Server, res bulk.Result, rec *recorder, ev *events) {
				if len(res.Manifest.Deleted) != 0 || len(res.Deleted) != 0 {
					t.Errorf("deleted files %+v", res.Deleted)
				}
			},
		},
		{
			name: "error file issues are returned",
			opts: bulkfake.Options{Resources: resources(), Token: token, ErrorFile: "12 resources could not be read"},
			req:  request,
			check: func(t *testing.T, srv *bulkfake.Server, res bulk.Result, rec *recorder, ev *events) {
				if len(res.Issues) != 1 || res.Issues[0].Text != "12 resources could not be read" || res.Issues[0].Severity != "warning" {
					t.Errorf("issues %+v", res.Issues)
				}
			},
		},
	}
	for _, tc := range tests {
		t.Run(tc.name, func(t *testing.T) {
			srv := bulkfake.Start(t, tc.opts)
			rec, ev := &recorder{}, &events{}
			x := newExporter(t, srv.URL, rec, ev)
			res, err := x.Export(context.Background(), tc.req, []string{"Observation", "Patient"})
			if tc.wantErr != nil {
				if !errors.Is(err, tc.wantErr) || !strings.Contains(fmt.Sprint(err), tc.wantText) {
					t.Fatalf("err = %v, want %v with %q", err, tc.wantErr, tc.wantText)
				}
			} else if err != nil {
				t.Fatal(err)
			}
			if tc.check != nil {
				tc.check(t, srv, res, rec, ev)
			}
		})
	}
}

// An export abandoned while it runs is deleted on the server, and polling
// it afterwards answers 404 (ErrJobGone).
func TestInterruptedExportIsDeleted(t *testing.T) {
	hold := make(chan struct{})
	srv := bulkfake.Start(t, bulkfake.Options{Resources: resources(), Token: token, Hold: hold})
	ctx, cancel := context.WithCancel(context.Background())
	polls := 0
	c, err := client.New(client.Config{BaseURL: srv.URL, Auth: client.BearerToken(token), Sleep: func(ctx context.Context, d time.Duration) error {
		polls++
		if polls == 3 {
			cancel()
		}
		return ctx.Err()
	}})
	if err != nil {
		t.Fatal(err)
	}
	x, err := bulk.New(bulk.Config{Client: c, Dir: t.TempDir()})
	if err != nil {
		t.Fatal(err)
	}
	_, err = x.Export(ctx, request, nil)
	if !errors.Is(err, context.Canceled) {
		t.Fatalf("err = %v, want context.Canceled", err)
	}
	if srv.Cancelled() != 1 {
		t.Fatalf("the running job was not deleted")
	}
	var last bulkfake.Request
	for _, r := range srv.Requests() {
		if r.Method == "DELETE" {
			last = r
		}
	}
	if last.Header.Get("Authorization") != "Bearer "+token || !strings.HasPrefix(last.Path, "/jobs/") {
		t.Errorf("DELETE %s without credentials", last.Path)
	}
	// After the delete the polling location answers 404 (IG: Bulk Data
	// Delete Request).
	job := bulk.Job{StatusURL: strings.TrimSuffix(srv.URL, "/fhir") + last.Path}
	if _, err := x.Wait(context.Background(), job); !errors.Is(err, bulk.ErrJobGone) {
		t.Errorf("poll after delete: %v, want ErrJobGone", err)
	}
	close(hold)
}

// Credentials never go to a host other than the FHIR base's, even when the
// manifest says requiresAccessToken.
func TestTokenStaysWithTheBase(t *testing.T) {
	srv := bulkfake.Start(t, bulkfake.Options{Resources: resources()})
	other := bulkfake.Start(t, bulkfake.Options{Resources: resources()})
	c, err := client.New(client.Config{BaseURL: srv.URL, Auth: client.BearerToken(token)})
	if err != nil {
		t.Fatal(err)
	}
	x, err := bulk.New(bulk.Config{Client: c, Dir: t.TempDir()})
	if err != nil {
		t.Fatal(err)
	}
	u, _ := url.Parse(other.URL)
	m := bulk.Manifest{RequiresAccessToken: true}
	_, err = x.Download(context.Background(), m, bulk.File{Type: "Patient", URL: u.String() + "/x.ndjson"}, filepath.Join(t.TempDir(), "x"))
	if !errors.Is(err, client.ErrForeignHost) {
		t.Fatalf("err = %v, want ErrForeignHost", err)
	}
	if n := len(other.Requests()); n != 0 {
		t.Errorf("the other host received %d requests", n)
	}
}

func TestRequestValidate(t *testing.T) {
	tests := []struct {
		name string
		req  bulk.Request
		ok   bool
	}{
		{"system", bulk.Request{Level: bulk.System}, true},
		{"group without id", bulk.Request{Level: bulk.Group}, false},
		{"group id with slash", bulk.Request{Level: bulk.Group, GroupID: "a/b"}, false},
		{"id on system", bulk.Request{Level: bulk.System, GroupID: "a"}, false},
		{"bad level", bulk.Request{Level: "ward"}, false},
		{"bad type", bulk.Request{Level: bulk.Patient, Types: []string{"observation"}}, false},
	}
	for _, tc := range tests {
		t.Run(tc.name, func(t *testing.T) {
			if err := tc.req.Validate(); (err == nil) != tc.ok {
				t.Errorf("Validate() = %v, want ok=%v", err, tc.ok)
			}
		})
	}
}

// The export with SMART Backend Services credentials (the authorizer serve
// uses): every kick-off, status and file request carries the access token
// the token endpoint issued for a signed client assertion.
func TestExportWithBackendServicesAuth(t *testing.T) {
	const issued = "smart-access-token-1"
	var assertions atomic.Int32
	tokenSrv := httptest.NewTLSServer(http.HandlerFunc(func(w http.ResponseWriter, r *http.Request) {
		if err := r.ParseForm(); err != nil || r.Form.Get("grant_type") != "client_credentials" ||
			r.Form.Get("client_assertion_type") != "urn:ietf:params:oauth:client-assertion-type:jwt-bearer" || r.Form.Get("client_assertion") == "" {
			http.Error(w, `{"error":"invalid_request"}`, http.StatusBadRequest)
			return
		}
		assertions.Add(1)
		w.Header().Set("Content-Type", "application/json")
		fmt.Fprintf(w, `{"access_token":%q,"token_type":"bearer","expires_in":300,"scope":"system/Observation.rs system/Patient.rs"}`, issued)
	}))
	defer tokenSrv.Close()
	key, err := ecdsa.GenerateKey(elliptic.P384(), rand.Reader)
	if err != nil {
		t.Fatal(err)
	}
	auth, err := client.NewBackendAuth(client.BackendConfig{
		TokenURL: tokenSrv.URL + "/token", ClientID: "deadspace", Scope: "system/Observation.rs system/Patient.rs",
		Key: key, KeyID: "k1", HTTPClient: tokenSrv.Client(),
	})
	if err != nil {
		t.Fatal(err)
	}
	srv := bulkfake.Start(t, bulkfake.Options{Resources: resources(), Token: issued, RequiresAccessToken: true, Polls: 1})
	rec := &recorder{}
	c, err := client.New(client.Config{BaseURL: srv.URL, Auth: auth, Sleep: rec.sleep})
	if err != nil {
		t.Fatal(err)
	}
	x, err := bulk.New(bulk.Config{Client: c, Dir: t.TempDir()})
	if err != nil {
		t.Fatal(err)
	}
	res, err := x.Export(context.Background(), request, []string{"Observation", "Patient"})
	if err != nil {
		t.Fatal(err)
	}
	if len(res.Files) != 2 || assertions.Load() != 1 {
		t.Errorf("files %d, token requests %d", len(res.Files), assertions.Load())
	}
	for _, r := range srv.Requests() {
		if r.Header.Get("Authorization") != "Bearer "+issued {
			t.Errorf("%s %s without the access token", r.Method, r.Path)
		}
	}
}
