package boltstore

import (
	"encoding/binary"
	"errors"
	"fmt"
	"hash/crc32"
	"io"
	"os"
)

// journal is the intake's file: records appended one after another, each
// framed as
//
//	length (4 bytes, little-endian) ⧺ CRC-32C of the body (4 bytes) ⧺ body
//
// in a file grown ahead of the records in steps of zeros, so that writing
// a record changes no file metadata and one fdatasync makes it durable
// (a bbolt commit takes two, and a page for every bucket it touches).
//
// A body starts with the record's sequence number. Reading stops at the
// first frame that is not a whole, intact record following the one before
// it: zeros (never written), a torn or damaged frame (the checksum), or a
// sequence that does not follow (a record left from before the file was
// reused from its start, see reuse).
type journal struct {
	f      *os.File
	off    int64 // where the next record goes
	size   int64 // the file's length: zeros from off on
	noSync bool
}

const (
	frameHeader = 8
	// journalGrowth is how much the file grows at a time.
	journalGrowth = 4 << 20
	// maxRecord bounds one record: a frame claiming more is damage.
	maxRecord = 256 << 20
)

var castagnoli = crc32.MakeTable(crc32.Castagnoli)

// frame appends body framed as a record to dst.
func frame(dst, body []byte) []byte {
	dst = binary.LittleEndian.AppendUint32(dst, uint32(len(body)))
	dst = binary.LittleEndian.AppendUint32(dst, crc32.Checksum(body, castagnoli))
	return append(dst, body...)
}

// scanned is one record read back: its sequence and the rest of its body
// (a slice of the buffer scanJournal was given).
type scanned struct {
	seq  uint64
	body []byte
}

// scanJournal reads the records of b from its start and returns them with
// the offset just past the last one, where the next record goes.
func scanJournal(b []byte) ([]scanned, int64) {
	var out []scanned
	off := 0
	for len(b)-off >= frameHeader {
		n := binary.LittleEndian.Uint32(b[off:])
		sum := binary.LittleEndian.Uint32(b[off+4:])
		if n == 0 || n > maxRecord || int(n) > len(b)-off-frameHeader {
			break
		}
		body := b[off+frameHeader : off+frameHeader+int(n)]
		if crc32.Checksum(body, castagnoli) != sum {
			break
		}
		seq, k := binary.Uvarint(body)
		if k <= 0 || seq == 0 || (len(out) > 0 && seq != out[len(out)-1].seq+1) {
			break
		}
		out = append(out, scanned{seq: seq, body: body[k:]})
		off += frameHeader + int(n)
	}
	return out, int64(off)
}

// openJournal opens or creates the file and reads its records.
func openJournal(path string, noSync bool) (*journal, []scanned, error) {
	f, err := os.OpenFile(path, os.O_RDWR|os.O_CREATE, 0o600)
	if err != nil {
		return nil, nil, err
	}
	b, err := io.ReadAll(f)
	if err != nil {
		_ = f.Close()
		return nil, nil, fmt.Errorf("read %s: %w", path, err)
	}
	recs, end := scanJournal(b)
	return &journal{f: f, off: end, size: int64(len(b)), noSync: noSync}, recs, nil
}

// write appends framed records and returns once they are durable.
func (j *journal) write(b []byte) error {
	if need := j.off + int64(len(b)); need > j.size {
		size := j.size + max(journalGrowth, need-j.size)
		if err := j.f.Truncate(size); err != nil {
			return fmt.Errorf("grow the intake: %w", err)
		}
		// Zeros written, not a hole: a hole's blocks are allocated by the
		// first write into them, which is metadata fdatasync must flush.
		zeros := make([]byte, size-j.size)
		if _, err := j.f.WriteAt(zeros, j.size); err != nil {
			return fmt.Errorf("grow the intake: %w", err)
		}
		if !j.noSync {
			if err := j.f.Sync(); err != nil {
				return fmt.Errorf("grow the intake: %w", err)
			}
		}
		j.size = size
	}
	if _, err := j.f.WriteAt(b, j.off); err != nil {
		return fmt.Errorf("write the intake: %w", err)
	}
	if !j.noSync {
		if err := datasync(j.f); err != nil {
			return fmt.Errorf("sync the intake: %w", err)
		}
	}
	j.off += int64(len(b))
	return nil
}

// reuse starts the file again from its beginning once every record in it
// is applied. The old records stay until overwritten; reading stops at
// the first of them that follows a new one, because its sequence is
// lower, and those read before any new one are already applied.
func (j *journal) reuse() { j.off = 0 }

func (j *journal) close() error {
	if j.f == nil {
		return nil
	}
	err := j.f.Close()
	j.f = nil
	if errors.Is(err, os.ErrClosed) {
		return nil
	}
	return err
}
