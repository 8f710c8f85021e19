// charge-taper, in JavaScript: the same model as ../python/charge_taper.py
// (minutes a plug-in session needs to reach its target state of charge,
// with the car's power taper), built into a component with componentize-js
// against paddock's wit/. See the README, "Bring your model".
//
// The host calls init(params) once per instance, then describe(), then
// score(rows, cells) as often as it likes. `cells` is row-major; a thrown
// value becomes the `err` of the WIT result.

const FEATURES = [
  real('charger_kw', 1, 350, 'kW', 'power the charger can deliver'),
  real('battery_kwh', 5, 250, 'kWh', 'usable battery capacity'),
  real('soc_start', 0, 1, undefined, 'state of charge at plug-in, 0-1'),
  real('soc_target', 0, 1, undefined, 'state of charge wanted, 0-1'),
];
const OUTPUTS = [
  { name: 'session_minutes', unit: 'min', bounds: { min: 0, max: undefined }, about: 'minutes to reach the target' },
];

let model = null;

function real(name, min, max, unit, about) {
  return { name, domain: { tag: 'real', val: { min, max } }, unit, required: true, about };
}

function parse(params) {
  const p = JSON.parse(new TextDecoder().decode(params));
  const knots = p.taper;
  if (!Array.isArray(knots) || knots.length < 2 || knots[0][0] !== 0 || knots[knots.length - 1][0] !== 1) {
    throw new Error('taper knots must run from state of charge 0 to 1');
  }
  for (let i = 1; i < knots.length; i++) {
    if (!(knots[i][0] > knots[i - 1][0])) throw new Error(`taper knots must rise: ${knots[i - 1][0]} then ${knots[i][0]}`);
    if (!(knots[i][1] > 0 && knots[i - 1][1] > 0)) throw new Error('taper fractions must be above 0');
  }
  if (!(p.efficiency > 0 && p.efficiency <= 1)) throw new Error('efficiency must be in (0, 1]');
  return { knots, efficiency: p.efficiency, version: String(p.version) };
}

// Integral of 1 / taper(s) ds over [lo, hi], exact per linear segment.
function inverseTaperIntegral(knots, lo, hi) {
  let total = 0;
  for (let i = 1; i < knots.length; i++) {
    const [s0, f0] = knots[i - 1];
    const [s1, f1] = knots[i];
    const a = Math.max(s0, lo);
    const b = Math.min(s1, hi);
    if (b <= a) continue;
    const slope = (f1 - f0) / (s1 - s0);
    const fa = f0 + slope * (a - s0);
    const fb = f0 + slope * (b - s0);
    total += slope === 0 ? (b - a) / fa : Math.log(fb / fa) / slope;
  }
  return total;
}

function minutes(kw, kwh, socStart, socTarget) {
  if (socTarget <= socStart) return 0;
  return ((60 * kwh) / (kw * model.efficiency)) * inverseTaperIntegral(model.knots, socStart, socTarget);
}

export function init(params) {
  try {
    model = parse(params);
  } catch (e) {
    throw `charge-taper params: ${e.message}`;
  }
}

export function describe() {
  return {
    name: 'charge-taper',
    version: model.version,
    features: FEATURES,
    outputs: OUTPUTS,
    about: "Minutes a session needs to reach its target charge, with the car's power taper (JavaScript guest).",
  };
}

export function score(rows, cells) {
  const width = FEATURES.length;
  if (cells.length !== rows * width) {
    throw { tag: 'rejected', val: `${cells.length} cells do not make ${rows} rows` };
  }
  const out = new Float64Array(rows);
  for (let r = 0; r < rows; r++) {
    const o = r * width;
    out[r] = minutes(cells[o], cells[o + 1], cells[o + 2], cells[o + 3]);
  }
  return out;
}
