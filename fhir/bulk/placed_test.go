package bulk

import (
	"testing"
	"time"
)

// TestListedPlaced: a deletion keeps the time its entry gives; one without
// goes just before the latest version the input carries, or at the
// export's transactionTime, or when it is applied.
func TestListedPlaced(t *testing.T) {
	t0 := time.Date(2026, 3, 16, 6, 0, 0, 0, time.UTC)
	txTime := t0.Add(6 * time.Hour)
	type carried struct {
		logical string
		at      time.Time
	}
	tests := []struct {
		name    string
		del     Deletion
		carried []carried
		txTime  time.Time
		want    Placement
		wantAt  time.Time
	}{
		{name: "the entry's time, whatever the input carries", del: Deletion{Type: "Observation", ID: "g1", At: t0},
			carried: []carried{{"Observation/g1", t0.Add(time.Hour)}}, want: AtEntry, wantAt: t0},
		{name: "no time, carried twice: before the latest version", del: Deletion{Type: "Observation", ID: "g1"},
			carried: []carried{{"Observation/g1", t0.Add(2 * time.Hour)}, {"Observation/g1", t0}}, txTime: txTime,
			want: BeforeCarried, wantAt: t0.Add(2*time.Hour - time.Nanosecond)},
		{name: "no time, carried without meta.lastUpdated: it stands", del: Deletion{Type: "Observation", ID: "g1"},
			carried: []carried{{"Observation/g1", time.Time{}}}, want: CarriedStands},
		{name: "no time, another resource carried: the export's transactionTime", del: Deletion{Type: "Observation", ID: "g1"},
			carried: []carried{{"Observation/g2", t0}}, txTime: txTime, want: AtTransactionTime, wantAt: txTime},
		{name: "no time, local files that do not carry it: when applied", del: Deletion{Type: "Observation", ID: "g1"},
			want: WhenApplied},
	}
	for _, tc := range tests {
		t.Run(tc.name, func(t *testing.T) {
			l := NewListed()
			l.Add(tc.del)
			for _, c := range tc.carried {
				l.Carries(c.logical, c.at)
			}
			got := l.Placed(tc.txTime)
			if len(got) != 1 {
				t.Fatalf("placed %d deletions, want 1", len(got))
			}
			if got[0].Placement != tc.want || !got[0].At.Equal(tc.wantAt) {
				t.Errorf("placed %v at %v, want %v at %v", got[0].Placement, got[0].At, tc.want, tc.wantAt)
			}
			if got[0].Ref() != tc.del.Ref() {
				t.Errorf("ref %q, want %q", got[0].Ref(), tc.del.Ref())
			}
		})
	}
}
