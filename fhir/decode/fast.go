package decode

import (
	"encoding/json"

	"github.com/deadspace-fhir/deadspace/fhir/jsonscan"
)

// The fast fill: an Observation read into observationJSON in one jsonscan
// pass instead of encoding/json's reflection (which validates the line a
// second time and allocates for every string and raw value), because this
// fill was most of the decoder's cost for a relevant line.
//
// It handles only the plain case, where its result is certain to be
// encoding/json's, and reports false for anything else, so the caller
// falls back to json.Unmarshal and gets encoding/json's result, its
// UnmarshalTypeError and therefore the same omission detail:
//
//   - a member name that differs from a field's only in case (encoding/json
//     matches names case-insensitively, with Unicode folding; any name
//     outside ASCII is therefore left to it too);
//   - a member that appears twice in one object (encoding/json merges into
//     what it already filled);
//   - a null, or a value of any other JSON type than the field expects
//     (encoding/json leaves a null field untouched, or records a type error
//     and goes on);
//   - text that is not JSON.
//
// FuzzObservationFastAgainstJSON compares the two fills.

// fastFill holds the scanner of one fill.
type fastFill struct{ s jsonscan.Scanner }

// The member names of each struct, in an order the member functions index.
var (
	observationNames = [...]string{"id", "meta", "status", "code", "subject", "encounter",
		"effectiveDateTime", "effectiveInstant", "effectivePeriod", "effectiveTiming",
		"valueQuantity", "dataAbsentReason", "component",
		"valueCodeableConcept", "valueString", "valueBoolean", "valueInteger", "valueRange",
		"valueRatio", "valueSampledData", "valueTime", "valueDateTime", "valuePeriod"}
	metaNames      = [...]string{"versionId", "lastUpdated"}
	codingNames    = [...]string{"system", "code"}
	conceptNames   = [...]string{"coding", "text"}
	referenceNames = [...]string{"reference", "identifier"}
	quantityNames  = [...]string{"value", "comparator", "unit", "system", "code"}
	periodNames    = [...]string{"start", "end"}
	componentNames = [...]string{"code", "valueQuantity", "dataAbsentReason"}
)

// fillObservation fills o from line, which must hold nothing else, and
// reports whether it could; when it could not, o may be partly filled and
// must be reset before json.Unmarshal fills it.
func fillObservation(line []byte, o *observationJSON) bool {
	var f fastFill
	f.s.Reset(line)
	// One allocation for the members nearly every Observation has, in place
	// of one each; a duplicate member falls back, so each part is used once.
	parts := new(struct {
		meta               metaJSON
		subject, encounter referenceJSON
		quantity           quantityJSON
		effective          string
		coding             [1]codingJSON
	})
	return f.object(observationNames[:], func(i int) bool {
		switch i {
		case 0:
			return f.str(&o.ID)
		case 1:
			o.Meta = &parts.meta
			return f.meta(o.Meta)
		case 2:
			return f.str(&o.Status)
		case 3:
			return f.concept(&o.Code, parts.coding[:0:1])
		case 4:
			o.Subject = &parts.subject
			return f.reference(o.Subject)
		case 5:
			o.Encounter = &parts.encounter
			return f.reference(o.Encounter)
		case 6:
			o.EffectiveDateTime = &parts.effective
			return f.str(o.EffectiveDateTime)
		case 7:
			return f.strPtr(&o.EffectiveInstant)
		case 8:
			o.EffectivePeriod = new(periodJSON)
			return f.period(o.EffectivePeriod)
		case 9:
			return f.raw(&o.EffectiveTiming)
		case 10:
			o.ValueQuantity = &parts.quantity
			return f.quantity(o.ValueQuantity)
		case 11:
			o.DataAbsentReason = new(conceptJSON)
			return f.concept(o.DataAbsentReason, nil)
		case 12:
			return f.components(&o.Component)
		case 13:
			return f.raw(&o.ValueCodeableConcept)
		case 14:
			return f.raw(&o.ValueString)
		case 15:
			return f.raw(&o.ValueBoolean)
		case 16:
			return f.raw(&o.ValueInteger)
		case 17:
			return f.raw(&o.ValueRange)
		case 18:
			return f.raw(&o.ValueRatio)
		case 19:
			return f.raw(&o.ValueSampledData)
		case 20:
			return f.raw(&o.ValueTime)
		case 21:
			return f.raw(&o.ValueDateTime)
		case 22:
			return f.raw(&o.ValuePeriod)
		}
		return false
	}) && f.s.End() == nil
}

// object reads an object whose fields are names, calling member with the
// index of each field that appears; other members are skipped (see
// jsonscan.Scanner.Members for what sends it back to encoding/json).
func (f *fastFill) object(names []string, member func(i int) bool) bool {
	return f.s.Members(names, member)
}

func (f *fastFill) str(dst *string) bool {
	if f.s.Peek() != jsonscan.String {
		return false
	}
	text, raw, err := f.s.Str()
	if err != nil {
		return false
	}
	*dst = jsonscan.Unquote(text, raw)
	return true
}

func (f *fastFill) strPtr(dst **string) bool {
	*dst = new(string)
	return f.str(*dst)
}

// raw keeps the value's text as a slice of the line rather than a copy, as
// encoding/json makes: observationJSON lives only while the line is read.
func (f *fastFill) raw(dst *json.RawMessage) bool {
	if k := f.s.Peek(); k == jsonscan.Null || k == jsonscan.Invalid {
		return false
	}
	b, err := f.s.Skip()
	*dst = b
	return err == nil
}

func (f *fastFill) meta(m *metaJSON) bool {
	return f.object(metaNames[:], func(i int) bool {
		if i == 0 {
			return f.str(&m.VersionID)
		}
		return f.str(&m.LastUpdated)
	})
}

// concept reads a CodeableConcept, appending its codings to buf (which may
// be nil).
func (f *fastFill) concept(c *conceptJSON, buf []codingJSON) bool {
	return f.object(conceptNames[:], func(i int) bool {
		if i == 1 {
			return f.str(&c.Text)
		}
		// encoding/json makes an empty array an empty, non-nil slice.
		c.Coding = buf
		if c.Coding == nil {
			c.Coding = []codingJSON{}
		}
		return f.array(func() bool {
			c.Coding = append(c.Coding, codingJSON{})
			cd := &c.Coding[len(c.Coding)-1]
			return f.object(codingNames[:], func(i int) bool {
				if i == 0 {
					return f.str(&cd.System)
				}
				return f.str(&cd.Code)
			})
		})
	})
}

// array reads an array, calling elem to read each element.
func (f *fastFill) array(elem func() bool) bool {
	if f.s.Peek() != jsonscan.Array || f.s.Array() != nil {
		return false
	}
	for first := true; ; first = false {
		more, err := f.s.Elem(first)
		switch {
		case err != nil:
			return false
		case !more:
			return true
		case !elem():
			return false
		}
	}
}

func (f *fastFill) reference(r *referenceJSON) bool {
	return f.object(referenceNames[:], func(i int) bool {
		if i == 0 {
			return f.str(&r.Reference)
		}
		return f.raw(&r.Identifier)
	})
}

func (f *fastFill) quantity(q *quantityJSON) bool {
	return f.object(quantityNames[:], func(i int) bool {
		switch i {
		case 0:
			return f.raw(&q.Value)
		case 1:
			return f.str(&q.Comparator)
		case 2:
			return f.str(&q.Unit)
		case 3:
			return f.str(&q.System)
		}
		return f.str(&q.Code)
	})
}

func (f *fastFill) period(p *periodJSON) bool {
	return f.object(periodNames[:], func(i int) bool {
		if i == 0 {
			return f.str(&p.Start)
		}
		return f.str(&p.End)
	})
}

func (f *fastFill) components(dst *[]componentJSON) bool {
	*dst = []componentJSON{}
	return f.array(func() bool {
		*dst = append(*dst, componentJSON{})
		c := &(*dst)[len(*dst)-1]
		return f.object(componentNames[:], func(i int) bool {
			switch i {
			case 0:
				return f.concept(&c.Code, nil)
			case 1:
				c.ValueQuantity = new(quantityJSON)
				return f.quantity(c.ValueQuantity)
			}
			c.DataAbsentReason = new(conceptJSON)
			return f.concept(c.DataAbsentReason, nil)
		})
	})
}
