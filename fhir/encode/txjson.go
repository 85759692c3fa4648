package encode

import (
	"encoding/json"
	"strconv"
)

// The outbox writer encodes every derived value it sends, so these spare
// encoding/json two passes it would make over text that is already JSON.
//
// json.Marshal of a value with a MarshalJSON method (every samply
// resource) calls it and then compacts and HTML-escapes its output, which
// for the samply resources is itself json.Marshal's output, already
// compact and escaped: the pass changes nothing. Likewise a
// json.RawMessage inside a transaction entry is compacted once more.
// marshalResource and appendTransaction give the same bytes without those
// passes; TestTransactionBytesAsJSONMarshal compares them with
// encoding/json's.

// viaEncodingJSON makes marshalResource and Plan.Transaction use
// encoding/json as before, so benchmarks can compare the two in one run.
var viaEncodingJSON = false

// marshalResource returns r's JSON as json.Marshal(r) does, without the
// pass over MarshalJSON's output.
func marshalResource(r json.Marshaler) ([]byte, error) {
	if viaEncodingJSON {
		return json.Marshal(r)
	}
	return r.MarshalJSON()
}

// appendTransaction appends the transaction Bundle of entries, as
// json.Marshal writes the struct {resourceType, type, entry}, whose
// resources are JSON from marshalResource.
func appendTransaction(b []byte, entries []txEntry) ([]byte, error) {
	if viaEncodingJSON {
		tx, err := json.Marshal(struct {
			ResourceType string    `json:"resourceType"`
			Type         string    `json:"type"`
			Entry        []txEntry `json:"entry"`
		}{"Bundle", "transaction", entries})
		return append(b, tx...), err
	}
	n := 64
	for _, en := range entries {
		n += len(en.FullURL) + len(en.Resource) + len(en.Request.URL) + len(en.Request.IfNoneExist) + len(en.Request.IfMatch) + 96
	}
	if b == nil {
		b = make([]byte, 0, n)
	}
	b = append(b, `{"resourceType":"Bundle","type":"transaction","entry":`...)
	if entries == nil {
		return append(b, "null}"...), nil
	}
	b = append(b, '[')
	for i, en := range entries {
		if i > 0 {
			b = append(b, ',')
		}
		b = append(b, '{')
		if en.FullURL != "" {
			b = append(b, `"fullUrl":`...)
			b = appendString(b, en.FullURL)
			b = append(b, ',')
		}
		b = append(b, `"resource":`...)
		if en.Resource == nil {
			b = append(b, "null"...)
		} else {
			b = append(b, en.Resource...)
		}
		b = append(b, `,"request":{"method":`...)
		b = appendString(b, en.Request.Method)
		b = append(b, `,"url":`...)
		b = appendString(b, en.Request.URL)
		if en.Request.IfNoneExist != "" {
			b = append(b, `,"ifNoneExist":`...)
			b = appendString(b, en.Request.IfNoneExist)
		}
		if en.Request.IfMatch != "" {
			b = append(b, `,"ifMatch":`...)
			b = appendString(b, en.Request.IfMatch)
		}
		b = append(b, "}}"...)
	}
	return append(b, "]}"...), nil
}

// appendString appends s as encoding/json writes a string (escaping HTML
// characters). Plain printable ASCII, what these fields hold, is copied;
// anything else is left to encoding/json.
func appendString(b []byte, s string) []byte {
	for i := 0; i < len(s); i++ {
		if c := s[i]; c < 0x20 || c >= 0x7f || c == '"' || c == '\\' || c == '<' || c == '>' || c == '&' {
			q, err := json.Marshal(s)
			if err != nil {
				// Marshalling a string cannot fail.
				return strconv.AppendQuote(b, s)
			}
			return append(b, q...)
		}
	}
	b = append(b, '"')
	b = append(b, s...)
	return append(b, '"')
}
