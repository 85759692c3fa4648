package boltstore

import (
	"bytes"
	"encoding/binary"
	"fmt"

	bolt "go.etcd.io/bbolt"
)

// places is the input_place record of one logical reference (schema 5):
// every subject that holds a row of the input, each with the time key
// that finds its row, and whether the first of them is the owner, the
// subject of the latest stored version.
//
// It replaces input_at (subject 0 logical → t) and input_owner (logical →
// subject) of schema 4. An ingest read both and wrote both, and the two
// records sat on pages of their own, one keyed by patient and one by
// reference; every page a commit writes lands at its own place in the
// file, and on a virtual disk each one lengthens the sync that a webhook
// answer waits for. One record answers the version check and finds the
// row, and costs one page.
//
// A subject holds a row of an input at most once, so a list is enough:
// there are two places only while an input re-filed to another patient
// keeps its withdrawal under the first.
type places struct {
	owned bool
	list  []place
}

type place struct {
	subject string
	t       []byte // timeKeyLen bytes: where the row is in input_rows
}

// Record layout: one byte of flags (bit 0: the first place is the owner),
// then each place as uvarint(len subject) ⧺ subject ⧺ t.
const placeOwned = 1

func decodePlaces(v []byte) (places, error) {
	var p places
	if len(v) < 1 || v[0]&^placeOwned != 0 {
		return places{}, fmt.Errorf("%w: input place record of %d bytes", ErrCorrupt, len(v))
	}
	p.owned = v[0]&placeOwned != 0
	v = v[1:]
	for len(v) > 0 {
		n, k := binary.Uvarint(v)
		if k <= 0 || n == 0 || uint64(len(v)-k) < n+timeKeyLen {
			return places{}, fmt.Errorf("%w: truncated input place", ErrCorrupt)
		}
		v = v[k:]
		subject := string(v[:n])
		if bytes.IndexByte(v[:n], sep) >= 0 || p.timeOf(subject) != nil {
			return places{}, fmt.Errorf("%w: input place with a bad or repeated subject", ErrCorrupt)
		}
		p.list = append(p.list, place{subject: subject, t: bytes.Clone(v[n : n+timeKeyLen])})
		v = v[n+timeKeyLen:]
	}
	if p.owned && len(p.list) == 0 {
		return places{}, fmt.Errorf("%w: input place record with an owner and no place", ErrCorrupt)
	}
	return p, nil
}

func (p places) encode() []byte {
	n := 1
	for _, pl := range p.list {
		n += binary.MaxVarintLen64 + len(pl.subject) + timeKeyLen
	}
	b := make([]byte, 1, n)
	if p.owned {
		b[0] = placeOwned
	}
	for _, pl := range p.list {
		b = binary.AppendUvarint(b, uint64(len(pl.subject)))
		b = append(b, pl.subject...)
		b = append(b, pl.t...)
	}
	return b
}

// owner is the subject of the latest stored version, "" when unknown (no
// version stored, or the owner's copy pruned).
func (p *places) owner() string {
	if !p.owned {
		return ""
	}
	return p.list[0].subject
}

// timeOf returns the time key of subject's row, nil when it has none.
func (p *places) timeOf(subject string) []byte {
	for _, pl := range p.list {
		if pl.subject == subject {
			return pl.t
		}
	}
	return nil
}

// set records that subject's row is at t.
func (p *places) set(subject string, t []byte) {
	for i := range p.list {
		if p.list[i].subject == subject {
			p.list[i].t = t
			return
		}
	}
	p.list = append(p.list, place{subject: subject, t: t})
}

// own makes subject, which must hold a place, the owner.
func (p *places) own(subject string) {
	for i, pl := range p.list {
		if pl.subject == subject {
			copy(p.list[1:i+1], p.list[:i])
			p.list[0] = pl
			p.owned = true
			return
		}
	}
}

// remove forgets subject's row; the owner's leaves the input without one.
func (p *places) remove(subject string) {
	for i, pl := range p.list {
		if pl.subject == subject {
			if i == 0 {
				p.owned = false
			}
			p.list = append(p.list[:i], p.list[i+1:]...)
			return
		}
	}
}

func getPlaces(tx *bolt.Tx, logical []byte) (places, error) {
	v := tx.Bucket(bInputPlace).Get(logical)
	if v == nil {
		return places{}, nil
	}
	return decodePlaces(v)
}

// putPlaces writes the record, or deletes it when no place is left.
func putPlaces(tx *bolt.Tx, logical []byte, p places) error {
	b := tx.Bucket(bInputPlace)
	if len(p.list) == 0 {
		return b.Delete(logical)
	}
	return b.Put(logical, p.encode())
}
