package backfill

import (
	"bytes"
	"context"
	"log/slog"
	"strings"
	"testing"
	"time"

	"github.com/deadspace-fhir/deadspace/api/store"
)

func TestProgressDisplay(t *testing.T) {
	stats := func(context.Context) (store.Stats, error) { return store.Stats{DirtyPatients: 2}, nil }
	tests := []struct {
		name     string
		terminal bool
		phase    string
		want     []string
		notWant  []string
	}{
		{"terminal while deriving", true, "derive", []string{"\rderive", "files 2/4", "1.5 KiB", "patients 3/5", "patients/s", "left"}, []string{"msg="}},
		{"terminal while writing", true, "write", []string{"\rwrite", "writes 7/10 acknowledged", "writes/s"}, nil},
		{"terminal while applying deletions", true, "delete", []string{"\rdelete", "4 deletions", "deletions/s"}, nil},
		{"log lines when not a terminal", false, "write", []string{"msg=\"backfill progress\"", "phase=write", "writes_acknowledged=7", "writes_total=10", "patients=1", "deletions=4", "time_left="}, []string{"\r"}},
	}
	for _, tc := range tests {
		t.Run(tc.name, func(t *testing.T) {
			var out, logs bytes.Buffer
			p := newProgress(Options{Progress: &out, Terminal: tc.terminal, ProgressEvery: time.Hour}, stats)
			p.files.Store(2)
			p.filesTotal.Store(4)
			p.bytes.Store(1536)
			p.patientsTotal.Store(5)
			p.patients.Store(1)
			p.writesTotal.Store(10)
			p.setPhase(tc.phase)
			p.phaseStart.Store(time.Now().Add(-2 * time.Second).UnixNano())
			p.writes.Store(7)
			p.deletions.Store(4)
			p.show(context.Background(), slog.New(slog.NewTextHandler(&logs, nil)))
			got := out.String() + logs.String()
			for _, w := range tc.want {
				if !strings.Contains(got, w) {
					t.Errorf("progress lacks %q:\n%q", w, got)
				}
			}
			for _, w := range tc.notWant {
				if strings.Contains(got, w) {
					t.Errorf("progress has %q:\n%q", w, got)
				}
			}
		})
	}
}
