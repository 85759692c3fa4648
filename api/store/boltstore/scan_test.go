package boltstore_test

import (
	"bytes"
	"context"
	"errors"
	"fmt"
	"testing"
	"time"

	"github.com/deadspace-fhir/deadspace/api/store"
)

// TestScanInputsFromAgreesWithInputsFrom: the scan an evaluation reads
// shows the rows InputsFrom returns, in its order, with the same logical
// references, versions and payloads, for every start (none, before,
// inside and after the rows), for a subject that another one's name
// starts with; and an error from the callback stops the scan and comes
// back.
func TestScanInputsFromAgreesWithInputsFrom(t *testing.T) {
	t.Parallel()
	s, _ := openTemp(t)
	ctx := context.Background()
	base := time.Date(2024, 3, 14, 2, 0, 0, 0, time.UTC)
	var ins []store.Input
	for _, subject := range []string{"Patient/a", "Patient/ab"} {
		for i := range 12 {
			at := base.Add(time.Duration(i/2) * time.Minute) // two inputs an instant
			ins = append(ins, store.Input{Subject: subject, Logical: fmt.Sprintf("Observation/%s-%02d", subject[8:], 11-i), VersionID: fmt.Sprint(i % 3),
				LastUpdated: at.In(time.FixedZone("", 3600)), EffectiveAt: at, Payload: []byte(fmt.Sprintf("payload %s %d", subject, i))})
		}
	}
	ins = append(ins, store.Input{Subject: "Patient/a", Logical: "Observation/empty", VersionID: "1", LastUpdated: base, EffectiveAt: base.Add(time.Minute)})
	if _, err := s.PutInputs(ctx, ins, base); err != nil {
		t.Fatal(err)
	}
	for _, tc := range []struct {
		name string
		from time.Time
	}{
		{"every row", time.Time{}},
		{"before the rows", base.Add(-time.Hour)},
		{"inside the rows", base.Add(2 * time.Minute)},
		{"between two instants", base.Add(2*time.Minute + time.Second)},
		{"after the rows", base.Add(time.Hour)},
	} {
		t.Run(tc.name, func(t *testing.T) {
			for _, subject := range []string{"Patient/a", "Patient/ab"} {
				want, err := s.InputsFrom(ctx, subject, tc.from)
				if tc.from.IsZero() {
					want, err = s.Inputs(ctx, subject)
				}
				if err != nil {
					t.Fatal(err)
				}
				var got []store.InputRow
				err = s.ScanInputsFrom(ctx, subject, tc.from, func(r store.InputRow) error {
					got = append(got, store.InputRow{Logical: bytes.Clone(r.Logical), VersionID: bytes.Clone(r.VersionID), Payload: bytes.Clone(r.Payload)})
					return nil
				})
				if err != nil {
					t.Fatal(err)
				}
				if len(got) != len(want) {
					t.Fatalf("%s: scan showed %d rows, InputsFrom returned %d", subject, len(got), len(want))
				}
				for i, w := range want {
					g := got[i]
					if string(g.Logical) != w.Logical || string(g.VersionID) != w.VersionID || !bytes.Equal(g.Payload, w.Payload) {
						t.Errorf("%s row %d: scan %s %s %q, InputsFrom %s %s %q", subject, i, g.Logical, g.VersionID, g.Payload, w.Logical, w.VersionID, w.Payload)
					}
				}
			}
		})
	}
	stop := errors.New("stop")
	n := 0
	err := s.ScanInputsFrom(ctx, "Patient/a", time.Time{}, func(store.InputRow) error {
		n++
		if n == 3 {
			return stop
		}
		return nil
	})
	if !errors.Is(err, stop) || n != 3 {
		t.Errorf("a callback's error: scan returned %v after %d rows, want stop after 3", err, n)
	}
}
