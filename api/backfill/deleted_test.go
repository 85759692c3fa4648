package backfill_test

// Deletions in a backfill's input, against the Go FHIR server of
// fhir/fhirtest/fakefhir (where the values are written) and the Go Bulk
// Data endpoint of fhir/fhirtest/bulkfake: a first backfill derives bed 1
// of the demo night, a second one (an incremental export with _since, or
// local files) lists one of its blood gases as deleted.

import (
	"bytes"
	"context"
	"encoding/json"
	"log/slog"
	"os"
	"path/filepath"
	"strings"
	"testing"
	"time"

	"github.com/deadspace-fhir/deadspace/api/backfill"
	"github.com/deadspace-fhir/deadspace/api/engine"
	"github.com/deadspace-fhir/deadspace/derive"
	"github.com/deadspace-fhir/deadspace/fhir/bulk"
	"github.com/deadspace-fhir/deadspace/fhir/encode"
	"github.com/deadspace-fhir/deadspace/fhir/fhirtest/bulkfake"
	"github.com/deadspace-fhir/deadspace/fhir/fhirtest/fakefhir"
)

const (
	deletedGas = "Observation/bed1-stable-abg-2" // the demo night's second blood gas of bed 1, last updated 02:02
	otherGas   = "Observation/bed1-stable-abg-1"
)

var (
	// since is after every demo resource was last updated; rewritten is
	// when the deleted gas is written again, in the cases that do.
	since      = time.Date(2026, 3, 20, 0, 0, 0, 0, time.UTC)
	rewritten  = time.Date(2026, 3, 21, 0, 0, 0, 0, time.UTC)
	exportedAt = time.Date(2026, 3, 22, 0, 0, 0, 0, time.UTC)
)

func bed1(t *testing.T) []json.RawMessage {
	t.Helper()
	return demoResources(t, func(s string) bool { return s == "Patient/bed1-stable" })
}

// writtenAgain is the deleted gas written again after its deletion: the
// same content as a new version.
func writtenAgain(t *testing.T, resources []json.RawMessage) json.RawMessage {
	t.Helper()
	for _, raw := range resources {
		var m map[string]any
		if err := json.Unmarshal(raw, &m); err != nil {
			t.Fatal(err)
		}
		if m["resourceType"] == "Observation" && "Observation/"+m["id"].(string) == deletedGas {
			m["meta"] = map[string]any{"versionId": "2", "lastUpdated": rewritten.Format(time.RFC3339)}
			out, _ := json.Marshal(m)
			return out
		}
	}
	t.Fatal("the blood gas is not in the demo night")
	return nil
}

// derivedStatuses counts the service's Observations on the fake derived
// from gas, by status.
func derivedStatuses(t *testing.T, f *fakefhir.Server, gas string) map[string]int {
	t.Helper()
	out := map[string]int{}
	for _, raw := range f.Current("Observation") {
		var m struct {
			Status      string
			Identifier  []struct{ System, Value string }
			DerivedFrom []struct{ Reference string }
		}
		if err := json.Unmarshal(raw, &m); err != nil {
			t.Fatal(err)
		}
		if len(m.Identifier) == 0 || m.Identifier[0].System != encode.DefaultIdentifierSystem {
			continue
		}
		for _, d := range m.DerivedFrom {
			if strings.HasPrefix(d.Reference, gas+"/") || d.Reference == gas {
				out[m.Status]++
				break
			}
		}
	}
	return out
}

// firstBackfill derives bed 1 from a full export and writes it to f.
func firstBackfill(t *testing.T, f *fakefhir.Server, dir string) backfill.Options {
	t.Helper()
	exp := bulkfake.Start(t, bulkfake.Options{Resources: bed1(t)})
	opts := backfill.Options{
		Derive: derive.DefaultConfig(), Encode: encOptions(), Client: newClient(t, f.BaseURL, nil), StateDir: dir,
		Logger: slog.New(slog.DiscardHandler), MaxTransactionEntries: 8,
		Export: &bulk.Request{Level: bulk.System}, ExportClient: newClient(t, exp.URL, nil),
	}
	if _, err := backfill.Run(context.Background(), opts); err != nil {
		t.Fatal(err)
	}
	if st := derivedStatuses(t, f, deletedGas); st["final"] == 0 || len(st) != 1 {
		t.Fatalf("after the first backfill, values derived from the blood gas: %v", st)
	}
	return opts
}

func TestBackfillAppliesExportDeletions(t *testing.T) {
	tests := []struct {
		name string
		// the second export: deleted resources, raw deleted-file lines,
		// and whether the gas was written again after its deletion.
		deleted      []bulkfake.Deletion
		lines        []string
		again        bool
		wantWithdraw bool
		want         backfill.Deletions
		skipped      []string // prefixes of Summary.Skipped
	}{
		{
			name:    "deleted, no time given, not in the output: withdrawn",
			deleted: []bulkfake.Deletion{{Ref: deletedGas}}, wantWithdraw: true,
			want: backfill.Deletions{Files: 1, Listed: 1, DeletionReceipt: engine.DeletionReceipt{Applied: 1}},
		},
		{
			name:    "deleted at a time given, not in the output: withdrawn",
			deleted: []bulkfake.Deletion{{Ref: deletedGas, At: since.Add(time.Hour), Stamp: true}}, wantWithdraw: true,
			want: backfill.Deletions{Files: 1, Listed: 1, DeletionReceipt: engine.DeletionReceipt{Applied: 1}},
		},
		{
			name:    "deleted, no time given, and written again (in the output): the output's version stands",
			deleted: []bulkfake.Deletion{{Ref: deletedGas}}, again: true, wantWithdraw: false,
			want: backfill.Deletions{Files: 1, Listed: 1, DeletionReceipt: engine.DeletionReceipt{Older: 1}},
		},
		{
			name:    "deleted before the version in the output: the output's version stands",
			deleted: []bulkfake.Deletion{{Ref: deletedGas, At: rewritten.Add(-time.Hour), Stamp: true}}, again: true, wantWithdraw: false,
			want: backfill.Deletions{Files: 1, Listed: 1, DeletionReceipt: engine.DeletionReceipt{Older: 1}},
		},
		{
			name:    "deleted after the version in the output: withdrawn",
			deleted: []bulkfake.Deletion{{Ref: deletedGas, At: rewritten.Add(time.Hour), Stamp: true}}, again: true, wantWithdraw: true,
			want: backfill.Deletions{Files: 1, Listed: 1, DeletionReceipt: engine.DeletionReceipt{Applied: 1}},
		},
		{
			name:    "a Patient and Observations the service never stored: nothing to do",
			deleted: []bulkfake.Deletion{{Ref: "Patient/bed1-stable"}, {Ref: "Observation/never-held"}, {Ref: "Observation/spo2-unknown-code"}},
			want:    backfill.Deletions{Files: 1, Listed: 3, DeletionReceipt: engine.DeletionReceipt{NotHeld: 3}},
		},
		{
			name:    "malformed lines are skipped by file and line, the rest applied",
			deleted: []bulkfake.Deletion{{Ref: deletedGas}},
			lines: []string{
				`{"resourceType":"Bundle","type":"transaction","entry":[`,
				`{"resourceType":"Bundle","type":"searchset","entry":[{"request":{"method":"DELETE","url":"Observation/bed1-stable-abg-3"}}]}`,
				`{"resourceType":"Bundle","type":"transaction","entry":[{"request":{"method":"PUT","url":"Observation/bed1-stable-abg-3"}},{"request":{"method":"DELETE","url":"Observation/never-held"}}]}`,
			},
			wantWithdraw: true,
			want:         backfill.Deletions{Files: 1, Listed: 2, DeletionReceipt: engine.DeletionReceipt{Applied: 1, NotHeld: 1}},
			skipped:      []string{"deleted-0001.ndjson:2: ", "deleted-0001.ndjson:3: ", "deleted-0001.ndjson:4: entry[0]: "},
		},
	}
	for _, tc := range tests {
		t.Run(tc.name, func(t *testing.T) {
			f := fakefhir.Start(t)
			opts := firstBackfill(t, f, t.TempDir())
			before := derivedStatuses(t, f, otherGas)

			var second []json.RawMessage
			if tc.again {
				second = append(second, writtenAgain(t, bed1(t)))
			}
			exp := bulkfake.Start(t, bulkfake.Options{
				Resources: append(bed1(t), second...), Deleted: tc.deleted, DeletedLines: tc.lines, TransactionTime: exportedAt,
			})
			var logs bytes.Buffer
			opts.Logger = slog.New(slog.NewJSONHandler(&logs, &slog.HandlerOptions{Level: slog.LevelDebug}))
			opts.Export = &bulk.Request{Level: bulk.System, Since: since}
			opts.ExportClient = newClient(t, exp.URL, nil)
			sum, err := backfill.Run(context.Background(), opts)
			if err != nil {
				t.Fatal(err)
			}
			if sum.Deletions != tc.want {
				t.Errorf("deletions %+v, want %+v", sum.Deletions, tc.want)
			}
			st := derivedStatuses(t, f, deletedGas)
			withdrawn := st["entered-in-error"] > 0 && st["final"] == 0 && st["amended"] == 0
			live := st["entered-in-error"] == 0 && st["final"]+st["amended"] > 0
			if (tc.wantWithdraw && !withdrawn) || (!tc.wantWithdraw && !live) {
				t.Errorf("values derived from the deleted blood gas on the server: %v, want withdrawn = %v", st, tc.wantWithdraw)
			}
			if tc.wantWithdraw && sum.Derived["entered-in-error"] != st["entered-in-error"] {
				t.Errorf("summary: %d withdrawn, server: %d", sum.Derived["entered-in-error"], st["entered-in-error"])
			}
			if after := derivedStatuses(t, f, otherGas); after["final"] != before["final"] || after["entered-in-error"] != 0 {
				t.Errorf("another blood gas's values changed: %v, then %v", before, after)
			}
			if sum.SkippedLines != len(tc.skipped) {
				t.Errorf("%d lines skipped, want %d: %q", sum.SkippedLines, len(tc.skipped), sum.Skipped)
			}
			for i, p := range tc.skipped {
				if i < len(sum.Skipped) && !strings.HasPrefix(sum.Skipped[i], p) {
					t.Errorf("skipped[%d] = %q, want it to begin %q", i, sum.Skipped[i], p)
				}
			}
			for _, s := range sum.Skipped {
				if strings.Contains(s, "bed1") {
					t.Errorf("a skipped line's description names a resource: %q", s)
				}
			}
			if strings.Contains(logs.String(), "bed1") || strings.Contains(logs.String(), "never-held") {
				t.Errorf("the log names a patient or resource:\n%s", logs.String())
			}
			var out strings.Builder
			if err := backfill.WriteSummary(&out, sum); err != nil || !strings.Contains(out.String(), "deleted: ") {
				t.Errorf("the summary says nothing of the deletions: %v\n%s", err, out.String())
			}
		})
	}
}

// Local NDJSON files: a line that is a transaction Bundle of DELETE
// entries is applied as the export's deleted files are, by the same
// rules.
func TestBackfillAppliesDeletionsInLocalFiles(t *testing.T) {
	deleteLine := func(lastModified string) string {
		resp := ""
		if lastModified != "" {
			resp = `,"response":{"lastModified":"` + lastModified + `"}`
		}
		return `{"resourceType":"Bundle","type":"transaction","entry":[{"request":{"method":"DELETE","url":"` + deletedGas + `"}` + resp + `}]}`
	}
	tests := []struct {
		name string
		// withNight puts the demo night's bed 1 in the same files as the
		// deletion (written again or not), rather than in the first run only.
		withNight    bool
		line         string
		wantWithdraw bool
		want         backfill.Deletions
	}{
		{"a later run's file of deletions, no time: withdrawn", false, deleteLine(""), true,
			backfill.Deletions{Listed: 1, DeletionReceipt: engine.DeletionReceipt{Applied: 1}}},
		{"in the same files as the gas, no time: the version the files carry stands", true, deleteLine(""), false,
			backfill.Deletions{Listed: 1, DeletionReceipt: engine.DeletionReceipt{Older: 1}}},
		{"in the same files as the gas, deleted after it: withdrawn", true, deleteLine("2026-03-15T03:00:00Z"), true,
			backfill.Deletions{Listed: 1, DeletionReceipt: engine.DeletionReceipt{Applied: 1}}},
		{"in the same files as the gas, deleted before it: the gas stands", true, deleteLine("2026-03-15T01:00:00Z"), false,
			backfill.Deletions{Listed: 1, DeletionReceipt: engine.DeletionReceipt{Older: 1}}},
	}
	for _, tc := range tests {
		t.Run(tc.name, func(t *testing.T) {
			f := fakefhir.Start(t)
			opts := firstBackfill(t, f, t.TempDir())
			dir := t.TempDir()
			var lines []string
			if tc.withNight {
				for _, r := range bed1(t) {
					lines = append(lines, string(r))
				}
			}
			// The deletion comes first: the order of lines decides nothing.
			lines = append([]string{tc.line}, lines...)
			name := filepath.Join(dir, "mixed.ndjson")
			if err := os.WriteFile(name, []byte(strings.Join(lines, "\n")+"\n"), 0o600); err != nil {
				t.Fatal(err)
			}
			opts.Export, opts.ExportClient, opts.Files = nil, nil, []string{name}
			sum, err := backfill.Run(context.Background(), opts)
			if err != nil {
				t.Fatal(err)
			}
			if sum.Deletions != tc.want || sum.Resources["Bundle"] != 0 || sum.SkippedLines != 0 {
				t.Errorf("deletions %+v (want %+v), resources %v, skipped %q", sum.Deletions, tc.want, sum.Resources, sum.Skipped)
			}
			st := derivedStatuses(t, f, deletedGas)
			withdrawn := st["entered-in-error"] > 0 && st["final"] == 0 && st["amended"] == 0
			if withdrawn != tc.wantWithdraw {
				t.Errorf("values derived from the blood gas on the server: %v, want withdrawn = %v", st, tc.wantWithdraw)
			}
		})
	}
}
