package engine

import (
	"encoding/binary"
	"encoding/json"
	"errors"
	"fmt"
	"math"
	"strings"

	"github.com/deadspace-fhir/deadspace/api/pipeline"
	"github.com/deadspace-fhir/deadspace/derive"
	"github.com/deadspace-fhir/deadspace/fhir/decode"
	fhirref "github.com/deadspace-fhir/deadspace/fhir/ref"
)

// A stored input's payload is a small binary head with what pairing needs,
// then what explanations need. Every evaluation reads the inputs in its
// span, so the head is read without touching the rest.
//
// Head layout, little endian: version (1 byte, storedVersion), item type
// (1), kind (1), priority (2, signed), effective time in Unix milliseconds
// (8), value (8, IEEE 754), then the reference and the encounter, each as a
// 2-byte length and its bytes.
//
// Version 2 follows the head with the status, the original value, unit,
// system and code, the conversion and the omission, as uvarint-length
// strings and 8-byte floats: about 250 bytes a reading where version 1's
// JSON of the whole decoded item took about 1 KB. What the store keeps
// beside the payload (subject, reference, version, last-updated) is not
// repeated. Version 1 payloads are still read.
//
// Version 3 adds to the head, after the encounter, the readings the
// resource carries besides its own (decode.Item.Also, a temperature on a
// blood gas): a 1-byte count, then per reading its kind (1), priority (2,
// signed) and value (8); they share the head's reference, encounter and
// time. Version 2 payloads are still read, with none.
//
// Version 4 adds each reading's source kind (derive.Reading.Source, one
// byte): the head's own after the encounter, before the count, and each
// other reading's after its value (12 bytes a reading). Earlier payloads
// are still read, with the source the decoder gives such a reading now
// (legacySource).
const storedVersion = 4

var errStoredPayload = errors.New("stored input payload is damaged")

func encodeStored(it decode.Item) ([]byte, error) {
	r := it.Reading
	if len(r.Ref) > math.MaxUint16 || len(r.Encounter) > math.MaxUint16 || len(it.Also) > math.MaxUint8 {
		return nil, fmt.Errorf("engine: reference too long to store")
	}
	// The versioned reference is what the store keeps beside the payload
	// (the logical reference and the version): it is left out, and
	// storedRef puts it back.
	if own := fhirref.Versioned(it.ResourceType+"/"+it.ID, it.VersionID); it.ID != "" && r.Ref == own {
		r.Ref = ""
		if it.Omission.Ref == own {
			it.Omission.Ref = ""
		}
	}
	c, o, om := it.Conversion, it.Original, it.Omission
	b := make([]byte, 0, 64+len(r.Ref)+len(r.Encounter)+len(o.Value)+len(o.Unit)+len(o.System)+len(o.Code)+len(c.FromUnit)+len(c.ToUnit)+len(c.Text)+len(om.Detail)+len(om.Ref))
	b = append(b, storedVersion, byte(it.Type), byte(r.Kind))
	b = binary.LittleEndian.AppendUint16(b, uint16(int16(it.Priority)))
	b = binary.LittleEndian.AppendUint64(b, uint64(r.AtMillis))
	b = binary.LittleEndian.AppendUint64(b, math.Float64bits(r.Value))
	b = binary.LittleEndian.AppendUint16(b, uint16(len(r.Ref)))
	b = append(b, r.Ref...)
	b = binary.LittleEndian.AppendUint16(b, uint16(len(r.Encounter)))
	b = append(b, r.Encounter...)
	b = append(b, byte(r.Source))
	b = append(b, byte(len(it.Also)))
	for _, a := range it.Also {
		b = append(b, byte(a.Kind))
		b = binary.LittleEndian.AppendUint16(b, uint16(a.Priority))
		b = binary.LittleEndian.AppendUint64(b, math.Float64bits(a.Value))
		b = append(b, byte(a.Source))
	}
	for _, s := range []string{it.Status, o.Value, o.Unit, o.System, o.Code, c.FromUnit, c.ToUnit, c.Source, c.Text, string(om.Code), om.Ref, string(om.Reason), om.Detail} {
		b = binary.AppendUvarint(b, uint64(len(s)))
		b = append(b, s...)
	}
	for _, f := range []float64{c.FromValue, c.ToValue, c.Factor} {
		b = binary.LittleEndian.AppendUint64(b, math.Float64bits(f))
	}
	return b, nil
}

// storedInput is what explanations read of a stored input.
type storedInput struct {
	Item decode.Item `json:"item"`
}

// storedHead is what evaluation needs of a stored input.
type storedHead struct {
	Type     decode.ItemType
	Reading  derive.Reading
	Priority int
	// Also are the other readings of the resource, each with its priority
	// in Reading.Priority.
	Also []derive.Reading
}

// appendInputs appends the head's readings to inputs as the pipeline takes
// them: its own, then the others of its resource, each with its priority
// moved out of the reading.
func (h storedHead) appendInputs(inputs []pipeline.Input) []pipeline.Input {
	inputs = append(inputs, pipeline.Input{Reading: h.Reading, Priority: h.Priority})
	for _, a := range h.Also {
		p := a.Priority
		a.Priority = 0
		inputs = append(inputs, pipeline.Input{Reading: a, Priority: int(p)})
	}
	return inputs
}

// decodeHead reads the binary head and returns it with the offset of what
// follows. logical and version are the store's record of the input, which
// give the reference when the payload leaves it out.
func decodeHead(p []byte, logical, version string) (storedHead, int, error) {
	var r headReader
	return r.decode(p, func() string { return fhirref.Versioned(logical, version) })
}

// headLayout is where the parts of a stored input's head lie.
type headLayout struct {
	ref, encounter [2]int // start and end offsets
	source         int    // offset of the own reading's source; 0 before version 4
	also           int    // offset of the first other reading
	nAlso          int
	stride         int // bytes an other reading takes
	end            int // offset of what follows the head
}

// parseHead checks the head's layout and finds its parts, without
// allocating: decodeHead fails exactly when it does.
func parseHead(p []byte) (headLayout, error) {
	if len(p) < 23 || p[0] < 1 || p[0] > storedVersion {
		return headLayout{}, errStoredPayload
	}
	var l headLayout
	off := 21
	for _, part := range []*[2]int{&l.ref, &l.encounter} {
		if len(p) < off+2 {
			return headLayout{}, errStoredPayload
		}
		n := int(binary.LittleEndian.Uint16(p[off : off+2]))
		off += 2
		if len(p) < off+n {
			return headLayout{}, errStoredPayload
		}
		*part = [2]int{off, off + n}
		off += n
	}
	l.stride = 11
	if p[0] >= 4 {
		if len(p) < off+1 {
			return headLayout{}, errStoredPayload
		}
		l.source = off
		l.stride = 12
		off++
	}
	if p[0] >= 3 {
		if len(p) < off+1 {
			return headLayout{}, errStoredPayload
		}
		l.nAlso = int(p[off])
		off++
		if len(p) < off+l.stride*l.nAlso {
			return headLayout{}, errStoredPayload
		}
	}
	l.also = off
	l.end = off + l.stride*l.nAlso
	return l, nil
}

// headKind is the kind of a stored input's own reading.
func headKind(p []byte) derive.Kind { return derive.Kind(p[2]) }

// headItemType is a stored input's item type.
func headItemType(p []byte) decode.ItemType { return decode.ItemType(p[1]) }

// headAtMillis is a stored input's time, which its other readings share.
func headAtMillis(p []byte) int64 { return int64(binary.LittleEndian.Uint64(p[5:13])) }

// alsoKind is the kind of the i-th other reading of a head laid out as l.
func (l headLayout) alsoKind(p []byte, i int) derive.Kind { return derive.Kind(p[l.also+l.stride*i]) }

// headReader decodes stored inputs' heads. Consecutive inputs of one
// encounter share its string.
type headReader struct {
	encounter string
}

// decode is decodeHead; ownRef gives the input's versioned reference when
// the payload leaves it out.
func (hr *headReader) decode(p []byte, ownRef func() string) (storedHead, int, error) {
	l, err := parseHead(p)
	if err != nil {
		return storedHead{}, 0, err
	}
	h := storedHead{Type: headItemType(p), Priority: int(int16(binary.LittleEndian.Uint16(p[3:5])))}
	h.Reading.Kind = headKind(p)
	h.Reading.AtMillis = headAtMillis(p)
	h.Reading.Value = math.Float64frombits(binary.LittleEndian.Uint64(p[13:21]))
	h.Reading.Ref = string(p[l.ref[0]:l.ref[1]])
	if enc := p[l.encounter[0]:l.encounter[1]]; string(enc) == hr.encounter {
		h.Reading.Encounter = hr.encounter
	} else {
		h.Reading.Encounter = string(enc)
		hr.encounter = h.Reading.Encounter
	}
	if h.Reading.Ref == "" {
		h.Reading.Ref = ownRef()
	}
	if l.source > 0 {
		h.Reading.Source = derive.Source(p[l.source])
	} else {
		h.Reading.Source = legacySource(h.Reading.Kind, h.Priority, p, l.end)
	}
	if l.nAlso > 0 {
		h.Also = make([]derive.Reading, 0, l.nAlso)
	}
	for i := range l.nAlso {
		off := l.also + l.stride*i
		a := derive.Reading{Ref: h.Reading.Ref, Encounter: h.Reading.Encounter, AtMillis: h.Reading.AtMillis,
			Kind: derive.Kind(p[off]), Priority: int16(binary.LittleEndian.Uint16(p[off+1 : off+3])),
			Value: math.Float64frombits(binary.LittleEndian.Uint64(p[off+3 : off+11]))}
		if l.stride == 12 {
			a.Source = derive.Source(p[off+11])
		} else {
			a.Source = derive.DefaultSource(a.Kind, a.Priority)
		}
		h.Also = append(h.Also, a)
	}
	return h, l.end, nil
}

// legacySource is the source of a reading stored before payloads kept it
// (version 3 and earlier): what the decoder names the same reading now,
// so a reading stored before an upgrade and one stored after it, and
// replay, agree. A CO2 value converted from a percentage (its original
// unit, which payloads keep from version 2 on) is a converted percentage;
// anything else takes the code table's default for its kind and priority
// (derive.DefaultSource), as a row that names no source does.
func legacySource(k derive.Kind, priority int, p []byte, tail int) derive.Source {
	if (k == derive.KindEtCO2 || k == derive.KindMixedExpiredCO2) && len(p) > 0 && p[0] >= 2 && tail <= len(p) {
		if unit, ok := originalUnit(p[tail:]); ok && strings.HasPrefix(strings.TrimSpace(unit), "%") {
			return derive.SourceConvertedPercent
		}
	}
	return derive.DefaultSource(k, int16(priority))
}

// originalUnit reads the original unit from a version 2 or 3 payload's
// tail: the third of its length-prefixed strings (status, value, unit).
func originalUnit(tail []byte) (string, bool) {
	var s string
	for range 3 {
		n, w := binary.Uvarint(tail)
		if w <= 0 || uint64(len(tail)-w) < n {
			return "", false
		}
		s, tail = string(tail[w:w+int(n)]), tail[w+int(n):]
	}
	return s, true
}

// decodeStored reads a whole stored input, for explanations.
func decodeStored(p []byte, logical, version string) (storedInput, error) {
	h, off, err := decodeHead(p, logical, version)
	if err != nil {
		return storedInput{}, err
	}
	var si storedInput
	if p[0] == 1 {
		if err := json.Unmarshal(p[off:], &si); err != nil {
			return storedInput{}, fmt.Errorf("%w: %w", errStoredPayload, err)
		}
		return si, nil
	}
	rest := p[off:]
	str := func() string {
		n, k := binary.Uvarint(rest)
		if k <= 0 || uint64(len(rest)-k) < n {
			err = errStoredPayload
			return ""
		}
		s := string(rest[k : k+int(n)])
		rest = rest[k+int(n):]
		return s
	}
	it := &si.Item
	it.Type, it.Priority, it.Reading, it.Also = h.Type, h.Priority, h.Reading, h.Also
	it.Ref = h.Reading.Ref
	c, o, om := &it.Conversion, &it.Original, &it.Omission
	it.Status, o.Value, o.Unit, o.System, o.Code = str(), str(), str(), str(), str()
	c.FromUnit, c.ToUnit, c.Source, c.Text = str(), str(), str(), str()
	code, ref, reason, detail := str(), str(), str(), str()
	om.Code, om.Ref, om.Reason, om.Detail = derive.Code(code), ref, derive.Reason(reason), detail
	if om.Ref == "" && om.Reason != "" {
		om.Ref = h.Reading.Ref
	}
	if err != nil || len(rest) != 24 {
		return storedInput{}, errStoredPayload
	}
	c.FromValue = math.Float64frombits(binary.LittleEndian.Uint64(rest[0:8]))
	c.ToValue = math.Float64frombits(binary.LittleEndian.Uint64(rest[8:16]))
	c.Factor = math.Float64frombits(binary.LittleEndian.Uint64(rest[16:24]))
	return si, nil
}
