// Prints the reference table for package units: what the general-purpose UCUM
// library @lhncbc/ucum-lhc says about every unit string the Go package must
// accept or refuse, and every conversion it must perform.
//
//   node fhir/units/testdata/ucum-reference.mjs > fhir/units/testdata/ucum-lhc-7.1.10.json
//
// (or `go test ./fhir/units -run TestReferenceTableCurrent -update`). The
// library is installed in testdata/node by `npm ci`.
import { createRequire } from 'node:module';

const nodeDir = new URL('../../../testdata/node/', import.meta.url);
const require = createRequire(nodeDir);
const ucum = require('@lhncbc/ucum-lhc');
const { version } = require('@lhncbc/ucum-lhc/package.json');
const u = ucum.UcumLhcUtils.getInstance();
// The library logs some failures with console.log; keep stdout for the table.
console.log = console.info = console.debug = () => {};

// Units the Go package converts, spellings of them, and their annotated forms.
const accepted = [
  'mm[Hg]', 'kPa', '%', 'mL', 'ml', 'L', 'l',
  'L/min', 'l/min', 'L.min-1', 'l.min-1', 'mL/min', 'ml/min', 'mL.min-1', 'ml.min-1',
  '/min', '1/min', 'min-1', 'cm', 'm', '[in_i]',
  '{breaths}/min', '{Breaths}/min', '/min{breaths}', 'L/min{BTPS}', 'mL/min{STPD}',
  'mL{BTPS}', 'mm[Hg]{x}', 'kPa{x}', '%{CO2}', 'mL{a}/min{b}', 'L.min-1{x}', 'L{x}.min-1',
  '[in_i]{h}', '{}/min', '{~!@#$%^&*()_+|}/min', ' mL', 'mL ', '\tmL', 'mL\n',
];
// Units of other dimensions the Go package recognises, to report a mismatch.
const otherDimension = [
  '1', '{score}', 'kg', 'g', '[lb_av]', 'Cel', '[degF]', 'K', 'mmol/L', 'mg/dL', 'g/dL', 's', 'min', 'h',
];
// Strings the Go package refuses. Some are valid UCUM for units it does not
// convert (cm[H2O], mL/s); the rest are not UCUM at all.
const refused = [
  'mmHg', 'mm Hg', 'kpa', 'KPa', 'ML', 'Ml', 'LPM', 'l/m', 'breaths/min', 'bpm', 'in', '[iIN]',
  'cm[H2O]', 'mL/s', '[in_us]', 'm[Hg]', 'Pa', 'dL', '10*3.mL', '/min/min', '%/min', 'mL/kg',
  '{x}mm[Hg]', '{a}{b}', 'mL{a}{b}', 'm{x}[Hg]', '{a b}/min', '{a{b}}/min', '{ab/min', 'ab}/min',
  '{é}/min', 'c m', '', ' ', 'mL/min/', '(mL)', 'L/{min}', '{a}.min', 'torr', 'mbar', 'cmH2O',
];

const units = [...accepted, ...otherDimension, ...refused].map((s) => {
  const r = u.validateUnitString(s, true);
  return { unit: s, status: r.status, ucumCode: r.ucumCode ?? null };
});

// Each kind's canonical unit (derive.Kind.Unit) and sample values.
const targets = ['mm[Hg]', 'mL', 'L/min', 'mL/min', '/min', 'cm'];
const values = [1, 37.5];
const conversions = [];
for (const from of [...accepted, ...otherDimension]) {
  for (const to of targets) {
    for (const value of values) {
      const r = u.convertUnitTo(from, value, to);
      conversions.push({ from, to, value, status: r.status, toVal: r.status === 'succeeded' ? r.toVal : null });
    }
  }
}

const table = {
  library: '@lhncbc/ucum-lhc',
  version,
  generator: 'fhir/units/testdata/ucum-reference.mjs',
  units,
  conversions,
};
process.stdout.write(JSON.stringify(table, null, 1) + '\n');
