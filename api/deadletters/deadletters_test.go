package deadletters_test

import (
	"bytes"
	"context"
	"errors"
	"path/filepath"
	"strings"
	"testing"
	"time"

	"github.com/deadspace-fhir/deadspace/api/deadletters"
	"github.com/deadspace-fhir/deadspace/api/store"
	"github.com/deadspace-fhir/deadspace/api/store/boltstore"
)

var t0 = time.Date(2026, 3, 1, 8, 0, 0, 0, time.UTC)

// leaky is a server's answer as real servers write them: identifiers in
// free text, in references and in urn:uuids.
const leaky = `fhir transaction: HTTP 422 Unprocessable Entity: Observation.subject: Patient/bed2-sedated is unknown; resource 7731902 rejected (entry urn:uuid:0f0e0d0c-0000-4000-8000-000000000001)`

var leakedIDs = []string{"bed2-sedated", "7731902", "0f0e0d0c-0000-4000-8000-000000000001", "Patient/p-dl"}

// newStore makes a data directory whose store holds two dead letters, the
// first superseded by a later derivation of its series.
func newStore(t *testing.T) (dir string, s *boltstore.Store, ids []uint64) {
	t.Helper()
	dir = t.TempDir()
	s, err := boltstore.Open(filepath.Join(dir, deadletters.StoreFile), boltstore.Options{})
	if err != nil {
		t.Fatal(err)
	}
	ctx := context.Background()
	const subj = "Patient/p-dl"
	entry := func(series, key string, at time.Time) store.Entry {
		return store.Entry{Series: series, Subject: subj, Key: key, Status: "final", EffectiveAt: t0, UpdatedAt: at, Payload: []byte(key)}
	}
	s1, s2 := "sha256:"+strings.Repeat("a", 64), "sha256:"+strings.Repeat("b", 64)
	must(t, s.Commit(ctx, store.Change{Subject: subj,
		Entries: []store.Entry{entry(s1, "k1", t0), entry(s2, "k2", t0)},
		Writes:  []store.Write{{Series: []string{s1}, Body: []byte("w1")}, {Series: []string{s2}, Body: []byte("w2")}},
	}, t0))
	due, err := s.DueWrites(ctx, t0, 10)
	must(t, err)
	must(t, s.Reschedule(ctx, due[0].ID, t0, "fhir transaction: HTTP 503 Service Unavailable: node of Patient/p-dl down"))
	must(t, s.Bury(ctx, due[0].ID, leaky, t0.Add(time.Minute)))
	must(t, s.Bury(ctx, due[1].ID, "fhir transaction: HTTP 400 Bad Request: bad", t0.Add(2*time.Minute)))
	// A later derivation of s1: the first dead letter is superseded.
	must(t, s.Commit(ctx, store.Change{Subject: subj, Entries: []store.Entry{entry(s1, "k1b", t0.Add(time.Hour))}}, t0.Add(time.Hour)))
	return dir, s, []uint64{due[0].ID, due[1].ID}
}

func must(t *testing.T, err error) {
	t.Helper()
	if err != nil {
		t.Fatal(err)
	}
}

func TestLocalShowsRedactedAndRetries(t *testing.T) {
	_, s, ids := newStore(t)
	defer s.Close()
	ctx := context.Background()
	op := deadletters.Local(s)
	views, total, err := op.List(ctx, 0)
	must(t, err)
	if total != 2 || len(views) != 2 || views[0].ID != ids[0] || views[1].ID != ids[1] {
		t.Fatalf("list %+v total %d", views, total)
	}
	if !views[0].Superseded || views[1].Superseded {
		t.Errorf("superseded: %v %v, want true false", views[0].Superseded, views[1].Superseded)
	}
	v, err := op.Show(ctx, ids[0])
	must(t, err)
	if !strings.Contains(v.Reason, "HTTP 422 Unprocessable Entity: Observation.subject: Patient/[redacted] is unknown; resource [redacted] rejected") {
		t.Errorf("the server's answer lost its wording: %q", v.Reason)
	}
	for _, id := range leakedIDs {
		if strings.Contains(v.Reason+v.LastError, id) {
			t.Errorf("identifier %q shown: %+v", id, v)
		}
	}
	// One attempt rescheduled, then the refused one.
	if v.Attempts != 2 || !v.BuriedAt.Equal(t0.Add(time.Minute)) || !v.QueuedAt.Equal(t0) || len(v.Series) != 1 {
		t.Errorf("view %+v", v)
	}
	if _, err := op.Show(ctx, 999); !errors.Is(err, deadletters.ErrNotFound) {
		t.Errorf("show of an unknown id: %v", err)
	}
	wid, err := op.Retry(ctx, ids[1])
	must(t, err)
	if wid <= ids[1] {
		t.Errorf("retried as write %d, want a new id after %d", wid, ids[1])
	}
	if _, err := op.Retry(ctx, ids[1]); !errors.Is(err, deadletters.ErrNotFound) {
		t.Errorf("second retry: %v", err)
	}
	st, err := s.Stats(ctx)
	must(t, err)
	if st.DeadLetters != 1 || st.OutboxDepth != 1 {
		t.Errorf("stats after retry %+v: want 1 dead letter and 1 write", st)
	}
	if _, _, err := op.List(ctx, deadletters.MaxLimit+1); err == nil {
		t.Error("a limit above the maximum was accepted")
	}
}

func run(args ...string) (string, string, int) {
	var out, errOut bytes.Buffer
	code := deadletters.Main(context.Background(), args, func(string) string { return "" }, &out, &errOut)
	return out.String(), errOut.String(), code
}

func TestCommandAgainstTheDataDirectory(t *testing.T) {
	dir, s, ids := newStore(t)
	// The store is open: the command must say serve holds it.
	_, errOut, code := run("--data-dir", dir, "list")
	if code != 1 || !strings.Contains(errOut, "in use") || !strings.Contains(errOut, "--grpc") {
		t.Errorf("locked store: exit %d, %q", code, errOut)
	}
	s.Close()

	out, errOut, code := run("--data-dir", dir, "list")
	if code != 0 || !strings.Contains(out, "2 dead letters") || !strings.Contains(out, "Patient/[redacted]") {
		t.Fatalf("list: exit %d\n%s%s", code, out, errOut)
	}
	show, _, code := run("show", "--data-dir", dir, "1")
	if code != 0 || !strings.Contains(show, "superseded: yes") || !strings.Contains(show, "sha256:"+strings.Repeat("a", 64)) {
		t.Fatalf("show: exit %d\n%s", code, show)
	}
	for _, id := range leakedIDs {
		if strings.Contains(out+show, id) {
			t.Errorf("identifier %q printed:\n%s%s", id, out, show)
		}
	}
	out, _, code = run("--data-dir", dir, "retry", "2")
	if code != 0 || !strings.Contains(out, "dead letter 2 is back in the outbox as write") {
		t.Fatalf("retry: exit %d %s", code, out)
	}
	out, _, _ = run("--data-dir", dir, "list")
	if !strings.Contains(out, "1 dead letters") {
		t.Errorf("after retry: %s", out)
	}
	_, errOut, code = run("--data-dir", dir, "show", "2")
	if code != 1 || !strings.Contains(errOut, "no dead letter with that id") {
		t.Errorf("show of a retried letter: exit %d %q", code, errOut)
	}
	_ = ids
}

func TestCommandUsage(t *testing.T) {
	cases := []struct {
		name string
		args []string
		want string
	}{
		{"nothing", nil, "expected list, show ID or retry ID"},
		{"unknown verb", []string{"purge"}, `got "purge"`},
		{"show without id", []string{"show"}, "expected list, show ID or retry ID"},
		{"bad id", []string{"retry", "x7"}, `retry needs a dead letter id (a positive number), got "x7"`},
		{"limit too large", []string{"list", "--limit", "5000"}, "--limit: limit must be 1 to 1000, got 5000"},
		{"half a client certificate", []string{"list", "--grpc", "127.0.0.1:1", "--grpc-cert", "c.pem"}, "--grpc-cert and --grpc-key go together"},
		{"TLS without gRPC", []string{"list", "--grpc-ca", "ca.pem"}, "need --grpc"},
		{"a key without gRPC", []string{"list", "--grpc-key", "k.pem"}, "need --grpc"},
		// Never plaintext with the certificate dropped.
		{"a client certificate without the CA bundle", []string{"list", "--grpc", "127.0.0.1:1", "--grpc-cert", "c.pem", "--grpc-key", "k.pem"},
			"--grpc-cert and --grpc-key need --grpc-ca"},
		{"missing certificate files", []string{"list", "--grpc", "127.0.0.1:1", "--grpc-cert", "/nonexistent/c.pem", "--grpc-key", "/nonexistent/k.pem"},
			"--grpc-cert and --grpc-key: reading certificate: open /nonexistent/c.pem"},
		{"a missing CA bundle", []string{"list", "--grpc", "127.0.0.1:1", "--grpc-ca", "/nonexistent/ca.pem"}, "--grpc-ca: reading CA file: open /nonexistent/ca.pem"},
		{"a limit that is not a number", []string{"list", "--limit", "ten"}, `--limit "ten": not a whole number`},
	}
	for _, tc := range cases {
		t.Run(tc.name, func(t *testing.T) {
			_, errOut, code := run(tc.args...)
			if code != 2 || !strings.Contains(errOut, tc.want) {
				t.Errorf("exit %d, %q; want 2 and %q", code, errOut, tc.want)
			}
		})
	}
	_, errOut, code := run("--data-dir", filepath.Join(t.TempDir(), "typo"), "list")
	if code != 1 || !strings.Contains(errOut, "no store at") {
		t.Errorf("missing data directory: exit %d %q", code, errOut)
	}
}
