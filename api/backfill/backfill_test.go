package backfill_test

// Backfills of the demo night against the Medplum FHIR peer that
// fhir/fhirtest starts (an independent FHIR server implementation), with the
// export served by the Go Bulk Data endpoint in fhir/fhirtest/bulkfake.
// The expected derived Observations are the ones replay derives from the
// same files: backfill must write exactly those, each once, with one
// Provenance each and one software Device.

import (
	"bufio"
	"context"
	"encoding/json"
	"errors"
	"log/slog"
	"net/http"
	"os"
	"path/filepath"
	"sort"
	"strings"
	"sync"
	"sync/atomic"
	"testing"
	"time"

	"github.com/deadspace-fhir/deadspace/api/backfill"
	"github.com/deadspace-fhir/deadspace/api/replay"
	"github.com/deadspace-fhir/deadspace/api/serve"
	"github.com/deadspace-fhir/deadspace/api/settings"
	"github.com/deadspace-fhir/deadspace/api/store/boltstore"
	"github.com/deadspace-fhir/deadspace/derive"
	"github.com/deadspace-fhir/deadspace/fhir/bulk"
	"github.com/deadspace-fhir/deadspace/fhir/client"
	"github.com/deadspace-fhir/deadspace/fhir/decode"
	"github.com/deadspace-fhir/deadspace/fhir/encode"
	"github.com/deadspace-fhir/deadspace/fhir/fhirtest"
	"github.com/deadspace-fhir/deadspace/fhir/fhirtest/bulkfake"
)

const version = "test"

func demoFiles(t *testing.T) []string {
	t.Helper()
	files, err := filepath.Glob("../../testdata/demo/*.ndjson")
	if err != nil || len(files) == 0 {
		t.Fatalf("demo files: %v", err)
	}
	return files
}

// demoResources reads the demo night's resources whose subject (or id, for
// a Patient) passes keep.
func demoResources(t *testing.T, keep func(subject string) bool) []json.RawMessage {
	t.Helper()
	var out []json.RawMessage
	for _, name := range demoFiles(t) {
		f, err := os.Open(name)
		if err != nil {
			t.Fatal(err)
		}
		sc := bufio.NewScanner(f)
		sc.Buffer(make([]byte, 1<<20), 1<<20)
		for sc.Scan() {
			var head struct {
				ResourceType string
				ID           string
				Subject      struct{ Reference string }
			}
			line := append(json.RawMessage(nil), sc.Bytes()...)
			if json.Unmarshal(line, &head) != nil {
				continue
			}
			subject := head.Subject.Reference
			if head.ResourceType == "Patient" {
				subject = "Patient/" + head.ID
			}
			if keep(subject) {
				out = append(out, line)
			}
		}
		f.Close()
	}
	return out
}

func encOptions() encode.Options {
	o := encode.DefaultOptions()
	o.SoftwareVersion = version
	return o
}

// expected returns the identifiers of the derived Observations replay
// derives from the demo night.
func expected(t *testing.T) map[string]bool {
	t.Helper()
	out, err := replay.Run(context.Background(), replay.Options{Derive: derive.DefaultConfig(), Encode: encOptions()}, demoFiles(t))
	if err != nil {
		t.Fatal(err)
	}
	ids := map[string]bool{}
	for _, r := range out.Report.Results {
		for _, o := range r.Bundle.Observations {
			ids[*o.Identifier[0].Value] = true
		}
	}
	if len(ids) == 0 {
		t.Fatal("replay derived nothing from the demo night")
	}
	return ids
}

func newClient(t *testing.T, base string, hc *http.Client) *client.Client {
	t.Helper()
	c, err := client.New(client.Config{BaseURL: base, HTTPClient: hc, UserAgent: "deadspace/" + version})
	if err != nil {
		t.Fatal(err)
	}
	return c
}

func options(peer *fhirtest.Server, c *client.Client, dir string) backfill.Options {
	return backfill.Options{
		Derive: derive.DefaultConfig(), Encode: encOptions(), Client: c, StateDir: dir,
		Logger: slog.New(slog.DiscardHandler), MaxTransactionEntries: 8,
	}
}

// peerState is what the peer holds that deadspace wrote.
type peerState struct {
	derived     map[string]int // identifier value → copies
	provenances int
	devices     int
}

func stateOf(t *testing.T, peer *fhirtest.Server) peerState {
	t.Helper()
	st := peerState{derived: map[string]int{}}
	for _, raw := range peer.Search(t, "Observation?_count=1000") {
		var m struct {
			Identifier []struct{ System, Value string }
		}
		_ = json.Unmarshal(raw, &m)
		if len(m.Identifier) > 0 && m.Identifier[0].System == encode.DefaultIdentifierSystem {
			st.derived[m.Identifier[0].Value]++
		}
	}
	st.provenances = len(peer.Search(t, "Provenance?_count=1000"))
	st.devices = len(peer.Search(t, "Device?_count=1000"))
	return st
}

// checkOneOfEach: every expected derived Observation exactly once, nothing
// else derived, one Provenance per write of the night, one Device.
func checkOneOfEach(t *testing.T, st peerState, want map[string]bool, provenances int) {
	t.Helper()
	var missing, doubled, extra []string
	for id := range want {
		switch st.derived[id] {
		case 0:
			missing = append(missing, id)
		case 1:
		default:
			doubled = append(doubled, id)
		}
	}
	for id := range st.derived {
		if !want[id] {
			extra = append(extra, id)
		}
	}
	sort.Strings(missing)
	if len(missing)+len(doubled)+len(extra) > 0 {
		t.Errorf("derived on the peer: %d missing, %d doubled, %d unexpected (of %d expected)", len(missing), len(doubled), len(extra), len(want))
	}
	if st.provenances != provenances {
		t.Errorf("provenances = %d, want %d", st.provenances, provenances)
	}
	if st.devices != 1 {
		t.Errorf("devices = %d, want 1", st.devices)
	}
}

// demoWrites is how many results (one Provenance each) the demo night
// gives: replay's "derived: 17 blood gases, end-tidal CO2 falls 2 and rises 1".
const demoWrites = 20

func TestBackfillDemoNightFromExport(t *testing.T) {
	peer := fhirtest.Start(t)
	want := expected(t)
	exp := bulkfake.Start(t, bulkfake.Options{
		Resources: demoResources(t, func(string) bool { return true }), Polls: 2, PerFile: 4000,
	})
	dir := t.TempDir()
	opts := options(peer, newClient(t, peer.BaseURL, nil), dir)
	opts.Export = &bulk.Request{Level: bulk.System}
	opts.ExportClient = newClient(t, exp.URL, nil)
	opts.TypeFilter = true

	sum, err := backfill.Run(context.Background(), opts)
	if err != nil {
		t.Fatal(err)
	}
	st := stateOf(t, peer)
	checkOneOfEach(t, st, want, demoWrites)
	if sum.Writes != demoWrites || sum.Derived["final"] != len(want) || sum.Patients != 7 || sum.TransactionTime.IsZero() {
		t.Errorf("summary: %+v", sum)
	}
	kick := exp.Requests()[0]
	if kick.Query.Get("_type") != "Patient,Observation" || !strings.Contains(kick.Query.Get("_typeFilter"), "http://loinc.org|2019-8") {
		t.Errorf("kick-off ?%s", kick.Query.Encode())
	}
	// The _typeFilter left out the Observations with codes the service
	// does not use, so none was counted as not needed.
	if sum.Resources["Encounter"] != 0 || sum.Ignored != 0 {
		t.Errorf("resources %v, ignored %d", sum.Resources, sum.Ignored)
	}

	t.Run("second identical run writes nothing new", func(t *testing.T) {
		peer.Reset()
		sum, err := backfill.Run(context.Background(), opts)
		if err != nil {
			t.Fatal(err)
		}
		if sum.Writes != 0 || sum.Derived["final"] != 0 || sum.Resumed {
			t.Errorf("second run: %+v", sum)
		}
		if c := peer.Counts(); c.Requests["POST transaction"] != 0 || c.Requests["POST create"] != 0 {
			t.Errorf("second run sent %v", c.Requests)
		}
		checkOneOfEach(t, stateOf(t, peer), want, demoWrites)
	})
	t.Run("a run with a fresh state directory finds everything already there", func(t *testing.T) {
		opts := opts
		opts.StateDir = t.TempDir()
		sum, err := backfill.Run(context.Background(), opts)
		if err != nil {
			t.Fatal(err)
		}
		if sum.Writes != demoWrites {
			t.Errorf("writes acknowledged = %d, want %d (conditional creates that found their resources)", sum.Writes, demoWrites)
		}
		checkOneOfEach(t, stateOf(t, peer), want, demoWrites)
	})
}

// cancelAfter cancels a context once n transactions have reached the server,
// before their responses are read: the server has them, the backfill does
// not know it.
type cancelAfter struct {
	n      int32
	seen   atomic.Int32
	cancel context.CancelFunc
}

func (c *cancelAfter) RoundTrip(r *http.Request) (*http.Response, error) {
	resp, err := http.DefaultTransport.RoundTrip(r)
	if r.Method == http.MethodPost && (strings.HasSuffix(r.URL.Path, "/fhir") || strings.HasSuffix(r.URL.Path, "/fhir/")) {
		if c.seen.Add(1) == c.n {
			c.cancel()
			if resp != nil {
				resp.Body.Close()
			}
			return nil, context.Canceled
		}
	}
	return resp, err
}

func TestBackfillInterruptedRunResumes(t *testing.T) {
	peer := fhirtest.Start(t)
	want := expected(t)
	dir := t.TempDir()
	ctx, cancel := context.WithCancel(context.Background())
	defer cancel()
	rt := &cancelAfter{n: 5, cancel: cancel}
	opts := options(peer, newClient(t, peer.BaseURL, &http.Client{Transport: rt}), dir)
	opts.Files = demoFiles(t)

	sum, err := backfill.Run(ctx, opts)
	if !errors.Is(err, context.Canceled) {
		t.Fatalf("interrupted run: err = %v", err)
	}
	if sum.Pending == 0 || sum.Writes >= demoWrites {
		t.Fatalf("interrupted run left %d pending after %d writes", sum.Pending, sum.Writes)
	}
	before := stateOf(t, peer)
	if len(before.derived) == 0 || len(before.derived) >= len(want) {
		t.Fatalf("the interruption came at the wrong time: %d of %d on the peer", len(before.derived), len(want))
	}

	opts.Client = newClient(t, peer.BaseURL, nil)
	sum, err = backfill.Run(context.Background(), opts)
	if err != nil {
		t.Fatal(err)
	}
	if !sum.Resumed || sum.Patients != 0 {
		t.Errorf("resumed run read or derived again: %+v", sum)
	}
	// The write whose response was lost is sent again; its conditional
	// creates find what the server stored.
	if sum.Writes != demoWrites-4 {
		t.Errorf("resumed run acknowledged %d writes, want %d", sum.Writes, demoWrites-4)
	}
	checkOneOfEach(t, stateOf(t, peer), want, demoWrites)
}

func TestBackfillAfterServeWrotePartOfTheNight(t *testing.T) {
	peer := fhirtest.Start(t)
	want := expected(t)
	// serve, with a retention that reaches back to the demo night, takes
	// two of the five beds and writes their values.
	cfg := serve.Config{
		FHIRBase: peer.BaseURL, Listen: "127.0.0.1:0", DataDir: t.TempDir(), WebhookSecret: "backfill-test-secret-0123",
		WebhookHeader: "Authorization", MaxBodyBytes: 4 << 20, Settle: 0,
		Retention: 5 * 365 * 24 * time.Hour, LogLevel: "info", MaxTxEntries: 8, MaxConcurrent: 16,
		Derivation: settings.Defaults(),
	}
	if err := cfg.Validate(); err != nil {
		t.Fatal(err)
	}
	svc, err := serve.New(cfg, version, slog.New(slog.DiscardHandler))
	if err != nil {
		t.Fatal(err)
	}
	ctx, stop := context.WithCancel(context.Background())
	var wg sync.WaitGroup
	wg.Add(1)
	go func() { defer wg.Done(); _ = svc.Run(ctx) }()
	part := demoResources(t, func(s string) bool { return s == "Patient/bed1-stable" || s == "Patient/bed2-ards" })
	if _, err := svc.Engine().Ingest(ctx, "webhook", part); err != nil {
		t.Fatal(err)
	}
	deadline := time.Now().Add(3 * time.Minute) // a hang detector, not a timing check
	for {
		h, err := svc.Engine().Health(ctx)
		if err == nil && h.Stats.DirtyPatients == 0 && h.Stats.OutboxDepth == 0 && len(stateOf(t, peer).derived) > 0 {
			break
		}
		if time.Now().After(deadline) {
			t.Fatal("serve did not finish writing")
		}
		time.Sleep(100 * time.Millisecond)
	}
	stop()
	wg.Wait()
	served := stateOf(t, peer)
	if len(served.derived) == 0 || len(served.derived) >= len(want) {
		t.Fatalf("serve wrote %d of %d values", len(served.derived), len(want))
	}

	opts := options(peer, newClient(t, peer.BaseURL, nil), t.TempDir())
	opts.Files = demoFiles(t)
	if _, err := backfill.Run(context.Background(), opts); err != nil {
		t.Fatal(err)
	}
	checkOneOfEach(t, stateOf(t, peer), want, demoWrites)
}

func TestDryRunWritesNothing(t *testing.T) {
	peer := fhirtest.Start(t)
	want := expected(t)
	opts := options(peer, newClient(t, peer.BaseURL, nil), t.TempDir())
	opts.Files = demoFiles(t)
	opts.DryRun = true
	sum, err := backfill.Run(context.Background(), opts)
	if err != nil {
		t.Fatal(err)
	}
	if sum.Derived["final"] != len(want) || sum.Writes != 0 || sum.Patients != 7 {
		t.Errorf("dry run: %+v", sum)
	}
	if n := peer.Counts().Total(); n != 0 {
		t.Errorf("a dry run sent %d requests to the FHIR server", n)
	}
	entries, _ := os.ReadDir(opts.StateDir)
	if len(entries) != 0 {
		t.Errorf("a dry run left state in the state directory")
	}
}

func TestExportFailuresAreReported(t *testing.T) {
	tests := []struct {
		name string
		opts bulkfake.Options
		want error
	}{
		{"job fails with an OperationOutcome", bulkfake.Options{Fail: "export store unavailable"}, bulk.ErrJobFailed},
		{"files expired", bulkfake.Options{Expired: true}, bulk.ErrExpired},
	}
	for _, tc := range tests {
		t.Run(tc.name, func(t *testing.T) {
			tc.opts.Resources = demoResources(t, func(s string) bool { return s == "Patient/bed1-stable" })
			exp := bulkfake.Start(t, tc.opts)
			c := newClient(t, exp.URL, nil)
			opts := backfill.Options{
				Derive: derive.DefaultConfig(), Encode: encOptions(), Decode: decode.Options{},
				Client: c, StateDir: t.TempDir(), Export: &bulk.Request{Level: bulk.Patient},
			}
			_, err := backfill.Run(context.Background(), opts)
			if !errors.Is(err, tc.want) {
				t.Fatalf("err = %v, want %v", err, tc.want)
			}
			if exp.Cancelled() != 1 {
				t.Errorf("the export job was not deleted")
			}
		})
	}
}

// A backfill interrupted while the export runs deletes the job on the
// server; run again, it requests a fresh export and finishes.
func TestBackfillInterruptedDuringExport(t *testing.T) {
	peer := fhirtest.Start(t)
	hold := make(chan struct{})
	exp := bulkfake.Start(t, bulkfake.Options{
		Resources: demoResources(t, func(s string) bool { return s == "Patient/bed1-stable" }), Hold: hold,
	})
	ctx, cancel := context.WithCancel(context.Background())
	defer cancel()
	polls := 0
	waiting, err := client.New(client.Config{BaseURL: exp.URL, Sleep: func(ctx context.Context, d time.Duration) error {
		if polls++; polls == 2 {
			cancel()
		}
		return ctx.Err()
	}})
	if err != nil {
		t.Fatal(err)
	}
	opts := options(peer, newClient(t, peer.BaseURL, nil), t.TempDir())
	opts.Export = &bulk.Request{Level: bulk.Group, GroupID: "icu"}
	opts.ExportClient = waiting
	if _, err := backfill.Run(ctx, opts); !errors.Is(err, context.Canceled) {
		t.Fatalf("interrupted run: err = %v", err)
	}
	if exp.Cancelled() != 1 || len(stateOf(t, peer).derived) != 0 {
		t.Fatalf("after the interruption: %d jobs deleted, %d values written", exp.Cancelled(), len(stateOf(t, peer).derived))
	}
	close(hold)
	opts.ExportClient = newClient(t, exp.URL, nil)
	sum, err := backfill.Run(context.Background(), opts)
	if err != nil {
		t.Fatal(err)
	}
	// bed1 has three blood gases in the demo night (replay's table).
	if exp.Jobs() != 2 || sum.Resumed || sum.Writes != 3 {
		t.Errorf("second run: %d jobs, summary %+v", exp.Jobs(), sum)
	}
	if st := stateOf(t, peer); len(st.derived) == 0 || st.provenances != 3 || st.devices != 1 {
		t.Errorf("peer: %d values, %d provenances, %d devices", len(st.derived), st.provenances, st.devices)
	}
}

// Two backfills cannot share a state directory at once: the second fails
// clearly instead of corrupting the first's state.
func TestStateDirectoryIsLocked(t *testing.T) {
	dir := t.TempDir()
	st, err := boltstore.Open(filepath.Join(dir, "backfill.db"), boltstore.Options{})
	if err != nil {
		t.Fatal(err)
	}
	defer st.Close()
	c, err := client.New(client.Config{BaseURL: "http://127.0.0.1:1/fhir"})
	if err != nil {
		t.Fatal(err)
	}
	opts := backfill.Options{Derive: derive.DefaultConfig(), Encode: encOptions(), Client: c, StateDir: dir, Files: demoFiles(t)}
	if _, err := backfill.Run(context.Background(), opts); err == nil || !strings.Contains(err.Error(), "state directory") {
		t.Fatalf("err = %v, want a state directory error", err)
	}
}
