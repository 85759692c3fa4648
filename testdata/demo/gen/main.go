// Command gen writes the invented demo scenario in testdata/demo: one night
// in a seven-bed intensive care unit, as a FHIR bulk export would deliver it
// (one resource a line, one resource type a file). Every patient, value and
// identifier is invented; the scenario exists to show the job, never to check
// it. Run it from the repository root:
//
//	go run ./testdata/demo/gen
//
// The output is deterministic, so regenerating it changes nothing unless
// this program changes.
package main

import (
	"bufio"
	"encoding/json"
	"fmt"
	"math"
	"math/rand/v2"
	"os"
	"path/filepath"
	"time"
)

const (
	loinc = "http://loinc.org"
	mdc   = "urn:iso:std:iso:11073:10101"
	ucum  = "http://unitsofmeasure.org"
)

type coding struct {
	System  string `json:"system"`
	Code    string `json:"code"`
	Display string `json:"display,omitempty"`
}

type concept struct {
	Coding []coding `json:"coding"`
	Text   string   `json:"text,omitempty"`
}

type quantity struct {
	Value  json.Number `json:"value"`
	Unit   string      `json:"unit"`
	System string      `json:"system"`
	Code   string      `json:"code"`
}

type reference struct {
	Reference string `json:"reference"`
}

type meta struct {
	VersionID   string `json:"versionId"`
	LastUpdated string `json:"lastUpdated"`
}

type observation struct {
	ResourceType      string     `json:"resourceType"`
	ID                string     `json:"id"`
	Meta              meta       `json:"meta"`
	Status            string     `json:"status"`
	Category          []concept  `json:"category"`
	Code              concept    `json:"code"`
	Subject           reference  `json:"subject"`
	Encounter         *reference `json:"encounter,omitempty"`
	EffectiveDateTime string     `json:"effectiveDateTime"`
	Issued            string     `json:"issued,omitempty"`
	ValueQuantity     quantity   `json:"valueQuantity"`
	Device            *reference `json:"device,omitempty"`
}

type patient struct {
	ResourceType string `json:"resourceType"`
	ID           string `json:"id"`
	Meta         meta   `json:"meta"`
	Gender       string `json:"gender"`
	BirthDate    string `json:"birthDate"`
}

// kind describes how one feed codes and scales a measurement.
type encounter struct {
	ResourceType string    `json:"resourceType"`
	ID           string    `json:"id"`
	Meta         meta      `json:"meta"`
	Status       string    `json:"status"`
	Class        coding    `json:"class"`
	Subject      reference `json:"subject"`
}

type kind struct {
	system, code, display, unit, category string
}

var (
	paco2      = kind{loinc, "2019-8", "Carbon dioxide [Partial pressure] in Arterial blood", "mm[Hg]", "laboratory"}
	paco2Temp  = kind{loinc, "32771-8", "Carbon dioxide [Partial pressure] adjusted to patient's actual temperature in Arterial blood", "mm[Hg]", "laboratory"}
	tidalSet   = kind{loinc, "20112-9", "Tidal volume setting Ventilator", "mL", "procedure"}
	pvco2      = kind{loinc, "2021-4", "Carbon dioxide [Partial pressure] in Venous blood", "mm[Hg]", "laboratory"}
	etco2      = kind{loinc, "19891-1", "Carbon dioxide [Partial pressure] in Exhaled gas --at end expiration", "mm[Hg]", "vital-signs"}
	etco2Pct   = kind{loinc, "19889-5", "Carbon dioxide/Gas.total.at end expiration in Exhaled gas", "%", "vital-signs"}
	etco2MDC   = kind{mdc, "151708", "MDC_AWAY_CO2_ET", "kPa", "vital-signs"}
	tidal      = kind{loinc, "76222-9", "Tidal volume Ventilator --on ventilator", "mL", "procedure"}
	tidalMDC   = kind{mdc, "151980", "Tidal volume delivered", "mL", "procedure"}
	minute     = kind{loinc, "76008-2", "Expired minute Volume during Mechanical ventilation", "L/min", "procedure"}
	minuteMDC  = kind{mdc, "151880", "MDC_VOL_MINUTE_AWAY", "L/min", "procedure"}
	rate       = kind{loinc, "19840-8", "Breath rate spontaneous and mechanical --on ventilator", "/min", "procedure"}
	rateMDC    = kind{mdc, "152490", "Total breath rate", "/min", "procedure"}
	vco2       = kind{loinc, "60825-7", "Carbon dioxide production (VCO2) in Respiratory system", "mL/min", "procedure"}
	height     = kind{loinc, "8302-2", "Body height", "cm", "vital-signs"}
	heartRate  = kind{loinc, "8867-4", "Heart rate", "/min", "vital-signs"}
	spo2       = kind{loinc, "59408-5", "Oxygen saturation in Arterial blood by Pulse oximetry", "%", "vital-signs"}
	temp       = kind{loinc, "8310-5", "Body temperature", "Cel", "vital-signs"}
	pao2       = kind{loinc, "2703-7", "Oxygen [Partial pressure] in Arterial blood", "mm[Hg]", "laboratory"}
	nightStart = time.Date(2026, 3, 14, 22, 0, 0, 0, time.UTC)
)

// bed is one invented patient and the shape of their night.
type bed struct {
	id, gender, birth string
	heightCm          float64
	heightUnit        string
	enc               string
	// device feeds: kPa or percent sites code differently
	etco2, tidal, minute, rate kind
	vco2                       bool
	vt, rr, vco2mL             float64
	paco2At                    []time.Duration // offsets of arterial samples
	paco2kPa                   bool
	// etco2 and gradient as a function of minutes into the night; the
	// gradient is at the patient's temperature
	etco2Fn  func(m float64) float64
	gradient func(m float64) float64
	// chartEvery is the charting interval of the device feeds in minutes
	// (0: every minute); many EHRs keep a validated value every 5 min.
	chartEvery int
	// tempFn is the body temperature (nil: about 37.2 °C).
	tempFn func(m float64) float64
	// reportAdjusted lists the samples (by index) whose analyser was told
	// the patient's temperature and reports 32771-8 as well.
	reportAdjusted map[int]bool
}

func main() {
	dir := filepath.Join("testdata", "demo")
	rng := rand.New(rand.NewPCG(20260314, 7))
	beds := []bed{
		{ // stable after elective surgery
			id: "bed1-stable", gender: "male", birth: "1968-05-02", heightCm: 178, heightUnit: "cm", enc: "enc-bed1",
			etco2: etco2, tidal: tidal, minute: minute, rate: rate, vco2: true, vt: 520, rr: 14, vco2mL: 210,
			paco2At:  []time.Duration{30 * time.Minute, 4 * time.Hour, 7*time.Hour + 30*time.Minute},
			etco2Fn:  func(m float64) float64 { return 37 },
			gradient: func(m float64) float64 { return 3.5 },
		},
		{ // ARDS with a widening gradient over the night
			id: "bed2-ards", gender: "female", birth: "1959-11-20", heightCm: 163, heightUnit: "cm", enc: "enc-bed2",
			etco2: etco2, tidal: tidal, minute: minute, rate: rate, vco2: true, vt: 360, rr: 26, vco2mL: 240,
			paco2At:  []time.Duration{time.Hour, 3 * time.Hour, 5 * time.Hour, 7 * time.Hour},
			etco2Fn:  func(m float64) float64 { return 41 - m/120 },
			gradient: func(m float64) float64 { return 7 + m/40 },
		},
		{ // a site whose analyser and monitors report kPa, coded with device (MDC) codes
			id: "bed3-kpa", gender: "male", birth: "1975-01-09", heightCm: 1.84, heightUnit: "m", enc: "enc-bed3",
			etco2: etco2MDC, tidal: tidalMDC, minute: minuteMDC, rate: rateMDC, vt: 560, rr: 16,
			paco2At: []time.Duration{2 * time.Hour, 6 * time.Hour}, paco2kPa: true,
			etco2Fn:  func(m float64) float64 { return 39 },
			gradient: func(m float64) float64 { return 5.5 },
		},
		{ // a sidestream capnograph reporting percent, and a venous sample sent by mistake
			id: "bed4-percent", gender: "female", birth: "1983-07-30", heightCm: 66, heightUnit: "[in_i]", enc: "enc-bed4",
			etco2: etco2Pct, tidal: tidal, minute: minute, rate: rate, vt: 420, rr: 18,
			paco2At:  []time.Duration{90 * time.Minute, 5*time.Hour + 15*time.Minute},
			etco2Fn:  func(m float64) float64 { return 35 },
			gradient: func(m float64) float64 { return 6 },
		},
		{ // a sudden end-tidal fall at 03:10 with a rising gradient: a pulmonary embolism is suspected
			id: "bed5-fall", gender: "male", birth: "1950-02-14", heightCm: 171, heightUnit: "cm", enc: "enc-bed5",
			etco2: etco2, tidal: tidal, minute: minute, rate: rate, vco2: true, vt: 480, rr: 18, vco2mL: 200,
			paco2At: []time.Duration{time.Hour, 5*time.Hour + 30*time.Minute},
			etco2Fn: func(m float64) float64 {
				if m >= 310 && m < 400 {
					return 22
				}
				return 36
			},
			gradient: func(m float64) float64 {
				if m >= 310 {
					return 16
				}
				return 4
			},
		},
		{ // cooled to 33 °C after a cardiac arrest, rewarmed from 04:00; the
			// ventilator charts only its set tidal volume; end-tidal CO2 rises
			// as the patient rewarms
			id: "bed6-cooled", gender: "male", birth: "1961-08-03", heightCm: 182, heightUnit: "cm", enc: "enc-bed6",
			etco2: etco2, tidal: tidalSet, minute: minute, rate: rate, vco2: true, vt: 500, rr: 14, vco2mL: 170,
			paco2At:        []time.Duration{time.Hour, 3 * time.Hour},
			reportAdjusted: map[int]bool{1: true},
			etco2Fn: func(m float64) float64 {
				if m >= 360 {
					return 44
				}
				return 32
			},
			gradient: func(m float64) float64 { return 4 },
			tempFn: func(m float64) float64 {
				if m < 360 {
					return 33
				}
				return 33 + (m-360)/30
			},
		},
		{ // a nine-year-old after scoliosis surgery, charted every 5 minutes;
			// at 04:00 the end-tidal CO2 falls for 40 minutes (a kinked tube)
			id: "bed7-child", gender: "female", birth: "2016-09-12", heightCm: 132, heightUnit: "cm", enc: "enc-bed7",
			etco2: etco2, tidal: tidal, minute: minute, rate: rate, vt: 230, rr: 22, chartEvery: 5,
			paco2At: []time.Duration{2 * time.Hour, 6 * time.Hour},
			etco2Fn: func(m float64) float64 {
				if m >= 240 && m < 280 {
					return 24
				}
				return 38
			},
			gradient: func(m float64) float64 { return 3 },
		},
	}

	var patients, encounters, gases, devices []any
	for _, b := range beds {
		patients = append(patients, patient{"Patient", b.id, meta{"1", stamp(nightStart.Add(-72 * time.Hour))}, b.gender, b.birth})
		encounters = append(encounters, encounter{"Encounter", b.enc, meta{"1", stamp(nightStart.Add(-72 * time.Hour))}, "in-progress",
			coding{"http://terminology.hl7.org/CodeSystem/v3-ActCode", "IMP", "inpatient encounter"}, reference{"Patient/" + b.id}})
		h := b.heightCm
		devices = append(devices, obs(b, height, fmt.Sprintf("%s-height", b.id), nightStart.Add(-48*time.Hour), num(h, 2), b.heightUnit, "1", "final"))
		n := 0
		every := max(b.chartEvery, 1)
		for m := 0; m < 8*60; m++ {
			at := nightStart.Add(time.Duration(m) * time.Minute)
			mf := float64(m)
			if m%every != 0 {
				continue
			}
			e := b.etco2Fn(mf) + rng.NormFloat64()*0.6
			if b.id == "bed1-stable" && (m == 242 || m == 243) {
				e = float64(m - 242) // suctioning just after the second blood gas: 0 and 1 mm[Hg]
			}
			var eVal string
			switch b.etco2.unit {
			case "kPa":
				eVal = num(e/7.50062, 2)
			case "%":
				eVal = num(e/760*100, 2) // percent of dry gas at sea-level pressure
			default:
				eVal = num(e, 0)
			}
			n++
			id := func(k string) string { return fmt.Sprintf("%s-%s-%04d", b.id, k, m) }
			devices = append(devices, obs(b, b.etco2, id("etco2"), at, eVal, b.etco2.unit, "1", "final"))
			vt := b.vt + rng.NormFloat64()*8
			devices = append(devices, obs(b, b.tidal, id("vt"), at, num(vt, 0), "mL", "1", "final"))
			rr := b.rr + math.Round(rng.NormFloat64()*0.4)
			devices = append(devices, obs(b, b.rate, id("rr"), at, num(rr, 0), "/min", "1", "final"))
			devices = append(devices, obs(b, b.minute, id("ve"), at, num(vt*rr/1000, 2), "L/min", "1", "final"))
			if b.vco2 && m%5 == 0 {
				devices = append(devices, obs(b, vco2, id("vco2"), at, num(b.vco2mL+rng.NormFloat64()*6, 0), "mL/min", "1", "final"))
			}
			if m%15 == 0 {
				devices = append(devices, obs(b, heartRate, id("hr"), at, num(80+rng.NormFloat64()*5, 0), "/min", "1", "final"))
				devices = append(devices, obs(b, spo2, id("spo2"), at, num(95+rng.NormFloat64(), 0), "%", "1", "final"))
			}
			if m%60 == 0 {
				t := 37.2 + rng.NormFloat64()*0.2
				if b.tempFn != nil {
					t = b.tempFn(mf)
				}
				devices = append(devices, obs(b, temp, id("temp"), at, num(t, 1), "Cel", "1", "final"))
			}
		}
		for i, off := range b.paco2At {
			at := nightStart.Add(off)
			mf := off.Minutes()
			pa := b.etco2Fn(mf) + b.gradient(mf) + rng.NormFloat64()*0.5
			id := fmt.Sprintf("%s-abg-%d", b.id, i+1)
			if b.tempFn != nil {
				// the analyser measures at 37 °C: PCO2(37) = PCO2(T) / 10^(0.019 (T − 37))
				atTemp := pa
				pa = atTemp / math.Pow(10, 0.019*(b.tempFn(mf)-37))
				if b.reportAdjusted[i] {
					gases = append(gases, obs(b, paco2Temp, id+"-temp", at, num(atTemp, 0), "mm[Hg]", "1", "final"))
				}
			}
			val, unit := num(pa, 0), "mm[Hg]"
			if b.paco2kPa {
				val, unit = num(pa/7.50062, 2), "kPa"
			}
			gases = append(gases, obs(b, paco2, id, at, val, unit, "1", "final"))
			gases = append(gases, obs(b, pao2, id+"-pao2", at, num(85+rng.NormFloat64()*5, 0), "mm[Hg]", "1", "final"))
		}
	}
	// Corrections and noise the service must handle.

	// bed 2's third blood gas was first filed with a mis-keyed value, then
	// amended by the laboratory: version 1 is superseded by version 2.
	for i, g := range gases {
		if o, ok := g.(observation); ok && o.ID == "bed2-ards-abg-3" {
			amended := o
			amended.Meta = meta{"2", stamp(nightStart.Add(5*time.Hour + 50*time.Minute))}
			amended.Status = "amended"
			gases = append(gases, amended)
			o.ValueQuantity.Value = "35"
			gases[i] = o
		}
	}
	// bed 4: a venous gas, and a point-of-care result still preliminary.
	b4 := beds[3]
	gases = append(gases, obs(b4, pvco2, "bed4-percent-vbg-1", nightStart.Add(3*time.Hour), "46", "mm[Hg]", "1", "final"))
	gases = append(gases, obs(b4, paco2, "bed4-percent-abg-poc", nightStart.Add(6*time.Hour), "41", "mm[Hg]", "1", "preliminary"))
	// bed 3: a point-of-care analyser reports kPa but the interface labels
	// it mm[Hg]; it must be refused, never taken as 5.2 mm[Hg].
	gases = append(gases, obs(beds[2], paco2, "bed3-kpa-abg-poc", nightStart.Add(7*time.Hour), "5.21", "mm[Hg]", "1", "final"))

	write(filepath.Join(dir, "Patient.ndjson"), patients)
	write(filepath.Join(dir, "Encounter.ndjson"), encounters)
	write(filepath.Join(dir, "Observation.bloodgas.ndjson"), gases)
	write(filepath.Join(dir, "Observation.devices.ndjson"), devices)
}

func obs(b bed, k kind, id string, at time.Time, value, unit, version, status string) observation {
	o := observation{
		ResourceType:      "Observation",
		ID:                id,
		Meta:              meta{version, stamp(at.Add(2 * time.Minute))},
		Status:            status,
		Category:          []concept{{Coding: []coding{{"http://terminology.hl7.org/CodeSystem/observation-category", k.category, ""}}}},
		Code:              concept{Coding: []coding{{k.system, k.code, k.display}}},
		Subject:           reference{"Patient/" + b.id},
		Encounter:         &reference{"Encounter/" + b.enc},
		EffectiveDateTime: stamp(at),
		ValueQuantity:     quantity{json.Number(value), unit, ucum, unit},
	}
	if k.category == "laboratory" {
		// the result time is later than the sample time; pairing must use the sample time
		o.Issued = stamp(at.Add(9 * time.Minute))
	}
	if version != "1" {
		o.Meta.LastUpdated = stamp(at.Add(40 * time.Minute))
	}
	return o
}

func num(v float64, decimals int) string {
	return fmt.Sprintf("%.*f", decimals, v)
}

func stamp(t time.Time) string { return t.UTC().Format(time.RFC3339) }

func write(path string, rows []any) {
	f, err := os.Create(path)
	if err != nil {
		fmt.Fprintln(os.Stderr, err)
		os.Exit(1)
	}
	w := bufio.NewWriter(f)
	enc := json.NewEncoder(w)
	for _, r := range rows {
		if err := enc.Encode(r); err != nil {
			fmt.Fprintln(os.Stderr, err)
			os.Exit(1)
		}
	}
	if err := w.Flush(); err != nil {
		fmt.Fprintln(os.Stderr, err)
		os.Exit(1)
	}
	if err := f.Close(); err != nil {
		fmt.Fprintln(os.Stderr, err)
		os.Exit(1)
	}
}
