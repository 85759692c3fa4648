package boltstore

import (
	"bytes"
	"encoding/binary"
	"errors"
	"fmt"
	"time"

	"github.com/deadspace-fhir/deadspace/api/store"
)

// Records are encoded by hand rather than with encoding/json so that the
// opaque payloads stay raw bytes (JSON would base64 them, a third more on
// disk for every stored reading) and so that decoding a patient's inputs
// does not go through reflection. The layout is fixed by schemaVersion: a
// change to any layout below needs a new schema version and a migration.
//
// Fields are written in order, strings and byte strings with a uvarint
// length, integers as (u)varints, times as described at putTime. The last
// byte string of a record (the payload or body) has no length: it is the
// rest of the value, so it can be returned without another copy of its
// size.

// errTruncated reports a record shorter than its fields say. It means the
// file holds data this build did not write; it is wrapped into ErrCorrupt.
var errTruncated = errors.New("record truncated")

type encoder struct{ b []byte }

func (e *encoder) uvarint(v uint64) { e.b = binary.AppendUvarint(e.b, v) }
func (e *encoder) varint(v int64)   { e.b = binary.AppendVarint(e.b, v) }

func (e *encoder) str(s string) {
	e.uvarint(uint64(len(s)))
	e.b = append(e.b, s...)
}

func (e *encoder) strs(ss []string) {
	e.uvarint(uint64(len(ss)))
	for _, s := range ss {
		e.str(s)
	}
}

// rest appends the final, unprefixed byte string of a record.
func (e *encoder) rest(b []byte) { e.b = append(e.b, b...) }

// Time zone kinds. The instant is what the store's rules use; the offset
// is kept only so that a value reads back as it was written. Zone names
// are not kept (JSON would not keep them either).
const (
	timeZero  = 0 // time.Time{}: keeps IsZero true after a round trip
	timeUTC   = 1
	timeFixed = 2 // followed by the offset east of UTC, in seconds
)

func (e *encoder) time(t time.Time) {
	if t.IsZero() {
		e.b = append(e.b, timeZero)
		return
	}
	_, off := t.Zone()
	if off == 0 {
		e.b = append(e.b, timeUTC)
	} else {
		e.b = append(e.b, timeFixed)
		e.varint(int64(off))
	}
	e.varint(t.Unix())
	e.uvarint(uint64(t.Nanosecond()))
}

// decoder reads what encoder wrote. Its error is sticky: after the first
// short field every later field reads as zero, and err says why.
type decoder struct {
	b   []byte
	err error
}

func (d *decoder) fail() {
	if d.err == nil {
		d.err = errTruncated
	}
	d.b = nil
}

func (d *decoder) uvarint() uint64 {
	v, n := binary.Uvarint(d.b)
	if n <= 0 {
		d.fail()
		return 0
	}
	d.b = d.b[n:]
	return v
}

func (d *decoder) varint() int64 {
	v, n := binary.Varint(d.b)
	if n <= 0 {
		d.fail()
		return 0
	}
	d.b = d.b[n:]
	return v
}

func (d *decoder) bytes() []byte {
	n := d.uvarint()
	if d.err != nil {
		return nil
	}
	if n > uint64(len(d.b)) {
		d.fail()
		return nil
	}
	v := d.b[:n:n]
	d.b = d.b[n:]
	return v
}

func (d *decoder) str() string { return string(d.bytes()) }

func (d *decoder) strs() []string {
	n := d.uvarint()
	if d.err != nil || n == 0 {
		return nil
	}
	// Every string takes at least one byte, so a count beyond the bytes
	// left is damage, not a reason to allocate.
	if n > uint64(len(d.b)) {
		d.fail()
		return nil
	}
	ss := make([]string, 0, n)
	for range n {
		ss = append(ss, d.str())
	}
	return ss
}

// rest returns a copy of the remaining bytes: values read from bbolt are
// only valid inside their transaction.
func (d *decoder) rest() []byte {
	if d.err != nil || len(d.b) == 0 {
		return nil
	}
	v := append([]byte(nil), d.b...)
	d.b = nil
	return v
}

func (d *decoder) time() time.Time {
	if len(d.b) == 0 {
		d.fail()
		return time.Time{}
	}
	kind := d.b[0]
	d.b = d.b[1:]
	var off int64
	switch kind {
	case timeZero:
		return time.Time{}
	case timeUTC:
	case timeFixed:
		off = d.varint()
		// Offsets beyond a day are not real zones; time.FixedZone
		// would accept them, but they mean damage.
		if off < -86400 || off > 86400 {
			d.fail()
		}
	default:
		d.fail()
	}
	sec := d.varint()
	nsec := d.uvarint()
	if d.err != nil {
		return time.Time{}
	}
	if nsec >= 1e9 {
		d.fail()
		return time.Time{}
	}
	t := time.Unix(sec, int64(nsec))
	if kind == timeUTC {
		return t.UTC()
	}
	return t.In(time.FixedZone("", int(off)))
}

// skipTime passes over a time as time reads it, failing where time fails,
// without making a time.Time (a fixed zone would be allocated).
func (d *decoder) skipTime() {
	if len(d.b) == 0 {
		d.fail()
		return
	}
	kind := d.b[0]
	d.b = d.b[1:]
	switch kind {
	case timeZero:
		return
	case timeUTC:
	case timeFixed:
		if off := d.varint(); off < -86400 || off > 86400 {
			d.fail()
		}
	default:
		d.fail()
	}
	d.varint()
	if nsec := d.uvarint(); d.err == nil && nsec >= 1e9 {
		d.fail()
	}
}

func (d *decoder) done(what string) error {
	if d.err != nil {
		return fmt.Errorf("%s: %w: %w", what, ErrCorrupt, d.err)
	}
	return nil
}

// encodeInput leaves out Subject and Logical, which are in the key.
func encodeInput(in store.Input) []byte {
	e := encoder{b: make([]byte, 0, 32+len(in.VersionID)+len(in.Payload))}
	e.str(in.VersionID)
	e.time(in.LastUpdated)
	e.time(in.EffectiveAt)
	e.rest(in.Payload)
	return e.b
}

// splitInput reads an input record without copying: version and payload
// are slices of v, valid while v is (inside its transaction).
func splitInput(v []byte) (version []byte, lastUpdated, effectiveAt time.Time, payload []byte, err error) {
	d := decoder{b: v}
	version = d.bytes()
	lastUpdated = d.time()
	effectiveAt = d.time()
	return version, lastUpdated, effectiveAt, d.b, d.done("input")
}

// splitInputPayload is splitInput without decoding the times (they are
// checked as splitInput checks them).
func splitInputPayload(v []byte) (version, payload []byte, err error) {
	d := decoder{b: v}
	version = d.bytes()
	d.skipTime()
	d.skipTime()
	return version, d.b, d.done("input")
}

// decodeInputHead reads only what the version rule and the retention
// index need, without copying the payload.
func decodeInputHead(v []byte) (versionID string, lastUpdated, effectiveAt time.Time, err error) {
	version, lastUpdated, effectiveAt, _, err := splitInput(v)
	return string(version), lastUpdated, effectiveAt, err
}

func decodeInput(subject, logical string, v []byte) (store.Input, error) {
	version, lastUpdated, effectiveAt, payload, err := splitInput(v)
	in := store.Input{Subject: subject, Logical: logical, VersionID: string(version), LastUpdated: lastUpdated, EffectiveAt: effectiveAt}
	if len(payload) > 0 {
		in.Payload = bytes.Clone(payload)
	}
	return in, err
}

func encodePatient(p store.Patient) []byte {
	e := encoder{b: make([]byte, 0, 32+len(p.VersionID)+len(p.Payload))}
	e.str(p.VersionID)
	e.time(p.LastUpdated)
	e.time(p.FetchedAt)
	e.rest(p.Payload)
	return e.b
}

func decodePatient(subject string, v []byte) (store.Patient, error) {
	d := decoder{b: v}
	p := store.Patient{Subject: subject}
	p.VersionID = d.str()
	p.LastUpdated = d.time()
	p.FetchedAt = d.time()
	p.Payload = d.rest()
	return p, d.done("patient")
}

func encodeDirty(dt store.Dirty) []byte {
	var e encoder
	e.time(dt.Since)
	e.uvarint(dt.Generation)
	e.time(dt.From)
	urgent := uint64(0)
	if dt.Urgent {
		urgent = 1
	}
	e.uvarint(urgent)
	e.time(dt.Until)
	return e.b
}

func decodeDirty(subject string, v []byte) (store.Dirty, error) {
	d := decoder{b: v}
	dt := store.Dirty{Subject: subject}
	dt.Since = d.time()
	dt.Generation = d.uvarint()
	if len(d.b) > 0 {
		// Marks written before schema 3 end here: From stays zero, the
		// whole patient.
		dt.From = d.time()
		dt.Urgent = d.uvarint() == 1
	}
	if len(d.b) > 0 {
		// Marks written before schema 6 end here: Until stays zero, no
		// end.
		dt.Until = d.time()
	}
	return dt, d.done("dirty mark")
}

// Entry: the series is the key.
func encodeEntry(en store.Entry) []byte {
	e := encoder{b: make([]byte, 0, 64+len(en.Key)+len(en.Payload))}
	e.str(en.Subject)
	e.str(en.Key)
	e.str(en.Status)
	e.str(en.ServerID)
	e.str(en.ServerVersion)
	e.strs(en.Revisions)
	e.time(en.EffectiveAt)
	e.time(en.UpdatedAt)
	e.rest(en.Payload)
	return e.b
}

func decodeEntry(series string, v []byte) (store.Entry, error) {
	d := decoder{b: v}
	en := store.Entry{Series: series}
	en.Subject = d.str()
	en.Key = d.str()
	en.Status = d.str()
	en.ServerID = d.str()
	en.ServerVersion = d.str()
	en.Revisions = d.strs()
	en.EffectiveAt = d.time()
	en.UpdatedAt = d.time()
	en.Payload = d.rest()
	return en, d.done("ledger entry")
}

// Write: the id is the key. NotBefore comes first so that DueWrites can
// skip writes that are not due without decoding their bodies.
func encodeWrite(w store.Write) []byte {
	e := encoder{b: make([]byte, 0, 64+len(w.Body))}
	e.time(w.NotBefore)
	e.time(w.CreatedAt)
	e.uvarint(uint64(max(w.Attempts, 0)))
	e.str(w.Subject)
	e.str(w.LastError)
	e.strs(w.Series)
	e.rest(w.Body)
	return e.b
}

func decodeWriteNotBefore(v []byte) (time.Time, error) {
	d := decoder{b: v}
	t := d.time()
	return t, d.done("outbox write")
}

func decodeWrite(id uint64, v []byte) (store.Write, error) {
	d := decoder{b: v}
	w := store.Write{ID: id}
	w.NotBefore = d.time()
	w.CreatedAt = d.time()
	w.Attempts = int(min(d.uvarint(), 1<<31-1))
	w.Subject = d.str()
	w.LastError = d.str()
	w.Series = d.strs()
	w.Body = d.rest()
	return w, d.done("outbox write")
}

// DeadLetter: keyed by burial sequence; the write's own id is inside.
func encodeDead(dl store.DeadLetter) []byte {
	var e encoder
	e.str(dl.Reason)
	e.time(dl.At)
	e.uvarint(dl.ID)
	e.rest(encodeWrite(dl.Write))
	return e.b
}

func decodeDead(v []byte) (store.DeadLetter, error) {
	d := decoder{b: v}
	var dl store.DeadLetter
	dl.Reason = d.str()
	dl.At = d.time()
	id := d.uvarint()
	if err := d.done("dead letter"); err != nil {
		return dl, err
	}
	w, err := decodeWrite(id, d.b)
	if err != nil {
		return dl, err
	}
	dl.Write = w
	return dl, nil
}

// Event: the sequence is the key.
func encodeEvent(ev store.Event) []byte {
	var e encoder
	e.str(ev.Series)
	e.str(ev.Subject)
	e.str(ev.Key)
	e.str(ev.Status)
	e.time(ev.At)
	return e.b
}

func decodeEvent(seq uint64, v []byte) (store.Event, error) {
	d := decoder{b: v}
	ev := store.Event{Seq: seq}
	ev.Series = d.str()
	ev.Subject = d.str()
	ev.Key = d.str()
	ev.Status = d.str()
	ev.At = d.time()
	return ev, d.done("feed event")
}

// Keys.

// u64 is the big-endian form of a sequence number, so that byte order is
// numeric order.
func u64(v uint64) []byte { return binary.BigEndian.AppendUint64(nil, v) }

// timeKey is a 12-byte encoding of an instant whose byte order is time
// order: seconds with the sign bit flipped, then nanoseconds. Unlike
// UnixNano it covers the zero time and every year a record can carry.
func appendTimeKey(b []byte, t time.Time) []byte {
	b = binary.BigEndian.AppendUint64(b, uint64(t.Unix())^(1<<63))
	return binary.BigEndian.AppendUint32(b, uint32(t.Nanosecond()))
}

const timeKeyLen = 12

func parseTimeKey(b []byte) time.Time {
	sec := int64(binary.BigEndian.Uint64(b) ^ (1 << 63))
	return time.Unix(sec, int64(binary.BigEndian.Uint32(b[8:])))
}

// sep ends a subject inside a composite key. Subjects are references
// ("Patient/x") and cannot contain it, so subject+sep is a prefix that
// never matches another subject that merely starts the same way.
const sep = 0x00

func subjectPrefix(subject string) []byte {
	b := make([]byte, 0, len(subject)+1+timeKeyLen+32)
	b = append(b, subject...)
	return append(b, sep)
}

func subjectKey(subject, rest string) []byte {
	return append(subjectPrefix(subject), rest...)
}

// rowKey is the key of an input's row, subject 0 t(EffectiveAt) logical,
// from the subject's prefix (subject 0) and the time key.
func rowKey(prefix, t, logical []byte) []byte {
	b := make([]byte, 0, len(prefix)+len(t)+len(logical))
	return append(append(append(b, prefix...), t...), logical...)
}
