// Package encode turns the results of package derive into FHIR R4 resources:
// one Observation per derived value, one Provenance per derivation, and the
// Device that stands for this software.
//
// # Identity
//
// Every derived Observation carries two identifiers (see [Identity]):
//
//   - identifier[0], the key, hashes the algorithm version, the output code
//     and the versioned reference of every input the value used. The same
//     inputs at the same versions under the same rules give the same key, so
//     it is the idempotency key of a conditional create.
//   - identifier[1], the series, hashes the output code and the unversioned
//     blood gas (for a fall: the patient and the onset). It survives a
//     correction of any input, so the live service can find the derived
//     Observation again and update it.
//
// The resource id is taken from the series, so a re-derivation after an
// amended input has the same id and updates the same resource (the server's
// history keeps the earlier version), and references resolve inside one
// replay output.
//
// # Content
//
// Each Observation is status final, category procedure (every value combines
// the blood gas with ventilator or capnograph readings, which is neither
// "based on analysis of specimens" alone nor a vital sign), coded in the
// project's own CodeSystem only: no LOINC code for any of the outputs has
// been verified, so none is claimed. The value is rounded to the precision a
// reader can use (see [Precision]); the explanation API keeps full precision
// and the intermediate terms. derivedFrom cites versioned references only.
//
// Every Observation's first note is the caution ([Encoder.Caution]), so no
// reader of the resource meets a calculated value without it.
package encode
