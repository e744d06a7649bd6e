// A spec (the JSON the engine reads) and the form that edits it, both ways.
//
// Owns: the form's shape (emptyForm, newComponent), the run settings' keys and defaults,
// formToSpec (form + settings -> spec, or local errors rendered like the engine's; the data
// table goes into the spec as CSV text, which the engine reads), specToForm
// (spec -> form + settings; anything the form cannot hold is kept verbatim in `extra` so that
// the engine, not the page, judges it) and the sanitising of a stored form.
// Must not touch: the DOM, the page state, storage or the engine (pure; unit-tested under Node).
import { isNum, parseNumber } from './numbers.js';
import { str } from './format.js';
import { columnsToCsv } from './csv.js';

export const SETTING_KEYS = ['seed', 'chains', 'draws', 'warmup', 'method', 'integrator'];
export const DEFAULT_SETTINGS = { seed: '1', chains: '8', draws: '1000', warmup: '500', method: 'alternating', integrator: 'nuts' };
const SPEC_KEYS = ['title', 'notes', 'variables', 'data', 'energy', 'log_density', 'mixture', 'settings'];
const KINDS = ['energy', 'log_density', 'mixture'];

/** A form with one unknown `x` and nothing else. */
export function emptyForm() {
  return { title: '', notes: '', kind: 'energy', formula: '', variables: [{ name: 'x', size: '', lower: '', upper: '', prior: '' }],
    dataCsv: '', mixture: [], extra: {}, extraSettings: {} };
}

/** A new mixture component for `form`: weight 1, mean 0 and sd 1 along every unknown. */
export function newComponent(form) {
  const D = Math.max(1, form.variables.length);
  return { weight: '1', mean: new Array(D).fill('0').join(', '), shape: 'sd', spread: new Array(D).fill('1').join(', '), extra: null };
}

function parseList(t) {
  const parts = String(t).replace(/[[\]]/g, ' ').split(/[\s,]+/).filter(function (s) { return s.length; });
  const out = [];
  for (const p of parts) { const n = parseNumber(p); if (n === null) return { bad: p }; out.push(n); }
  return { values: out };
}

function parseMatrix(t) {
  const rows = String(t).split(/[;\n]/).map(function (s) { return s.trim(); }).filter(function (s) { return s.replace(/[[\],\s]/g, '').length; });
  const out = [];
  for (const r of rows) { const l = parseList(r); if (l.bad != null) return { bad: l.bad }; out.push(l.values); }
  return { values: out };
}

function parseSettings(s) {
  const out = {}, errors = [];
  const ints = { seed: [0, 'the seed'], chains: [1, 'the number of chains'], draws: [1, 'the number of kept draws'], warmup: [0, 'the warm-up length'] };
  for (const k of ['seed', 'chains', 'draws', 'warmup']) {
    const t = String(s[k] == null ? '' : s[k]).trim();
    if (t === '') { errors.push('error: ' + ints[k][1] + ' is empty\n --> run settings\n'); continue; }
    const n = parseNumber(t);
    if (n === null || Math.floor(n) !== n || n < ints[k][0] || n > Number.MAX_SAFE_INTEGER) {
      errors.push('error: ' + ints[k][1] + ' must be a whole number of at least ' + ints[k][0] + ', not `' + t + '`\n --> run settings\n');
    } else out[k] = n;
  }
  out.method = s.method === 'joint' ? 'joint' : 'alternating';
  out.integrator = s.integrator === 'hmc' ? 'hmc' : 'nuts';
  return { settings: out, errors: errors };
}

/**
 * The spec a form and its settings (texts, as typed) describe:
 * {spec, errors: rendered local errors, settings: the parsed run settings}.
 */
export function formToSpec(f, settingsText) {
  const errors = [];
  const spec = {};
  if (f.title.trim()) spec.title = f.title;
  if (f.notes.trim()) spec.notes = f.notes;
  spec.variables = f.variables.map(function (v, i) {
    const o = Object.assign({}, v.extra || {});
    o.name = String(v.name).trim();
    // Size: a whole number, or a comma-separated list of element names (the engine checks them).
    const size = String(v.size == null ? '' : v.size).trim();
    if (/^\d+$/.test(size)) o.size = Number(size);
    else if (size !== '') o.elements = size.split(',').map(function (t) { return t.trim(); });
    for (const side of ['lower', 'upper']) {
      const t = String(v[side] == null ? '' : v[side]).trim();
      if (t === '') continue;
      const n = parseNumber(t);
      if (n === null) errors.push('error: the ' + side + ' bound `' + t + '` is not a number\n --> unknowns, row ' + (i + 1) + ' (' + (o.name || 'no name') + ')\n');
      else o[side] = n;
    }
    const prior = String(v.prior == null ? '' : v.prior).trim();
    if (prior !== '') o.prior = prior;
    return o;
  });
  if (f.kind === 'mixture') {
    spec.mixture = f.mixture.map(function (c, i) {
      const o = Object.assign({}, c.extra || {});
      const where = ' --> mixture, component ' + (i + 1) + '\n';
      const w = parseNumber(c.weight);
      if (w === null) errors.push('error: the weight `' + c.weight + '` is not a number\n' + where); else o.weight = w;
      const m = parseList(c.mean);
      if (m.bad != null) errors.push('error: `' + m.bad + '` in the mean is not a number\n' + where); else o.mean = m.values;
      if (c.shape === 'sd') {
        const s = parseList(c.spread);
        if (s.bad != null) errors.push('error: `' + s.bad + '` in the standard deviations is not a number\n' + where); else o.sd = s.values;
      } else {
        const s = parseMatrix(c.spread);
        if (s.bad != null) errors.push('error: `' + s.bad + '` in the covariance is not a number\n' + where); else o.cov = s.values;
      }
      return o;
    });
  } else {
    if (f.dataCsv.trim()) spec.data = f.dataCsv;
    spec[f.kind] = f.formula;
  }
  const ps = parseSettings(settingsText);
  for (const e of ps.errors) errors.push(e);
  spec.settings = Object.assign({}, f.extraSettings || {}, ps.settings);
  for (const k of Object.keys(f.extra || {})) spec[k] = f.extra[k];
  return { spec: spec, errors: errors, settings: ps.settings };
}

function listText(a) {
  return Array.isArray(a) ? a.map(str).join(', ') : str(a);
}

/** A parsed spec object -> {form, settings}; throws only when the spec is not a JSON object. */
export function specToForm(spec) {
  if (!spec || typeof spec !== 'object' || Array.isArray(spec)) throw new Error('a spec must be a JSON object ({ … })');
  const form = emptyForm();
  form.variables = [];
  const extra = {};
  for (const k of Object.keys(spec)) if (SPEC_KEYS.indexOf(k) < 0) extra[k] = spec[k];
  if ('title' in spec) { if (typeof spec.title === 'string') form.title = spec.title; else extra.title = spec.title; }
  if ('notes' in spec) { if (typeof spec.notes === 'string') form.notes = spec.notes; else extra.notes = spec.notes; }
  if (Array.isArray(spec.variables) && spec.variables.every(function (v) { return v && typeof v === 'object' && !Array.isArray(v); })) {
    form.variables = spec.variables.map(function (v) {
      const rest = {};
      const shown = ['name', 'lower', 'upper'];
      let size = '';
      if (typeof v.size === 'number' && !('elements' in v)) { size = String(v.size); shown.push('size'); }
      else if (!('size' in v) && Array.isArray(v.elements) && v.elements.length && v.elements.every(function (e) { return typeof e === 'string' && e.indexOf(',') < 0 && e.trim() === e && e !== ''; })) {
        size = v.elements.join(', '); shown.push('elements');
      }
      let prior = '';
      if (typeof v.prior === 'string' && v.prior.trim() === v.prior && v.prior !== '') { prior = v.prior; shown.push('prior'); }
      for (const k of Object.keys(v)) if (shown.indexOf(k) < 0) rest[k] = v[k];
      return { name: str(v.name), size: size, lower: str(v.lower), upper: str(v.upper), prior: prior, extra: Object.keys(rest).length ? rest : null };
    });
  } else if ('variables' in spec) extra.variables = spec.variables;
  const kinds = KINDS.filter(function (k) { return k in spec; });
  if (kinds.length) {
    const k = kinds[0];
    if (k === 'mixture') {
      if (Array.isArray(spec.mixture) && spec.mixture.every(function (c) { return c && typeof c === 'object' && !Array.isArray(c); })) {
        form.kind = 'mixture';
        form.mixture = spec.mixture.map(function (c) {
          const rest = {};
          for (const key of Object.keys(c)) if (['weight', 'mean', 'cov', 'sd'].indexOf(key) < 0) rest[key] = c[key];
          const useSd = 'sd' in c && !('cov' in c);
          if ('sd' in c && 'cov' in c) rest.sd = c.sd;
          return {
            weight: str(c.weight), mean: listText(c.mean), shape: useSd ? 'sd' : 'cov',
            spread: useSd ? listText(c.sd) : (Array.isArray(c.cov) ? c.cov.map(listText).join('; ') : str(c.cov)),
            extra: Object.keys(rest).length ? rest : null,
          };
        });
      } else { form.kind = 'mixture'; extra.mixture = spec.mixture; }
    } else if (typeof spec[k] === 'string') { form.kind = k; form.formula = spec[k]; } else { form.kind = k; extra[k] = spec[k]; }
    for (const other of kinds.slice(1)) extra[other] = spec[other];
  }
  if ('data' in spec) {
    const d = spec.data;
    if (typeof d === 'string' && form.kind !== 'mixture') form.dataCsv = d;
    else if (d && typeof d === 'object' && !Array.isArray(d) && Object.keys(d).every(function (k) { return Array.isArray(d[k]) && d[k].every(isNum); })) {
      form.dataCsv = columnsToCsv(d);
      if (form.kind === 'mixture') extra.data = d;
    } else extra.data = d;
  }
  const settings = Object.assign({}, DEFAULT_SETTINGS);
  if ('settings' in spec) {
    const s = spec.settings;
    if (s && typeof s === 'object' && !Array.isArray(s)) {
      for (const k of Object.keys(s)) {
        if (SETTING_KEYS.indexOf(k) >= 0 && (typeof s[k] === 'number' || typeof s[k] === 'string')) settings[k] = String(s[k]);
        else form.extraSettings[k] = s[k];
      }
    } else extra.settings = s;
  }
  form.extra = extra;
  return { form: form, settings: settings };
}

/** A form read back from storage (any JSON) -> a well-formed form; every text is kept. */
export function sanitiseForm(f) {
  const base = emptyForm();
  if (!f || typeof f !== 'object') return base;
  return {
    title: str(f.title), notes: str(f.notes),
    kind: KINDS.indexOf(f.kind) >= 0 ? f.kind : 'energy',
    formula: str(f.formula), dataCsv: str(f.dataCsv),
    variables: Array.isArray(f.variables) ? f.variables.filter(function (v) { return v && typeof v === 'object'; }).map(function (v) {
      return { name: str(v.name), size: str(v.size), lower: str(v.lower), upper: str(v.upper), prior: str(v.prior), extra: v.extra && typeof v.extra === 'object' ? v.extra : null };
    }) : base.variables,
    mixture: Array.isArray(f.mixture) ? f.mixture.filter(function (c) { return c && typeof c === 'object'; }).map(function (c) {
      return { weight: str(c.weight), mean: str(c.mean), shape: c.shape === 'sd' ? 'sd' : 'cov', spread: str(c.spread), extra: c.extra && typeof c.extra === 'object' ? c.extra : null };
    }) : [],
    extra: f.extra && typeof f.extra === 'object' && !Array.isArray(f.extra) ? f.extra : {},
    extraSettings: f.extraSettings && typeof f.extraSettings === 'object' && !Array.isArray(f.extraSettings) ? f.extraSettings : {},
  };
}

/** Settings read back from storage -> the defaults overlaid with every known key, as text. */
export function sanitiseSettings(s) {
  const out = Object.assign({}, DEFAULT_SETTINGS);
  if (s && typeof s === 'object') for (const k of SETTING_KEYS) if (s[k] != null) out[k] = str(s[k]);
  return out;
}
