package pipeline_test

import (
	"encoding/json"
	"fmt"
	"math"
	"slices"
	"strings"
	"testing"

	"github.com/deadspace-fhir/deadspace/api/pipeline"
	"github.com/deadspace-fhir/deadspace/derive"
	"github.com/deadspace-fhir/deadspace/fhir/decode"
)

// The tests in this file feed invented FHIR JSON through the decoder and
// the collector, as replay and the live service do, and check the values
// derived, so that they hold whatever step a rule is applied in.

const (
	loinc = "http://loinc.org"
	mdc   = "urn:iso:std:iso:11073:10101"
	ucum  = "http://unitsofmeasure.org"
)

// qty is a UCUM valueQuantity.
func qty(v float64, code string) map[string]any {
	return map[string]any{"value": v, "unit": code, "system": ucum, "code": code}
}

// shapeObs is one Observation as a JSON object, before its line is made.
func shapeObs(id, system, code string, at string, q map[string]any) map[string]any {
	o := map[string]any{
		"resourceType": "Observation", "id": id, "meta": map[string]any{"versionId": "1"}, "status": "final",
		"code":              map[string]any{"coding": []any{map[string]any{"system": system, "code": code}}},
		"subject":           map[string]any{"reference": "Patient/p1"},
		"effectiveDateTime": at,
	}
	if q != nil {
		o["valueQuantity"] = q
	}
	return o
}

// component is one Observation.component with a Quantity.
func component(system, code string, q map[string]any) map[string]any {
	return map[string]any{"code": map[string]any{"coding": []any{map[string]any{"system": system, "code": code}}}, "valueQuantity": q}
}

// minuteSeries is one reading a minute from 10:10 to 10:20, around a
// blood gas sampled at 10:15.
func minuteSeries(prefix, system, code string, q map[string]any) []map[string]any {
	var out []map[string]any
	for m := 10; m <= 20; m++ {
		out = append(out, shapeObs(fmt.Sprintf("%s-%d", prefix, m), system, code, fmt.Sprintf("2025-03-01T10:%02d:00Z", m), q))
	}
	return out
}

// male50 is a 50-year-old man, 175 cm tall (height charted the day before).
func male50() []map[string]any {
	return []map[string]any{
		{"resourceType": "Patient", "id": "p1", "meta": map[string]any{"versionId": "1"}, "gender": "male", "birthDate": "1975-01-01"},
		shapeObs("height-1", loinc, "8302-2", "2025-02-28T10:00:00Z", qty(175, "cm")),
	}
}

// ventilator is EtCO2 35 mm[Hg], VT 500 mL, RR 14 /min, expired VE 7 L/min
// and VCO2 200 mL/min, every minute around 10:15.
func ventilator() []map[string]any {
	return slices.Concat(
		minuteSeries("et", loinc, "19891-1", qty(35, "mm[Hg]")),
		minuteSeries("vt", loinc, "76222-9", qty(500, "mL")),
		minuteSeries("rr", loinc, "9279-1", qty(14, "/min")),
		minuteSeries("ve", loinc, "76008-2", qty(7, "L/min")),
		minuteSeries("vco2", loinc, "60825-7", qty(200, "mL/min")),
	)
}

// replayShapes decodes and collects every resource and derives.
func replayShapes(t *testing.T, resources []map[string]any) pipeline.Report {
	t.Helper()
	return replayShapesWith(t, decode.Options{}, resources)
}

// replayShapesWith is replayShapes with decoder options.
func replayShapesWith(t *testing.T, opts decode.Options, resources []map[string]any) pipeline.Report {
	t.Helper()
	dec := decode.New(opts)
	col := pipeline.NewCollector()
	for _, r := range resources {
		line, err := json.Marshal(r)
		if err != nil {
			t.Fatal(err)
		}
		if _, err := col.AddLine(dec, line); err != nil {
			t.Fatalf("decode %s: %v", line, err)
		}
	}
	return finish(t, col)
}

// onlyDerivation returns the one blood gas derivation of rep.
func onlyDerivation(t *testing.T, rep pipeline.Report) *derive.Derivation {
	t.Helper()
	var ds []*derive.Derivation
	for _, r := range rep.Results {
		if r.Derivation != nil {
			ds = append(ds, r.Derivation)
		}
	}
	if len(ds) != 1 {
		var why []derive.Omission
		for _, o := range rep.Inputs {
			if o.Reason != derive.ReasonUnpaired {
				why = append(why, o)
			}
		}
		t.Fatalf("%d derivations, want 1; inputs left out other than unpaired: %+v", len(ds), why)
	}
	return ds[0]
}

func derivedValue(d *derive.Derivation, c derive.Code) (derive.Value, bool) {
	for _, v := range d.Values {
		if v.Code == c {
			return v, true
		}
	}
	return derive.Value{}, false
}

func noteWith(v derive.Value, words ...string) bool {
	return slices.ContainsFunc(v.Notes, func(n string) bool {
		n = strings.ToLower(n)
		for _, w := range words {
			if strings.Contains(n, w) {
				return true
			}
		}
		return false
	})
}

// A FHIR reference may be absolute (FHIR R4 references.html: "a literal
// reference ... an absolute URL"), and the decoder accepts a subject
// written so (package decode, rule 6). A patient whose Observations all
// name it by an absolute URL must get derived values like any other; the
// blood gas must not be left out as resource-malformed because the
// encoder only takes "Patient/{id}". The expected values are the ones this
// input gives with relative references: PĒCO2 = 0.863 × 200 / 7 = 24.66
// mm[Hg] and Enghoff VD/VT = (40 − 24.66)/40 = 0.384 (Anderson &
// Breen, Crit Care 2000;4:207; own arithmetic).
func TestAbsoluteSubjectReferencesStillDerive(t *testing.T) {
	t.Parallel()
	cases := []struct {
		name    string
		subject string
	}{
		{"relative reference, as control", "Patient/p1"},
		{"absolute https reference of the export's server", "https://ehr.example/fhir/Patient/p1"},
		{"absolute versioned reference", "https://ehr.example/fhir/Patient/p1/_history/3"},
	}
	for _, tc := range cases {
		t.Run(tc.name, func(t *testing.T) {
			t.Parallel()
			rs := slices.Concat(
				[]map[string]any{shapeObs("abg-1", loinc, "2019-8", "2025-03-01T10:15:00Z", qty(40, "mm[Hg]"))},
				ventilator())
			for _, r := range rs {
				r["subject"] = map[string]any{"reference": tc.subject}
			}
			rep := replayShapes(t, rs)
			for _, o := range rep.Inputs {
				if o.Reason == derive.ReasonMalformed {
					t.Errorf("input left out as malformed: %+v", o)
				}
			}
			d := onlyDerivation(t, rep)
			phys, ok := derivedValue(d, derive.CodePhysiologic)
			want := (40 - 0.863*200/7) / 40
			if !ok || math.Abs(phys.Value-want) > 1e-9 {
				t.Errorf("physiologic VD/VT %+v (emitted %v), want %.4f", phys, ok, want)
			}
			var bundles int
			for _, r := range rep.Results {
				if r.Derivation != nil {
					bundles += len(r.Bundle.Observations)
				}
			}
			if bundles == 0 {
				t.Errorf("no derived Observation written for the blood gas")
			}
		})
	}
}

// An absolute reference under the service's own FHIR server (decode's
// Options.Base, serve's --fhir-base) is the same patient as the relative
// one: the Patient resource's facts (sex, birth date) join the
// Observations, the ventilatory ratio is computed, and the written subject
// is relative. Under another server the absolute reference is another
// patient, whose id only happens to match: its facts are not taken from
// the local Patient p1, and the written subject keeps its base.
// VR = (7000 × 40)/(PBW × 100 × 37.5) with PBW = 50 + 0.91 × (175 − 152.4)
// = 70.566 kg (Sinha et al., Br J Anaesth 2009;102:692; ARDS Network, NEJM
// 2000;342:1301; own arithmetic): 1.058.
func TestAbsoluteSubjectOfTheOwnServerIsOnePatient(t *testing.T) {
	t.Parallel()
	const own = "https://ehr.example/fhir"
	cases := []struct {
		name, subject, written string
		facts                  bool
	}{
		{"own server, versioned", own + "/Patient/p1/_history/3", "Patient/p1", true},
		{"own server, host in capitals and the default port", "https://EHR.example:443/fhir/Patient/p1", "Patient/p1", true},
		{"another server, same id", "https://other.example/fhir/Patient/p1", "https://other.example/fhir/Patient/p1", false},
	}
	for _, tc := range cases {
		t.Run(tc.name, func(t *testing.T) {
			t.Parallel()
			obs := slices.Concat(
				[]map[string]any{shapeObs("abg-1", loinc, "2019-8", "2025-03-01T10:15:00Z", qty(40, "mm[Hg]"))},
				male50()[1:], ventilator())
			for _, r := range obs {
				r["subject"] = map[string]any{"reference": tc.subject}
			}
			rep := replayShapesWith(t, decode.Options{Base: own + "/"}, slices.Concat(male50()[:1], obs))
			d := onlyDerivation(t, rep)
			vr, ok := derivedValue(d, derive.CodeVentilatoryRatio)
			pbw := 50 + 0.91*(175-152.4)
			if want := 7000 * 40 / (pbw * 100 * 37.5); ok != tc.facts || (ok && math.Abs(vr.Value-want) > 1e-9) {
				t.Errorf("ventilatory ratio %v (emitted %v), want %v (emitted %v)", vr.Value, ok, want, tc.facts)
			}
			if joined := d.Patient.Ref != ""; joined != tc.facts {
				t.Errorf("patient facts joined %v (%+v), want %v", joined, d.Patient, tc.facts)
			}
			for _, r := range rep.Results {
				if r.Derivation == nil {
					continue
				}
				for _, o := range r.Bundle.Observations {
					if o.Subject == nil || o.Subject.Reference == nil || *o.Subject.Reference != tc.written {
						t.Fatalf("written subject %v, want %q", o.Subject, tc.written)
					}
				}
			}
		})
	}
}

// README rule 3: "a temperature-adjusted PaCO2 reported for the same sample
// (LOINC 32771-8, within a minute) is preferred" to adjusting the 37 °C
// value by formula. An analyser that reports both values on one resource
// (the arterial blood gas panel 24336-0 with components 2019-8 and
// 32771-8, or a 2019-8 Observation with a 32771-8 component) reports the
// same pair, so the value at the patient's temperature must be used: the
// gradient compares like with like in a cooled patient (common practice:
// an analyser told the patient's temperature reports the adjusted value
// as well, LOINC 32771-8). Invented numbers: 40 mm[Hg] at 37 °C,
// 33.2 reported at the patient's temperature, EtCO2 30.
func TestTemperatureAdjustedPaCO2OnTheSameResourceIsPreferred(t *testing.T) {
	t.Parallel()
	panel := shapeObs("abg-panel-1", loinc, "24336-0", "2025-03-01T10:15:00Z", nil)
	panel["component"] = []any{
		component(loinc, "2019-8", qty(40, "mm[Hg]")),
		component(loinc, "32771-8", qty(33.2, "mm[Hg]")),
	}
	lone := shapeObs("abg-1", loinc, "2019-8", "2025-03-01T10:15:00Z", qty(40, "mm[Hg]"))
	lone["component"] = []any{component(loinc, "32771-8", qty(33.2, "mm[Hg]"))}
	panelWithTemp := shapeObs("abg-panel-2", loinc, "24336-0", "2025-03-01T10:15:00Z", nil)
	panelWithTemp["component"] = []any{
		component(loinc, "2019-8", qty(40, "mm[Hg]")),
		component(loinc, "32771-8", qty(33.2, "mm[Hg]")),
		component(loinc, "8310-5", qty(33, "Cel")),
	}
	cases := []struct {
		name string
		gas  map[string]any
	}{
		{"cooled patient, panel with the 37 °C and the adjusted PCO2", panel},
		{"cooled patient, lone PaCO2 carrying the adjusted value as a component", lone},
		{"cooled patient, panel with both values and the temperature entered", panelWithTemp},
	}
	for _, tc := range cases {
		t.Run(tc.name, func(t *testing.T) {
			t.Parallel()
			rep := replayShapes(t, slices.Concat([]map[string]any{tc.gas},
				minuteSeries("et", loinc, "19891-1", qty(30, "mm[Hg]"))))
			d := onlyDerivation(t, rep)
			if math.Abs(d.PaCO2-33.2) > 1e-9 {
				t.Errorf("PaCO2 used %v, want the reported value at the patient's temperature, 33.2", d.PaCO2)
			}
			if g, ok := derivedValue(d, derive.CodeGradient); !ok || math.Abs(g.Value-3.2) > 1e-9 {
				t.Errorf("gradient %+v, want 33.2 − 30 = 3.2 mm[Hg]", g)
			}
		})
	}
}

// PĒCO2 = 0.863 × VCO2 / VE holds only for VCO2 at STPD and VE at BTPS
// (the constant is 760 × (310/273)/1000; from memory). A Quantity whose
// UCUM annotation says the volume is at other conditions ({BTPS} on VCO2, {ATPS} or {STPD} on VE) must not be put into
// it as if it were at the right ones: the value is either refused or
// converted, never computed silently with 0.863. At 760 mm[Hg] and 37 °C a
// gas volume at BTPS is (760 − 47)/760 × 273/310 = 0.826 of itself at
// STPD (the gas laws; own arithmetic), so 200 mL/min BTPS is 165 mL/min
// STPD and PĒCO2 is 20.4, not 24.7 mm[Hg]: VD/VT 0.49 instead of 0.38.
func TestGasConditionsOfVCO2AndMinuteVolume(t *testing.T) {
	t.Parallel()
	btpsToStpd := (760.0 - 47) / 760 * 273 / 310
	cases := []struct {
		name    string
		vco2    map[string]any
		ve      map[string]any
		correct float64 // PĒCO2 when converted
	}{
		{"VCO2 reported at BTPS", qty(200, "mL/min{BTPS}"), qty(7, "L/min"), 0.863 * 200 * btpsToStpd / 7},
		{"expired minute volume reported at STPD", qty(200, "mL/min"), qty(7, "L/min{STPD}"), 0.863 * 200 / (7 / btpsToStpd)},
	}
	for _, tc := range cases {
		t.Run(tc.name, func(t *testing.T) {
			t.Parallel()
			rs := slices.Concat(
				[]map[string]any{shapeObs("abg-1", loinc, "2019-8", "2025-03-01T10:15:00Z", qty(40, "mm[Hg]"))},
				minuteSeries("et", loinc, "19891-1", qty(35, "mm[Hg]")),
				minuteSeries("vco2", loinc, "60825-7", tc.vco2),
				minuteSeries("ve", loinc, "76008-2", tc.ve),
			)
			d := onlyDerivation(t, replayShapes(t, rs))
			pe, ok := derivedValue(d, derive.CodeMixedExpiredCO2)
			if !ok {
				return // refused: acceptable
			}
			if naive := 0.863 * 200 / 7; math.Abs(pe.Value-naive) < 1e-6 {
				t.Errorf("PĒCO2 %.2f mm[Hg] computed as if the inputs were VCO2 STPD and VE BTPS; converted it is %.2f", pe.Value, tc.correct)
			} else if math.Abs(pe.Value-tc.correct) > 0.05 {
				t.Errorf("PĒCO2 %.2f, want %.2f after converting to STPD/BTPS", pe.Value, tc.correct)
			}
		})
	}
}

// README rule 5: a source that is "a converted percentage" is a substitute,
// named in the value's note with why; the code table gives the end-tidal
// fraction code (19889-5) a low priority because "that conversion assumes
// a pressure and a basis". The same conversion applies whatever code the
// percentage comes under: a capnograph that sends EtCO2 in % under the
// partial-pressure codes (LOINC 19891-1, MDC 151708) has its value
// converted with an assumed barometric pressure (760 mm[Hg] here: 4.6 % is
// 35.0 mm[Hg] dry: PCO2 = FCO2 × PB, Intensive Care Med 2004 dead-space
// review, doi 10.1007/s00134-004-2194-8), and that must be disclosed, and a
// measured partial pressure in the same window preferred.
func TestEndTidalPercentUnderAPressureCodeIsDisclosed(t *testing.T) {
	t.Parallel()
	gas := shapeObs("abg-1", loinc, "2019-8", "2025-03-01T10:15:00Z", qty(40, "mm[Hg]"))
	cases := []struct {
		name   string
		etco2  []map[string]any
		wantEt float64
	}{
		{"ventilator sends EtCO2 in % under MDC 151708", minuteSeries("et", mdc, "151708", qty(4.6, "%")), 4.6 * 7.6},
		{"monitor sends EtCO2 in % under LOINC 19891-1", minuteSeries("et", loinc, "19891-1", qty(4.6, "%")), 4.6 * 7.6},
		{"measured mm[Hg] and % of two devices in one window", slices.Concat(
			minuteSeries("etp", mdc, "151708", qty(4.0, "%")),
			minuteSeries("et", loinc, "19891-1", qty(36, "mm[Hg]"))), 36},
	}
	for _, tc := range cases {
		t.Run(tc.name, func(t *testing.T) {
			t.Parallel()
			d := onlyDerivation(t, replayShapes(t, slices.Concat([]map[string]any{gas}, tc.etco2)))
			g, ok := derivedValue(d, derive.CodeGradient)
			if !ok {
				t.Fatalf("no gradient: %+v", d.Omitted)
			}
			if math.Abs(g.Value-(40-tc.wantEt)) > 1e-6 {
				t.Errorf("gradient %v, want %v (EtCO2 %v)", g.Value, 40-tc.wantEt, tc.wantEt)
			}
			if tc.wantEt != 36 && !noteWith(g, "percentage", "barometric", "%") {
				t.Errorf("gradient from a converted percentage has no note saying so: %q", g.Notes)
			}
		})
	}
}

// README rule 5 and, from memory: Enghoff uses the expired volume, and a
// set tidal volume or an inspired minute volume overstates it when there
// is a leak, so an inspired volume is a substitute for the expired one, named in
// the value's note, and never pooled with a measured expired volume. The
// code table says MDC 151980 is the "Volume of gas delivered through the
// patient-connection port during a respiratory cycle", an inspired
// (delivered) tidal volume, yet gives it the priority of a measured one, so
// a dead-space volume computed from it carries no note, and a window with
// it and a ventilator-measured volume (LOINC 76222-9) takes the median of
// both. VD = 0.384 × VT (Enghoff with PĒCO2 0.863 × 200 / 7, as above).
func TestDeliveredTidalVolumeIsASubstitute(t *testing.T) {
	t.Parallel()
	gas := shapeObs("abg-1", loinc, "2019-8", "2025-03-01T10:15:00Z", qty(40, "mm[Hg]"))
	rest := slices.Concat(
		minuteSeries("et", loinc, "19891-1", qty(35, "mm[Hg]")),
		minuteSeries("ve", loinc, "76008-2", qty(7, "L/min")),
		minuteSeries("vco2", loinc, "60825-7", qty(200, "mL/min")),
	)
	phys := (40 - 0.863*200/7) / 40
	cases := []struct {
		name   string
		vt     []map[string]any
		wantVT float64
		note   bool
	}{
		{"only the delivered tidal volume is charted", minuteSeries("vtd", mdc, "151980", qty(600, "mL")), 600, true},
		{"delivered 600 and ventilator-measured 450 mL in one window", slices.Concat(
			minuteSeries("vtd", mdc, "151980", qty(600, "mL")),
			minuteSeries("vt", loinc, "76222-9", qty(450, "mL"))), 450, false},
	}
	for _, tc := range cases {
		t.Run(tc.name, func(t *testing.T) {
			t.Parallel()
			d := onlyDerivation(t, replayShapes(t, slices.Concat([]map[string]any{gas}, rest, tc.vt)))
			v, ok := derivedValue(d, derive.CodeDeadSpaceVolume)
			if !ok {
				t.Fatalf("no dead-space volume: %+v", d.Omitted)
			}
			if math.Abs(v.Value-phys*tc.wantVT) > 1e-6 {
				t.Errorf("VD %v mL, want %v × %v = %v", v.Value, phys, tc.wantVT, phys*tc.wantVT)
			}
			if tc.note && !noteWith(v, "leak", "lower-priority") {
				t.Errorf("VD from a delivered (inspired) tidal volume has no substitute note: %q", v.Notes)
			}
		})
	}
}
