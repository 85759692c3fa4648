package encode

import "github.com/samply/golang-fhir-models/fhir-models/fhir"

// Device returns the Device that stands for this build of deadspace, the
// device of every derived Observation and the agent of every Provenance.
// Its id and identifier both carry the version, so each build is its own
// Device and a result always names the build that computed it. Create it
// conditionally on the identifier; the value is "deadspace@<version>" (no
// "|", which token search reads as the system separator).
//
// It names no manufacturer: deadspace is not a manufactured medical device.
func (e *Encoder) Device() fhir.Device {
	return fhir.Device{
		Id: ptr(e.deviceID),
		Identifier: []fhir.Identifier{{
			System: ptr(e.o.DeviceSystem),
			Value:  ptr("deadspace@" + e.o.SoftwareVersion),
		}},
		DeviceName: []fhir.DeviceDeviceName{{Name: "deadspace", Type: fhir.DeviceNameTypeModelName}},
		Type:       &fhir.CodeableConcept{Text: ptr("software")},
		Version:    []fhir.DeviceVersion{{Value: e.o.SoftwareVersion}},
		Note: []fhir.Annotation{{
			Text: "Derived-respiratory calculation software: computes dead-space values from arterial blood gases and ventilator and capnograph readings.",
		}},
	}
}
