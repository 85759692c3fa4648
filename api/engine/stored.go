package engine

import (
	"encoding/binary"
	"encoding/json"
	"errors"
	"fmt"
	"math"

	"github.com/deadspace-fhir/deadspace/derive"
	"github.com/deadspace-fhir/deadspace/fhir/decode"
)

// A stored input's payload is a small binary head with what pairing needs,
// then the whole decoded item as JSON for explanations. Every evaluation
// reads all of a patient's inputs, and decoding JSON for each of hours of
// minute readings was most of the service's CPU; the head is read without
// touching the JSON.
//
// Head layout, little endian: version (1 byte, storedVersion), item type
// (1), kind (1), priority (2, signed), effective time in Unix milliseconds
// (8), value (8, IEEE 754), then the reference and the encounter, each as a
// 2-byte length and its bytes.
const storedVersion = 1

var errStoredPayload = errors.New("stored input payload is damaged")

func encodeStored(it decode.Item) ([]byte, error) {
	r := it.Reading
	if len(r.Ref) > math.MaxUint16 || len(r.Encounter) > math.MaxUint16 {
		return nil, fmt.Errorf("engine: reference too long to store")
	}
	body, err := json.Marshal(storedInput{Item: it})
	if err != nil {
		return nil, fmt.Errorf("engine: encode input: %w", err)
	}
	b := make([]byte, 0, 25+len(r.Ref)+len(r.Encounter)+len(body))
	b = append(b, storedVersion, byte(it.Type), byte(r.Kind))
	b = binary.LittleEndian.AppendUint16(b, uint16(int16(it.Priority)))
	b = binary.LittleEndian.AppendUint64(b, uint64(r.AtMillis))
	b = binary.LittleEndian.AppendUint64(b, math.Float64bits(r.Value))
	b = binary.LittleEndian.AppendUint16(b, uint16(len(r.Ref)))
	b = append(b, r.Ref...)
	b = binary.LittleEndian.AppendUint16(b, uint16(len(r.Encounter)))
	b = append(b, r.Encounter...)
	return append(b, body...), nil
}

// storedHead is what evaluation needs of a stored input.
type storedHead struct {
	Type     decode.ItemType
	Reading  derive.Reading
	Priority int
}

// decodeHead reads the binary head and returns it with the offset of the
// JSON that follows.
func decodeHead(p []byte) (storedHead, int, error) {
	if len(p) < 23 || p[0] != storedVersion {
		return storedHead{}, 0, errStoredPayload
	}
	h := storedHead{Type: decode.ItemType(p[1]), Priority: int(int16(binary.LittleEndian.Uint16(p[3:5])))}
	h.Reading.Kind = derive.Kind(p[2])
	h.Reading.AtMillis = int64(binary.LittleEndian.Uint64(p[5:13]))
	h.Reading.Value = math.Float64frombits(binary.LittleEndian.Uint64(p[13:21]))
	off := 21
	str := func() (string, bool) {
		if len(p) < off+2 {
			return "", false
		}
		n := int(binary.LittleEndian.Uint16(p[off : off+2]))
		off += 2
		if len(p) < off+n {
			return "", false
		}
		s := string(p[off : off+n])
		off += n
		return s, true
	}
	var ok bool
	if h.Reading.Ref, ok = str(); !ok {
		return storedHead{}, 0, errStoredPayload
	}
	if h.Reading.Encounter, ok = str(); !ok {
		return storedHead{}, 0, errStoredPayload
	}
	return h, off, nil
}

// decodeStored reads a whole stored input, for explanations.
func decodeStored(p []byte) (storedInput, error) {
	_, off, err := decodeHead(p)
	if err != nil {
		return storedInput{}, err
	}
	var si storedInput
	if err := json.Unmarshal(p[off:], &si); err != nil {
		return storedInput{}, fmt.Errorf("%w: %w", errStoredPayload, err)
	}
	return si, nil
}
