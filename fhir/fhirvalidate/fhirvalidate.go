// Package fhirvalidate checks that a FHIR R4 JSON resource is valid, for
// tests of the code that writes resources.
//
// Import it only from _test.go files. It is built on
// github.com/google/fhir/go, which pulls about 90 MB of modules and adds
// about 34 MB to a binary; keeping it out of non-test code keeps it out of
// the shipped service.
//
// [Resource] runs two checks and reports every problem it finds:
//
//   - the google/fhir R4 validating unmarshaller (v0.7.4): element names and
//     types, primitive formats (code, dateTime, instant, decimal, id),
//     required elements, code bindings of enumerated elements, and reference
//     target types;
//   - a few invariants of the R4 specification that google/fhir does not
//     evaluate (it has no FHIRPath engine): qty-3, obs-6, obs-7, and the
//     JSON format rule that no property is null, "" or empty.
package fhirvalidate

import (
	"bytes"
	"encoding/json"
	"errors"
	"fmt"
	"sort"
	"strings"

	"github.com/google/fhir/go/fhirversion"
	"github.com/google/fhir/go/jsonformat"
	"google.golang.org/protobuf/proto"
	"google.golang.org/protobuf/reflect/protoreflect"
)

// Resource validates one R4 resource in JSON form. The error, when not nil,
// joins one line per problem, each naming the element path.
func Resource(b []byte) error {
	um, err := jsonformat.NewUnmarshaller("UTC", fhirversion.R4)
	if err != nil {
		return fmt.Errorf("fhirvalidate: build unmarshaller: %w", err)
	}
	rep := &reporter{}
	msg, err := um.UnmarshalWithErrorReporter(b, rep)
	if err != nil {
		// Parse errors (unknown field, wrong type, bad code) stop
		// google/fhir before validation, so there is nothing more to add
		// from it; still run the JSON checks, which need no types.
		return errors.Join(append([]error{fmt.Errorf("google/fhir: %w", err)}, jsonIssues(b)...)...)
	}
	issues := rep.issues
	issues = append(issues, quantityIssues(msg)...)
	issues = append(issues, jsonIssues(b)...)
	return errors.Join(issues...)
}

// reporter keeps every error google/fhir reports; the library's own basic
// reporter drops the element path.
type reporter struct{ issues []error }

func (r *reporter) ReportValidationError(path string, err error) error {
	r.issues = append(r.issues, fmt.Errorf("google/fhir: at %q: %w", path, err))
	return nil
}

// ReportValidationWarning keeps warnings too: a test of our own output should
// see them. google/fhir v0.7.4 reports none.
func (r *reporter) ReportValidationWarning(path string, err error) error {
	r.issues = append(r.issues, fmt.Errorf("google/fhir warning: at %q: %w", path, err))
	return nil
}

// quantityTypes are the R4 data types built on Quantity.
var quantityTypes = map[protoreflect.Name]bool{
	"Quantity": true, "SimpleQuantity": true, "Age": true, "Count": true,
	"Distance": true, "Duration": true, "MoneyQuantity": true,
}

// quantityIssues checks qty-3, "If a code for the unit is present, the system
// SHALL also be present" (FHIR R4, datatypes.html#Quantity), on every
// Quantity in the resource.
func quantityIssues(m proto.Message) []error {
	var out []error
	var walk func(path string, m protoreflect.Message)
	walk = func(path string, m protoreflect.Message) {
		if quantityTypes[m.Descriptor().Name()] {
			code := m.Descriptor().Fields().ByName("code")
			system := m.Descriptor().Fields().ByName("system")
			if code != nil && system != nil && m.Has(code) && !m.Has(system) {
				out = append(out, fmt.Errorf("qty-3: at %q: a unit code without a system", path))
			}
		}
		m.Range(func(fd protoreflect.FieldDescriptor, v protoreflect.Value) bool {
			if fd.Kind() != protoreflect.MessageKind && fd.Kind() != protoreflect.GroupKind {
				return true
			}
			p := path + "." + fd.JSONName()
			switch {
			case fd.IsList():
				l := v.List()
				for i := 0; i < l.Len(); i++ {
					walk(fmt.Sprintf("%s[%d]", p, i), l.Get(i).Message())
				}
			case fd.IsMap():
			default:
				walk(p, v.Message())
			}
			return true
		})
	}
	walk("", m.ProtoReflect())
	return out
}

// jsonIssues checks the rules that are easiest to see in the JSON itself.
func jsonIssues(b []byte) []error {
	d := json.NewDecoder(bytes.NewReader(b))
	d.UseNumber()
	var root map[string]any
	if err := d.Decode(&root); err != nil {
		return []error{fmt.Errorf("json: %w", err)}
	}
	var out []error
	rt, _ := root["resourceType"].(string)
	emptyIssues(rt, root, &out)
	if rt == "Observation" {
		out = append(out, observationIssues(root)...)
	}
	return out
}

// emptyIssues enforces the FHIR JSON rule (R4 json.html, from memory) that
// properties are never null, empty strings, empty objects or empty arrays;
// ele-1 says every element has a value or children.
func emptyIssues(path string, v any, out *[]error) {
	switch x := v.(type) {
	case nil:
		*out = append(*out, fmt.Errorf("json: at %q: null", path))
	case string:
		if x == "" {
			*out = append(*out, fmt.Errorf("json: at %q: empty string", path))
		} else if strings.TrimSpace(x) != x {
			// FHIR strings "SHOULD NOT have leading or trailing whitespace"
			// (R4 datatypes.html#string); for our own output it is a bug.
			*out = append(*out, fmt.Errorf("json: at %q: leading or trailing whitespace", path))
		}
	case []any:
		if len(x) == 0 {
			*out = append(*out, fmt.Errorf("json: at %q: empty array", path))
		}
		for i, e := range x {
			emptyIssues(fmt.Sprintf("%s[%d]", path, i), e, out)
		}
	case map[string]any:
		if len(x) == 0 {
			*out = append(*out, fmt.Errorf("json: at %q: empty object (ele-1)", path))
		}
		keys := make([]string, 0, len(x))
		for k := range x {
			keys = append(keys, k)
		}
		sort.Strings(keys)
		for _, k := range keys {
			emptyIssues(path+"."+k, x[k], out)
		}
	}
}

// observationIssues checks two invariants of the R4 Observation profile:
//
//	obs-6: dataAbsentReason SHALL only be present if Observation.value[x] is
//	       not present
//	obs-7: If Observation.code is the same as an Observation.component.code
//	       then the value element associated with the code SHALL NOT be present
func observationIssues(obs map[string]any) []error {
	var out []error
	hasValue := func(m map[string]any) bool {
		for k := range m {
			if strings.HasPrefix(k, "value") && len(k) > len("value") {
				return true
			}
		}
		return false
	}
	if _, ok := obs["dataAbsentReason"]; ok && hasValue(obs) {
		out = append(out, errors.New("obs-6: Observation has both value[x] and dataAbsentReason"))
	}
	top := codings(obs["code"])
	comps, _ := obs["component"].([]any)
	for i, c := range comps {
		cm, _ := c.(map[string]any)
		if cm == nil {
			continue
		}
		if _, ok := cm["dataAbsentReason"]; ok && hasValue(cm) {
			out = append(out, fmt.Errorf("obs-6: component[%d] has both value[x] and dataAbsentReason", i))
		}
		if !hasValue(obs) {
			continue
		}
		for k := range codings(cm["code"]) {
			if top[k] {
				out = append(out, fmt.Errorf("obs-7: component[%d].code %s repeats Observation.code while Observation.value[x] is present", i, k))
			}
		}
	}
	return out
}

func codings(cc any) map[string]bool {
	m, _ := cc.(map[string]any)
	list, _ := m["coding"].([]any)
	out := map[string]bool{}
	for _, c := range list {
		cm, _ := c.(map[string]any)
		sys, _ := cm["system"].(string)
		code, _ := cm["code"].(string)
		if code != "" {
			out[sys+"|"+code] = true
		}
	}
	return out
}
