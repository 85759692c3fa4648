package grpcapi

import (
	"encoding/json"
	"fmt"
	"slices"
	"strconv"
	"time"

	"google.golang.org/protobuf/types/known/timestamppb"

	"github.com/deadspace-fhir/deadspace/api/engine"
	"github.com/deadspace-fhir/deadspace/api/pipeline"
	"github.com/deadspace-fhir/deadspace/derive"
	pb "github.com/deadspace-fhir/deadspace/proto/deadspace/v1"
)

// observationView is the part of a derived Observation the API reports.
// The number is read as the JSON text, so the decimal keeps the precision
// the encoder wrote.
type observationView struct {
	Identifier []struct {
		Value string `json:"value"`
	} `json:"identifier"`
	Code struct {
		Coding []struct {
			Code string `json:"code"`
		} `json:"coding"`
	} `json:"code"`
	ValueQuantity *struct {
		Value json.Number `json:"value"`
		Code  string      `json:"code"`
	} `json:"valueQuantity"`
}

// derivedValue describes one derived Observation, with the computation
// behind it when v is known.
func derivedValue(obs json.RawMessage, v *derive.Value) (*pb.DerivedValue, error) {
	var view observationView
	if err := json.Unmarshal(obs, &view); err != nil {
		return nil, fmt.Errorf("grpcapi: derived observation: %w", err)
	}
	out := &pb.DerivedValue{Observation: obs}
	if len(view.Identifier) > 0 {
		out.Key = view.Identifier[0].Value
	}
	if len(view.Identifier) > 1 {
		out.Series = view.Identifier[1].Value
	}
	if len(view.Code.Coding) > 0 {
		out.Code = view.Code.Coding[0].Code
	}
	if q := view.ValueQuantity; q != nil {
		out.Decimal = q.Value.String()
		out.Unit = q.Code
		f, err := strconv.ParseFloat(out.Decimal, 64)
		if err != nil {
			return nil, fmt.Errorf("grpcapi: derived observation value %q: %w", out.Decimal, err)
		}
		out.Value = f
	}
	if v == nil {
		return out, nil
	}
	out.Flag = flagOf(v.Flag)
	if v.Range != nil {
		out.ReferenceRange, out.ReferenceRangeSource = v.Range.Text, v.Range.Source
	}
	out.Equation = v.Equation
	for _, t := range v.Terms {
		out.Terms = append(out.Terms, &pb.Term{Name: t.Name, Value: t.Value, Unit: t.Unit})
	}
	out.Estimate = v.Estimate
	out.Notes = v.Notes
	for _, k := range v.Inputs {
		out.InputKinds = append(out.InputKinds, k.String())
	}
	out.UsesPatient = v.UsesPatient
	return out, nil
}

func flagOf(f derive.Flag) pb.Flag {
	switch f {
	case derive.FlagNormal:
		return pb.Flag_FLAG_NORMAL
	case derive.FlagHigh:
		return pb.Flag_FLAG_HIGH
	case derive.FlagLow:
		return pb.Flag_FLAG_LOW
	}
	return pb.Flag_FLAG_UNSPECIFIED
}

// valueFor returns the value of d with the given code, or nil.
func valueFor(d *derive.Derivation, code string) *derive.Value {
	if d == nil {
		return nil
	}
	i := slices.IndexFunc(d.Values, func(v derive.Value) bool { return string(v.Code) == code })
	if i < 0 {
		return nil
	}
	return &d.Values[i]
}

func timestamp(t time.Time) *timestamppb.Timestamp {
	if t.IsZero() {
		return nil
	}
	return timestamppb.New(t)
}

func refs(rs []derive.Reading) []string {
	out := make([]string, 0, len(rs))
	for _, r := range rs {
		out = append(out, r.Ref)
	}
	return out
}

func pairings(sums []derive.Summary) []*pb.Pairing {
	out := make([]*pb.Pairing, 0, len(sums))
	for _, s := range sums {
		out = append(out, &pb.Pairing{Kind: s.Kind.String(), Median: s.Median, Unit: s.Kind.Unit(), Rule: s.Rule, Readings: refs(s.Readings)})
	}
	return out
}

func fallFinding(f *derive.Fall) *pb.FallFinding {
	if f == nil {
		return nil
	}
	return &pb.FallFinding{
		Onset: timestamp(f.Onset), Confirmed: timestamp(f.Confirmed),
		Baseline: f.Baseline, Level: f.Level, Change: f.Change,
		BaselineReadings: refs(f.BaselineReadings), EpisodeReadings: refs(f.EpisodeReadings), Notes: f.Notes,
	}
}

func omissions(om []derive.Omission) []*pb.Omission {
	out := make([]*pb.Omission, 0, len(om))
	for _, o := range om {
		out = append(out, omission(o))
	}
	return out
}

func omission(o derive.Omission) *pb.Omission {
	return &pb.Omission{Code: string(o.Code), Ref: o.Ref, Reason: string(o.Reason), Detail: o.Detail}
}

// result converts one computed result.
func result(r pipeline.Result) (*pb.Result, error) {
	out := &pb.Result{Subject: r.Subject, Effective: timestamp(r.Time()), Fall: fallFinding(r.Fall)}
	if r.Derivation != nil {
		out.Kind = pb.ResultKind_RESULT_KIND_BLOOD_GAS
		out.BloodGas = r.Derivation.Gas.Ref
		out.Pairings = pairings(r.Derivation.Used)
	} else {
		out.Kind = pb.ResultKind_RESULT_KIND_ETCO2_FALL
	}
	for _, o := range r.Bundle.Observations {
		raw, err := json.Marshal(o)
		if err != nil {
			return nil, fmt.Errorf("grpcapi: encode observation: %w", err)
		}
		code := ""
		if len(o.Code.Coding) > 0 && o.Code.Coding[0].Code != nil {
			code = *o.Code.Coding[0].Code
		}
		v, err := derivedValue(raw, valueFor(r.Derivation, code))
		if err != nil {
			return nil, err
		}
		out.Values = append(out.Values, v)
	}
	prov, err := json.Marshal(r.Bundle.Provenance)
	if err != nil {
		return nil, fmt.Errorf("grpcapi: encode provenance: %w", err)
	}
	out.Provenance = prov
	return out, nil
}

func entry(en engine.Record) *pb.Entry {
	return &pb.Entry{
		Series: en.Series, Key: en.Key, Status: en.Status, Subject: en.Subject,
		ServerId: en.ServerID, ServerVersion: en.ServerVersion, Revisions: en.Revisions,
		Effective: timestamp(en.EffectiveAt), Updated: timestamp(en.UpdatedAt),
	}
}

// derivation is a ledger entry in brief.
func derivation(rec engine.Record) (*pb.Derivation, error) {
	out := &pb.Derivation{Entry: entry(rec)}
	p := rec.Payload
	switch {
	case p.Derivation != nil:
		out.Kind = pb.ResultKind_RESULT_KIND_BLOOD_GAS
		out.BloodGas = p.Derivation.Gas.Ref
	case p.Fall != nil:
		out.Kind = pb.ResultKind_RESULT_KIND_ETCO2_FALL
	}
	v, err := derivedValue(p.Observation, valueFor(p.Derivation, string(rec.Code)))
	if err != nil {
		return nil, err
	}
	out.Value = v
	return out, nil
}

func sexOf(s derive.Sex) string {
	switch s {
	case derive.SexMale:
		return "male"
	case derive.SexFemale:
		return "female"
	}
	return "unknown"
}

// explanation converts an engine explanation.
func explanation(ex engine.Explanation) (*pb.ExplainResponse, error) {
	out := &pb.ExplainResponse{
		Recomputed: ex.Recomputed, Subject: ex.Subject, AlgorithmVersion: ex.AlgorithmVersion,
		Pairings: pairings(ex.Pairings), ValuesNotEmitted: omissions(ex.ValuesNotEmitted),
		Fall: fallFinding(ex.Fall), Notes: ex.Notes,
	}
	if ex.Record != nil {
		out.Entry = entry(*ex.Record)
		out.WithdrawnBecause = ex.Record.Payload.Why
		if sp := ex.Record.Superseded; sp != nil {
			out.Superseded = &pb.Supersession{Key: sp.Key, Status: sp.Status, Because: sp.Because}
		}
	}
	switch {
	case ex.Derivation != nil:
		out.Kind = pb.ResultKind_RESULT_KIND_BLOOD_GAS
		out.BloodGas = ex.Derivation.Gas.Ref
		out.Effective = timestamp(ex.Derivation.Gas.At())
	case ex.Fall != nil:
		out.Kind = pb.ResultKind_RESULT_KIND_ETCO2_FALL
		out.Effective = timestamp(ex.Fall.Onset)
	case len(ex.Inputs) > 0 && ex.Inputs[0].Role == engine.RoleBloodGas:
		out.Kind = pb.ResultKind_RESULT_KIND_BLOOD_GAS
		out.BloodGas = ex.Inputs[0].Reading.Ref
		out.Effective = timestamp(ex.Inputs[0].Reading.At())
	}
	for _, v := range ex.Values {
		dv, err := derivedValue(v.Observation, v.Value)
		if err != nil {
			return nil, err
		}
		out.Values = append(out.Values, dv)
	}
	for _, in := range ex.Inputs {
		out.Inputs = append(out.Inputs, &pb.ExplainedInput{
			Reference: in.Reading.Ref, Version: in.VersionID, Kind: in.Reading.Kind.String(), Role: in.Role,
			Effective: timestamp(in.Reading.At()), Value: in.Reading.Value, Unit: in.Reading.Kind.Unit(),
			OriginalAvailable: in.Available,
			OriginalValue:     in.Original.Value, OriginalUnit: in.Original.Unit,
			OriginalSystem: in.Original.System, OriginalCode: in.Original.Code,
			Conversion: in.Conversion.Text,
		})
	}
	if p := ex.Patient; p != nil {
		pf := &pb.PatientFacts{Reference: p.Ref, Sex: sexOf(p.Sex)}
		if !p.BirthDate.IsZero() {
			pf.BirthDate = p.BirthDate.Format(time.DateOnly)
		}
		out.Patient = pf
	}
	if o := ex.BloodGasOmission; o != nil {
		out.BloodGasOmission = omission(*o)
	}
	return out, nil
}
