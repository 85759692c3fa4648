package encode

import (
	"bytes"
	"encoding/json"
	"fmt"
	"io"
)

// MarshalNDJSON writes each resource as one JSON object on its own line,
// the FHIR bulk data format. It stops at the first resource that does not
// marshal to a JSON object.
func MarshalNDJSON(w io.Writer, resources ...any) error {
	var buf bytes.Buffer
	for i, r := range resources {
		b, err := json.Marshal(r)
		if err != nil {
			return fmt.Errorf("ndjson: resource %d: %w", i, err)
		}
		if len(b) == 0 || b[0] != '{' {
			return fmt.Errorf("ndjson: resource %d (%T) is not a JSON object", i, r)
		}
		// json.Marshal never writes a raw line break, so one line is one
		// resource.
		buf.Write(b)
		buf.WriteByte('\n')
	}
	if _, err := w.Write(buf.Bytes()); err != nil {
		return fmt.Errorf("ndjson: write: %w", err)
	}
	return nil
}
