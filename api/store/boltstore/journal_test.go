package boltstore

import (
	"bytes"
	"encoding/binary"
	"fmt"
	"testing"
)

func journalBody(seq uint64, text string) []byte {
	return append(binary.AppendUvarint(nil, seq), text...)
}

// What the file holds after each kind of interruption or reuse, and what
// reading it gives back.
func TestScanJournal(t *testing.T) {
	var three []byte
	for i := uint64(1); i <= 3; i++ {
		three = frame(three, journalBody(i, fmt.Sprintf("record %d", i)))
	}
	second := len(frame(frame(nil, journalBody(1, "record 1")), journalBody(2, "record 2")))
	damaged := bytes.Clone(three)
	damaged[second+frameHeader+2] ^= 0xff // a byte of the third body
	// Reused from the start: two new records (10, 11) over the three old
	// ones, shorter, so an old frame boundary may follow.
	reused := bytes.Clone(three)
	fresh := frame(frame(nil, journalBody(10, "n")), journalBody(11, "m"))
	copy(reused, fresh)
	for _, tc := range []struct {
		name string
		file []byte
		want []uint64
		end  int
	}{
		{"empty", nil, nil, 0},
		{"zeros (grown, never written)", make([]byte, 4096), nil, 0},
		{"whole records then zeros", append(bytes.Clone(three), make([]byte, 100)...), []uint64{1, 2, 3}, len(three)},
		{"torn last record", three[:len(three)-3], []uint64{1, 2}, second},
		{"torn header", three[:second+5], []uint64{1, 2}, second},
		{"damaged body", damaged, []uint64{1, 2}, second},
		{"reused from the start", reused, []uint64{10, 11}, len(fresh)},
		{"a sequence that does not follow", frame(frame(nil, journalBody(5, "a")), journalBody(7, "b")), []uint64{5}, len(frame(nil, journalBody(5, "a")))},
	} {
		t.Run(tc.name, func(t *testing.T) {
			recs, end := scanJournal(tc.file)
			var got []uint64
			for _, r := range recs {
				got = append(got, r.seq)
			}
			if fmt.Sprint(got) != fmt.Sprint(tc.want) || end != int64(tc.end) {
				t.Errorf("got %v ending at %d, want %v ending at %d", got, end, tc.want, tc.end)
			}
		})
	}
}

// FuzzScanJournal: whatever a file holds, reading it does not fail, gives
// consecutive sequences and ends inside the file; and records framed by
// this build read back whole.
func FuzzScanJournal(f *testing.F) {
	f.Add(frame(frame(nil, journalBody(1, "a")), journalBody(2, "b")), []byte("c"))
	f.Add([]byte{0xff, 0xff, 0xff, 0x7f, 0, 0, 0, 0, 1}, []byte{})
	f.Fuzz(func(t *testing.T, file, body []byte) {
		recs, end := scanJournal(file)
		if end < 0 || end > int64(len(file)) {
			t.Fatalf("end %d outside a file of %d bytes", end, len(file))
		}
		for i := 1; i < len(recs); i++ {
			if recs[i].seq != recs[i-1].seq+1 {
				t.Fatalf("sequences %d then %d", recs[i-1].seq, recs[i].seq)
			}
		}
		var written []byte
		for i := uint64(1); i <= 3; i++ {
			written = frame(written, journalBody(i, string(body)))
		}
		back, end := scanJournal(written)
		if len(back) != 3 || end != int64(len(written)) {
			t.Fatalf("read back %d records ending at %d, want 3 ending at %d", len(back), end, len(written))
		}
		for _, r := range back {
			if !bytes.Equal(r.body, body) {
				t.Fatalf("body %q, want %q", r.body, body)
			}
		}
	})
}
