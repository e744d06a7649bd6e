// Kiln page: UI state on the main thread. All engine work happens in workers (engine.js).
//
// Safety rule for this file: text that came from a spec, a share link, a file, a demo or the
// engine is only ever put into the page with textContent / createTextNode / input values,
// never as HTML. The helper el() below has no way to set HTML.
//
// data-testid attributes for end-to-end tests:
//   demo-select      select: load a demo into the active model
//   open-spec        button: open a spec file        download-spec   button (top bar): save spec JSON
//   share-button     button: copy share link         share-link      input holding the last share link
//   notice           page-level message (status, share errors, undo)
//   slot-a, slot-b   model slot tabs                 b-copy, b-empty buttons to start model B
//   title-input      model title                     notes-input     description
//   model-kind       fieldset of radios (energy | log_density | mixture)
//   spec-editor      the whole model form            formula-editor  the formula textarea
//   error-box        <pre> with check / local errors (the engine's `rendered` text)
//   check-status     line under the editor           check-modes     table of modes found by the check
//   unknowns-table   unknowns editor (rows: unknown-name, unknown-lower, unknown-upper, unknown-remove)
//   add-unknown      button                          data-csv        CSV textarea
//   data-file-button button: load a CSV file        data-summary    rows/columns of the data
//   mixture-table    mixture editor                  add-component   button
//   seed-input, chains-input, draws-input, warmup-input, method-select, integrator-select
//   run-button       run the active model            run-both-button run A then B
//   cancel-button    stop the run at once            progress        <progress>  progress-text
//   report-title, report-meta, stale-note, run-error, run-error-text
//   verdict          the verdict line                logz-value      log Z ± SE   logz-sub
//   cross-checks     table                           warnings        warnings and notes
//   mode-table       table of modes                  unknowns-summary table of unknowns
//   diagnostics      <dl>                            pair-x, pair-y  unknowns shown in the density map
//   plot-density, plot-marginals, plot-beta, plot-running      the canvases
//   save-png-density, save-png-marginals, save-png-beta, save-png-running
//   download-csv, download-json, download-spec-results, save-single, print-button
//   body[data-ready="true"]      set once the page has loaded everything it will load
//   body[data-run-state]         idle | running | done | cancelled | error (the latest run)
//   compare-card     Bayes factor card               bayes-factor    log(Z_A/Z_B) ± SE
//   how-to-read      the note on when not to trust the numbers
(function () {
  'use strict';

  const $ = function (id) { return document.getElementById(id); };
  let STORAGE_KEY = 'kiln.workspace.v1';
  const SETTING_KEYS = ['seed', 'chains', 'draws', 'warmup', 'method', 'integrator'];
  const DEFAULT_SETTINGS = { seed: '1', chains: '4', draws: '2000', warmup: '1000', method: 'alternating', integrator: 'nuts' };
  const SPEC_KEYS = ['title', 'notes', 'variables', 'data', 'energy', 'log_density', 'mixture', 'settings'];
  const DEFAULT_DEMO = 'default-two-modes.json';

  // ------------------------------------------------------------------ DOM helpers
  // el('td', {class: 'num', title: '…'}, 'text', childNode, …): strings become text nodes.
  function el(tag, props) {
    const e = document.createElement(tag);
    if (props) {
      for (const k of Object.keys(props)) {
        const v = props[k];
        if (v == null || v === false) continue;
        if (k === 'class') e.className = v;
        else if (k === 'text') e.textContent = String(v);
        else if (k === 'dataset') Object.assign(e.dataset, v);
        else if (k.slice(0, 2) === 'on') {
          if (typeof v !== 'function') throw new Error('event handlers must be functions');
          e.addEventListener(k.slice(2), v);
        } else if (k === 'value' || k === 'checked' || k === 'disabled' || k === 'selected' || k === 'hidden') e[k] = v;
        else e.setAttribute(k, v === true ? '' : String(v));
      }
    }
    for (let i = 2; i < arguments.length; i++) append(e, arguments[i]);
    return e;
  }
  function append(parent) {
    for (let i = 1; i < arguments.length; i++) {
      const c = arguments[i];
      if (c == null || c === false) continue;
      if (Array.isArray(c)) { for (const x of c) append(parent, x); continue; }
      parent.appendChild(c instanceof Node ? c : document.createTextNode(String(c)));
    }
  }
  function clear(node) { while (node.firstChild) node.removeChild(node.firstChild); }
  function setChildren(node) { clear(node); for (let i = 1; i < arguments.length; i++) append(node, arguments[i]); }

  // ------------------------------------------------------------------ number formatting
  // Numbers in the page use the ASCII hyphen-minus so that they copy into other tools intact.
  function minus(s) { return String(s); }
  function isNum(v) { return typeof v === 'number' && isFinite(v); }
  function fmtSig(v, sig) {
    if (v == null) return '—';
    if (typeof v !== 'number') return String(v);
    if (!isFinite(v)) return v > 0 ? '∞' : v < 0 ? '−∞' : 'NaN';
    sig = sig || 4;
    const a = Math.abs(v);
    if (a !== 0 && (a >= 1e6 || a < 1e-4)) return minus(v.toExponential(sig - 1).replace('e+', 'e'));
    return minus(String(Number(v.toPrecision(sig))));
  }
  function decimalsFor(se) { return Math.max(0, Math.min(10, 1 - Math.floor(Math.log10(se)))); }
  function fmtFixed(v, d) { if (!isNum(v)) return fmtSig(v); const t = v.toFixed(d); return minus(/^-0\.?0*$/.test(t) ? t.slice(1) : t); }
  // Engine sentences start in lower case (they also appear mid-sentence in the command line).
  function sentence(t) { t = str(t); return t ? t.charAt(0).toUpperCase() + t.slice(1) : t; }
  function fmtPM(v, se) {
    if (!isNum(v)) return fmtSig(v);
    if (se === 0) return fmtSig(v, 6) + ' ± 0';
    if (!isNum(se) || se < 0) return fmtSig(v, 6);
    const d = decimalsFor(se);
    return minus(v.toFixed(d)) + ' ± ' + se.toFixed(d);
  }
  function fmtInt(v) { return isNum(v) ? Math.round(v).toLocaleString('en-US') : fmtSig(v); }
  function fmtPct(v) { return isNum(v) ? (v * 100).toFixed(v < 0.001 && v > 0 ? 2 : 1) + ' %' : fmtSig(v); }
  function fmtDuration(ms) {
    if (!isNum(ms)) return '';
    const s = ms / 1000;
    if (s < 1) return 'under a second';
    if (s < 60) return Math.round(s) + ' s';
    const m = Math.floor(s / 60);
    return m + ' min ' + Math.round(s - 60 * m) + ' s';
  }

  // ------------------------------------------------------------------ state
  function emptyForm() {
    return { title: '', notes: '', kind: 'energy', formula: '', variables: [{ name: 'x', lower: '', upper: '' }],
      dataCsv: '', mixture: [], extra: {}, extraSettings: {} };
  }
  function newSlot(form, settings) {
    return { form: form || emptyForm(), settings: Object.assign({}, DEFAULT_SETTINGS, settings || {}),
      check: null, checkToken: 0, checkTimer: null, lastCheckJson: null,
      run: null, grid: null, gridKey: null, gridToken: 0, pair: [0, 1] };
  }
  const state = {
    active: 'A',
    slots: { A: newSlot(), B: null },
    demos: [],
    running: null,   // {slotId, handle, cancelled}
    queue: [],       // slot ids waiting to run after the current one
    undo: null,
  };
  function activeSlot() { return state.slots[state.active]; }

  // The engine. The page fetches the worker script, the engine glue and the .wasm once, at load,
  // and starts every worker from a Blob URL with the bytes handed over: a run never fetches
  // anything. A single-file page (single.js) supplies the same parts from its embedded copy.
  const single = self.KilnSingle ? self.KilnSingle : null;
  const embeddedBundle = single && single.embedded ? single.embedded() : null;
  async function fetchOk(path, how) {
    const r = await fetch(path, { cache: 'no-store' });
    if (!r.ok) throw new Error(path + ': HTTP ' + r.status);
    return how === 'bytes' ? r.arrayBuffer() : r.text();
  }
  async function makeEngine() {
    const opts = single && single.engineOptions ? single.engineOptions() : null;
    if (opts) return KilnEngine.create(opts);
    try {
      const parts = await Promise.all([fetchOk('pkg/kiln.js'), fetchOk('worker.js'), fetchOk('pkg/kiln_bg.wasm', 'bytes')]);
      return KilnEngine.create({ workerSource: parts[0] + '\n' + parts[1], wasmBytes: parts[2] });
    } catch (e) {
      // Let the workers load the files themselves; they report what is missing.
      return KilnEngine.create({ workerUrl: 'worker.js' });
    }
  }
  const engineP = makeEngine();
  let engineReady = false;
  engineP.then(function () { engineReady = true; scheduleRender(); });
  let firstCheckResolve = null;
  const firstCheckDone = new Promise(function (resolve) { firstCheckResolve = resolve; });

  // ------------------------------------------------------------------ parsing the form
  const NUMBER_RE = /^[+-]?(\d+\.?\d*|\.\d+)([eE][+-]?\d+)?$/;
  function parseNumber(t) {
    t = String(t).trim();
    if (!NUMBER_RE.test(t)) return null;
    const n = Number(t);
    return isFinite(n) ? n : null;
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

  // RFC 4180-style CSV (quotes, doubled quotes); delimiter , or ; or tab taken from the header.
  function splitCsv(text, delim) {
    const records = [];
    let row = [], field = '', inQ = false, line = 1, startLine = 1, i = 0;
    const n = text.length;
    while (i < n) {
      const c = text[i];
      if (inQ) {
        if (c === '"') { if (text[i + 1] === '"') { field += '"'; i += 2; continue; } inQ = false; i++; continue; }
        if (c === '\n') line++;
        field += c; i++; continue;
      }
      if (c === '"' && field.trim() === '') { field = ''; inQ = true; i++; continue; }
      if (c === delim) { row.push(field); field = ''; i++; continue; }
      if (c === '\r') { i++; continue; }
      if (c === '\n') { row.push(field); records.push({ line: startLine, fields: row }); row = []; field = ''; line++; startLine = line; i++; continue; }
      field += c; i++;
    }
    if (field.length || row.length) { row.push(field); records.push({ line: startLine, fields: row }); }
    return records.filter(function (r) { return !(r.fields.length === 1 && r.fields[0].trim() === ''); });
  }
  function parseCsv(text) {
    const first = (text.split('\n').find(function (l) { return l.trim().length; }) || '');
    const delim = first.indexOf('\t') >= 0 ? '\t' : (first.indexOf(';') >= 0 && first.indexOf(',') < 0) ? ';' : ',';
    const recs = splitCsv(text, delim);
    const errors = [];
    if (!recs.length) return { columns: null, names: [], rows: 0, errors: errors };
    const names = recs[0].fields.map(function (s) { return s.trim(); });
    names.forEach(function (nm, j) {
      if (!nm) errors.push('error: column ' + (j + 1) + ' of the header row has no name\n --> data, line ' + recs[0].line + '\n');
      else if (!/^[A-Za-z_][A-Za-z0-9_]*$/.test(nm)) errors.push('error: the column name `' + nm + '` is not a valid name (letters, digits and _, not starting with a digit)\n --> data, line ' + recs[0].line + ', column ' + (j + 1) + '\n');
      else if (names.indexOf(nm) !== j) errors.push('error: the column name `' + nm + '` appears twice\n --> data, line ' + recs[0].line + '\n');
    });
    const cols = names.map(function () { return []; });
    for (let r = 1; r < recs.length && errors.length < 6; r++) {
      const f = recs[r].fields;
      if (f.length !== names.length) {
        errors.push('error: this row has ' + f.length + (f.length === 1 ? ' value' : ' values') + ', the header has ' + names.length + '\n --> data, line ' + recs[r].line + '\n');
        continue;
      }
      for (let j = 0; j < f.length; j++) {
        const v = parseNumber(f[j]);
        if (v === null) {
          errors.push('error: `' + f[j].trim().slice(0, 40) + '` is not a number\n --> data, line ' + recs[r].line + ', column ' + (j + 1) + ' (' + names[j] + ')\n');
          if (errors.length >= 6) break;
        } else cols[j].push(v);
      }
    }
    const columns = {};
    names.forEach(function (nm, j) { columns[nm] = cols[j]; });
    return { columns: columns, names: names, rows: recs.length - 1, errors: errors };
  }
  function csvField(s) { s = String(s); return /[",;\n\r\t]/.test(s) ? '"' + s.replace(/"/g, '""') + '"' : s; }
  function columnsToCsv(data) {
    const names = Object.keys(data);
    if (!names.length) return '';
    let n = 0;
    for (const k of names) n = Math.max(n, Array.isArray(data[k]) ? data[k].length : 0);
    const lines = [names.map(csvField).join(',')];
    for (let i = 0; i < n; i++) {
      lines.push(names.map(function (k) { const c = data[k]; return Array.isArray(c) && i < c.length ? csvField(c[i]) : ''; }).join(','));
    }
    return lines.join('\n') + '\n';
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

  // The spec the form describes, or local errors (rendered like the engine's).
  function buildSpec(slot) {
    const f = slot.form;
    const errors = [];
    const spec = {};
    if (f.title.trim()) spec.title = f.title;
    if (f.notes.trim()) spec.notes = f.notes;
    spec.variables = f.variables.map(function (v, i) {
      const o = Object.assign({}, v.extra || {});
      o.name = String(v.name).trim();
      for (const side of ['lower', 'upper']) {
        const t = String(v[side] == null ? '' : v[side]).trim();
        if (t === '') continue;
        const n = parseNumber(t);
        if (n === null) errors.push('error: the ' + side + ' bound `' + t + '` is not a number\n --> unknowns, row ' + (i + 1) + ' (' + (o.name || 'no name') + ')\n');
        else o[side] = n;
      }
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
      if (f.dataCsv.trim()) {
        const d = parseCsv(f.dataCsv);
        for (const e of d.errors) errors.push(e);
        if (!d.errors.length && d.columns) spec.data = d.columns;
      }
      spec[f.kind] = f.formula;
    }
    const ps = parseSettings(slot.settings);
    for (const e of ps.errors) errors.push(e);
    spec.settings = Object.assign({}, f.extraSettings || {}, ps.settings);
    for (const k of Object.keys(f.extra || {})) spec[k] = f.extra[k];
    return { spec: spec, errors: errors, settings: ps.settings };
  }

  function str(v) { return v == null ? '' : String(v); }
  function listText(a) { return Array.isArray(a) ? a.map(str).join(', ') : str(a); }

  // A parsed spec object -> form + settings. Anything the form cannot hold is kept verbatim in
  // `extra` so that the engine (not the page) judges it.
  function specToForm(spec) {
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
        for (const k of Object.keys(v)) if (['name', 'lower', 'upper'].indexOf(k) < 0) rest[k] = v[k];
        return { name: str(v.name), lower: str(v.lower), upper: str(v.upper), extra: Object.keys(rest).length ? rest : null };
      });
    } else if ('variables' in spec) extra.variables = spec.variables;
    const kinds = ['energy', 'log_density', 'mixture'].filter(function (k) { return k in spec; });
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
      if (d && typeof d === 'object' && !Array.isArray(d) && Object.keys(d).every(function (k) { return Array.isArray(d[k]) && d[k].every(isNum); })) {
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

  // ------------------------------------------------------------------ persistence
  let saveTimer = null;
  let storageWarned = false;
  function saveSoon() {
    clearTimeout(saveTimer);
    saveTimer = setTimeout(saveNow, 250);
  }
  // The form as typed (so nothing typed is lost, even when it does not parse yet) and, when it
  // parses, the spec it describes.
  function slotSnapshot(s) {
    if (!s) return null;
    const b = buildSpec(s);
    return { form: s.form, settings: s.settings, spec: b.errors.length ? null : b.spec };
  }
  function saveNow() {
    try {
      localStorage.setItem(STORAGE_KEY, JSON.stringify({ v: 1, active: state.active, A: slotSnapshot(state.slots.A), B: slotSnapshot(state.slots.B) }));
    } catch (e) {
      if (!storageWarned) {
        storageWarned = true;
        notice(['This model is too large to keep in the browser\'s storage, so it will not be restored on reload. Use “Save spec” to keep it in a file.'], { bad: true });
      }
    }
  }
  function sanitiseStoredForm(f) {
    const base = emptyForm();
    if (!f || typeof f !== 'object') return base;
    const out = {
      title: str(f.title), notes: str(f.notes),
      kind: ['energy', 'log_density', 'mixture'].indexOf(f.kind) >= 0 ? f.kind : 'energy',
      formula: str(f.formula), dataCsv: str(f.dataCsv),
      variables: Array.isArray(f.variables) ? f.variables.filter(function (v) { return v && typeof v === 'object'; }).map(function (v) {
        return { name: str(v.name), lower: str(v.lower), upper: str(v.upper), extra: v.extra && typeof v.extra === 'object' ? v.extra : null };
      }) : base.variables,
      mixture: Array.isArray(f.mixture) ? f.mixture.filter(function (c) { return c && typeof c === 'object'; }).map(function (c) {
        return { weight: str(c.weight), mean: str(c.mean), shape: c.shape === 'sd' ? 'sd' : 'cov', spread: str(c.spread), extra: c.extra && typeof c.extra === 'object' ? c.extra : null };
      }) : [],
      extra: f.extra && typeof f.extra === 'object' && !Array.isArray(f.extra) ? f.extra : {},
      extraSettings: f.extraSettings && typeof f.extraSettings === 'object' && !Array.isArray(f.extraSettings) ? f.extraSettings : {},
    };
    return out;
  }
  function sanitiseSettings(s) {
    const out = Object.assign({}, DEFAULT_SETTINGS);
    if (s && typeof s === 'object') for (const k of SETTING_KEYS) if (s[k] != null) out[k] = str(s[k]);
    return out;
  }
  function restore() {
    let raw = null;
    try { raw = localStorage.getItem(STORAGE_KEY); } catch (e) { raw = null; }
    if (!raw) return false;
    try {
      const w = JSON.parse(raw);
      if (!w || w.v !== 1 || !w.A) return false;
      state.slots.A = newSlot(sanitiseStoredForm(w.A.form), sanitiseSettings(w.A.settings));
      state.slots.B = w.B ? newSlot(sanitiseStoredForm(w.B.form), sanitiseSettings(w.B.settings)) : null;
      state.active = w.active === 'B' && state.slots.B ? 'B' : 'A';
      return true;
    } catch (e) { return false; }
  }

  // ------------------------------------------------------------------ notices
  function notice(parts, opt) {
    opt = opt || {};
    const box = $('notice');
    const body = $('notice-body');
    setChildren(body, parts);
    if (opt.action) {
      append(body, ' ');
      append(body, el('button', { type: 'button', class: 'small', 'data-testid': 'notice-action', onclick: function () { opt.action.fn(); hideNotice(); } }, opt.action.label));
    }
    box.classList.toggle('bad', !!opt.bad);
    box.hidden = false;
  }
  function hideNotice() { $('notice').hidden = true; }

  // Replace the model in a slot, keeping the previous one for an undo.
  function replaceSlotModel(slotId, loaded, label) {
    const models = {};
    models[slotId] = loaded;
    replaceModels(models, label);
  }
  // Replace the models in one or both slots ({A: loaded, B: loaded}), with one undo that
  // restores every replaced slot as it was (an emptied slot B stays empty).
  function replaceModels(models, label) {
    const ids = Object.keys(models).sort();
    const prev = {};
    for (const id of ids) {
      const old = state.slots[id];
      prev[id] = old ? { form: JSON.parse(JSON.stringify(old.form)), settings: Object.assign({}, old.settings) } : null;
      state.slots[id] = newSlot(models[id].form, models[id].settings);
    }
    if (ids.some(function (id) { return prev[id]; })) {
      notice([label + ' (model' + (ids.length > 1 ? 's ' : ' ') + ids.join(' and ') + '). '], {
        action: {
          label: 'Undo', fn: function () {
            if (state.running && ids.indexOf(state.running.slotId) >= 0) return;
            for (const id of ids) {
              const p = prev[id];
              state.slots[id] = p ? newSlot(p.form, p.settings) : id === 'A' ? newSlot() : null;
            }
            if (ids.indexOf('B') >= 0 && !state.slots.B && state.active === 'B') state.active = 'A';
            for (const id of ids) if (state.slots[id]) afterModelReplaced(id);
          },
        },
      });
    }
    for (const id of ids) afterModelReplaced(id);
  }
  function afterModelReplaced(slotId) {
    if (state.active === slotId) writeFormToDom();
    saveSoon();
    scheduleCheck(slotId, 0);
    renderAll();
  }

  // ------------------------------------------------------------------ form <-> DOM
  function writeFormToDom() {
    const slot = activeSlot();
    const isEmptyB = state.active === 'B' && !slot;
    $('slot-b-empty').hidden = !isEmptyB;
    $('model-form').hidden = isEmptyB;
    $('tab-a').setAttribute('aria-selected', String(state.active === 'A'));
    $('tab-b').setAttribute('aria-selected', String(state.active === 'B'));
    if (isEmptyB) return;
    const f = slot.form;
    $('title-input').value = f.title;
    $('notes-input').value = f.notes;
    for (const r of document.querySelectorAll('input[name=kind]')) r.checked = r.value === f.kind;
    $('formula-input').value = f.formula;
    $('data-input').value = f.dataCsv;
    for (const k of SETTING_KEYS) {
      const node = $(k === 'method' ? 'method-select' : k === 'integrator' ? 'integrator-select' : k + '-input');
      node.value = slot.settings[k];
    }
    renderKind();
    renderUnknownRows();
    renderMixtureRows();
    renderDataSummary();
  }

  function renderKind() {
    const f = activeSlot().form;
    $('formula-block').hidden = f.kind === 'mixture';
    $('data-block').hidden = f.kind === 'mixture';
    $('mixture-block').hidden = f.kind !== 'mixture';
    $('formula-label').textContent = f.kind === 'log_density' ? 'Log density' : 'Energy (density ∝ exp(−energy))';
  }

  function renderUnknownRows() {
    const f = activeSlot().form;
    const tb = $('unknowns-table').tBodies[0];
    clear(tb);
    f.variables.forEach(function (v, i) {
      const label = v.name ? '`' + v.name + '`' : 'row ' + (i + 1);
      function input(key, testid, aria, placeholder) {
        return el('input', {
          type: 'text', value: v[key], 'data-testid': testid, 'aria-label': aria, placeholder: placeholder,
          spellcheck: 'false', autocapitalize: 'off', inputmode: key === 'name' ? null : 'decimal',
          oninput: function (ev) { v[key] = ev.target.value; changed(); },
        });
      }
      tb.appendChild(el('tr', null,
        el('td', null, input('name', 'unknown-name', 'Name of unknown ' + (i + 1), 'name')),
        el('td', null, input('lower', 'unknown-lower', 'Lower bound of unknown ' + (i + 1), 'none')),
        el('td', null, input('upper', 'unknown-upper', 'Upper bound of unknown ' + (i + 1), 'none')),
        el('td', null, el('button', {
          type: 'button', class: 'icon', 'data-testid': 'unknown-remove', 'aria-label': 'Remove unknown ' + label, title: 'Remove',
          onclick: function () { f.variables.splice(i, 1); renderUnknownRows(); changed(); focusIn('unknowns-table', Math.min(i, f.variables.length - 1)); },
        }, '×'))));
    });
  }
  function focusIn(tableId, row) {
    const rows = $(tableId).tBodies[0].rows;
    if (row >= 0 && rows[row]) { const i = rows[row].querySelector('input'); if (i) i.focus(); } else $(tableId === 'unknowns-table' ? 'add-unknown' : 'add-component').focus();
  }

  function renderMixtureRows() {
    const f = activeSlot().form;
    const tb = $('mixture-table').tBodies[0];
    clear(tb);
    f.mixture.forEach(function (c, i) {
      const n = i + 1;
      const spread = el('textarea', {
        rows: 1, value: c.spread, spellcheck: 'false', 'data-testid': 'component-spread',
        'aria-label': (c.shape === 'sd' ? 'Standard deviations' : 'Covariance') + ' of component ' + n,
        placeholder: c.shape === 'sd' ? '1, 1' : '1, 0; 0, 1',
        oninput: function (ev) { c.spread = ev.target.value; changed(); },
      });
      tb.appendChild(el('tr', null,
        el('td', null, el('input', { type: 'text', value: c.weight, inputmode: 'decimal', 'data-testid': 'component-weight', 'aria-label': 'Weight of component ' + n, oninput: function (ev) { c.weight = ev.target.value; changed(); } })),
        el('td', null, el('input', { type: 'text', value: c.mean, 'data-testid': 'component-mean', 'aria-label': 'Mean of component ' + n, placeholder: '0, 0', oninput: function (ev) { c.mean = ev.target.value; changed(); } })),
        el('td', { class: 'spread-cell' }, el('select', {
          'aria-label': 'Spread of component ' + n + ' given as', 'data-testid': 'component-shape',
          onchange: function (ev) { c.shape = ev.target.value; renderMixtureRows(); changed(); },
        }, el('option', { value: 'cov', selected: c.shape !== 'sd' }, 'covariance (rows split by ;)'), el('option', { value: 'sd', selected: c.shape === 'sd' }, 'standard deviations')), spread),
        el('td', null, el('button', {
          type: 'button', class: 'icon', 'aria-label': 'Remove component ' + n, title: 'Remove', 'data-testid': 'component-remove',
          onclick: function () { f.mixture.splice(i, 1); renderMixtureRows(); changed(); focusIn('mixture-table', Math.min(i, f.mixture.length - 1)); },
        }, '×'))));
    });
  }

  function renderDataSummary() {
    const f = activeSlot().form;
    const node = $('data-summary');
    if (!f.dataCsv.trim()) { node.textContent = 'No data. Paste CSV with a header row, or load a file; files are read in this browser and never uploaded.'; return; }
    const d = parseCsv(f.dataCsv);
    if (d.errors.length) { node.textContent = 'The data cannot be read yet: see the message above the unknowns.'; return; }
    node.textContent = fmtInt(d.rows) + (d.rows === 1 ? ' row' : ' rows') + ' × ' + d.names.length + (d.names.length === 1 ? ' column: ' : ' columns: ') + d.names.join(', ') + '. Read in this browser; nothing is uploaded.';
  }

  function changed() {
    saveSoon();
    scheduleCheck(state.active);
    renderDataSummary();
    scheduleRender();
  }

  function nextName(vars) {
    const used = new Set(vars.map(function (v) { return v.name; }));
    for (const c of ['x', 'y', 'z', 'u', 'v', 'w']) if (!used.has(c)) return c;
    for (let i = 1; ; i++) if (!used.has('x' + i)) return 'x' + i;
  }

  function wireForm() {
    $('title-input').addEventListener('input', function (ev) { activeSlot().form.title = ev.target.value; changed(); });
    $('notes-input').addEventListener('input', function (ev) { activeSlot().form.notes = ev.target.value; changed(); });
    $('formula-input').addEventListener('input', function (ev) { activeSlot().form.formula = ev.target.value; changed(); });
    $('formula-input').addEventListener('keydown', function (ev) {
      if (ev.key === 'Enter' && (ev.ctrlKey || ev.metaKey)) { ev.preventDefault(); startRun(state.active); }
    });
    $('data-input').addEventListener('input', function (ev) { activeSlot().form.dataCsv = ev.target.value; changed(); });
    for (const r of document.querySelectorAll('input[name=kind]')) {
      r.addEventListener('change', function (ev) {
        const f = activeSlot().form;
        f.kind = ev.target.value;
        if (f.kind === 'mixture' && !f.mixture.length) {
          const D = Math.max(1, f.variables.length);
          f.mixture.push({ weight: '1', mean: new Array(D).fill('0').join(', '), shape: 'sd', spread: new Array(D).fill('1').join(', '), extra: null });
          renderMixtureRows();
        }
        renderKind();
        changed();
      });
    }
    $('add-unknown').addEventListener('click', function () {
      const f = activeSlot().form;
      f.variables.push({ name: nextName(f.variables), lower: '', upper: '' });
      renderUnknownRows();
      changed();
      focusIn('unknowns-table', f.variables.length - 1);
    });
    $('add-component').addEventListener('click', function () {
      const f = activeSlot().form;
      const D = Math.max(1, f.variables.length);
      f.mixture.push({ weight: '1', mean: new Array(D).fill('0').join(', '), shape: 'sd', spread: new Array(D).fill('1').join(', '), extra: null });
      renderMixtureRows();
      changed();
      focusIn('mixture-table', f.mixture.length - 1);
    });
    for (const k of SETTING_KEYS) {
      const id = k === 'method' ? 'method-select' : k === 'integrator' ? 'integrator-select' : k + '-input';
      $(id).addEventListener(id.indexOf('select') > 0 ? 'change' : 'input', function (ev) { activeSlot().settings[k] = ev.target.value; changed(); });
    }
    $('load-csv').addEventListener('click', function () { $('load-csv-file').value = ''; $('load-csv-file').click(); });
    $('load-csv-file').addEventListener('change', function (ev) {
      const file = ev.target.files && ev.target.files[0];
      ev.target.value = '';
      if (!file) return;
      readFileText(file, function (text) {
        const slot = activeSlot();
        slot.form.dataCsv = text;
        $('data-input').value = text;
        changed();
        notice(['Read ' + file.name + ' (' + fmtInt(file.size) + ' bytes) in this browser.']);
      });
    });
    $('model-form').addEventListener('submit', function (ev) { ev.preventDefault(); });
  }

  function readFileText(file, done) {
    if (file.size > 64 * 1024 * 1024) { notice(['The file ' + file.name + ' is larger than 64 MB; Kiln takes at most 10^6 data cells.'], { bad: true }); return; }
    const r = new FileReader();
    r.onload = function () { done(String(r.result)); };
    r.onerror = function () { notice(['The file ' + file.name + ' could not be read.'], { bad: true }); };
    r.readAsText(file);
  }

  // ------------------------------------------------------------------ checking as you type
  function scheduleCheck(slotId, delay) {
    const slot = state.slots[slotId];
    if (!slot) return;
    clearTimeout(slot.checkTimer);
    slot.checkTimer = setTimeout(function () { runCheck(slotId); }, delay == null ? 450 : delay);
  }
  async function runCheck(slotId) {
    const slot = state.slots[slotId];
    if (!slot) return;
    const built = buildSpec(slot);
    const token = ++slot.checkToken;
    if (built.errors.length) {
      slot.check = { error: { kind: 'local', message: built.errors[0].split('\n')[0].replace(/^error: /, ''), rendered: built.errors.join('\n') }, local: true };
      slot.lastCheckJson = null;
      renderCheck();
      scheduleRender();
      firstCheckResolve();
      return;
    }
    const json = JSON.stringify(built.spec);
    if (json === slot.lastCheckJson && slot.check && !slot.check.pending) return;
    slot.lastCheckJson = json;
    slot.check = Object.assign({}, slot.check || {}, { pending: true });
    renderCheck();
    const t0 = performance.now();
    try {
      const engine = await engineP;
      const res = await engine.check(json);
      if (token !== slot.checkToken || state.slots[slotId] !== slot) return;
      slot.check = { result: res, specJson: json, ms: performance.now() - t0 };
    } catch (e) {
      if (e && e.kind === 'cancelled') return;
      if (token !== slot.checkToken || state.slots[slotId] !== slot) return;
      slot.check = { error: e, specJson: json };
      slot.lastCheckJson = null;
    }
    renderCheck();
    ensureGrid(slotId);
    scheduleRender();
    firstCheckResolve();
  }

  function unknownNames(slot) {
    const r = slot.run && slot.run.result;
    if (r && Array.isArray(r.unknowns)) return r.unknowns.map(function (u) { return u.name; });
    const c = slot.check && slot.check.result;
    if (c && Array.isArray(c.unknowns)) return c.unknowns.map(function (u) { return u.name; });
    return slot.form.variables.map(function (v) { return v.name.trim(); });
  }

  function renderCheck() {
    const slot = activeSlot();
    const box = $('error-box');
    const status = $('check-status');
    const modesNode = $('check-modes');
    $('formula-input').classList.remove('invalid');
    if (!slot) return;
    const c = slot.check;
    status.className = 'check-status';
    clear(modesNode);
    if (!c) { box.hidden = true; status.textContent = ''; return; }
    if (c.pending) {
      status.classList.add('busy');
      status.textContent = 'Checking…';
      return;
    }
    if (c.error) {
      box.textContent = c.error.rendered || ('error: ' + (c.error.message || String(c.error)) + '\n');
      box.hidden = false;
      status.textContent = c.local ? 'Not checked yet: fix the problem above.' : 'The engine cannot use this model yet: see the message above.';
      const loc = c.error.location;
      if (loc && (loc.source === 'energy' || loc.source === 'log_density')) $('formula-input').classList.add('invalid');
      return;
    }
    box.hidden = true;
    box.textContent = '';
    const r = c.result;
    const modes = Array.isArray(r.modes) ? r.modes : [];
    status.classList.add('ok');
    const bits = ['Checked: ' + modes.length + (modes.length === 1 ? ' mode' : ' modes') + ' found'];
    if (isNum(r.laplace_log_z)) bits.push('Laplace log Z ' + fmtFixed(r.laplace_log_z, 3));
    if (isNum(r.grid_log_z)) bits.push('grid log Z ' + fmtFixed(r.grid_log_z, 3));
    if (isNum(r.exact_log_z)) bits.push('exact log Z ' + fmtFixed(r.exact_log_z, 3));
    status.textContent = bits.join(' · ') + (isNum(c.ms) ? ' (' + (c.ms < 1000 ? Math.round(c.ms) + ' ms' : fmtDuration(c.ms)) + ')' : '');
    const names = unknownNames(slot);
    if (modes.length) {
      const D = names.length;
      const wide = D > 3;
      const head = el('tr', null, el('th', { scope: 'col' }, '#'),
        wide ? el('th', { scope: 'col' }, 'location') : names.map(function (n) { return el('th', { scope: 'col', class: 'num' }, n); }),
        el('th', { scope: 'col', class: 'num' }, 'energy'), el('th', { scope: 'col', class: 'num' }, 'Laplace mass'));
      const body = modes.slice(0, 30).map(function (m, k) {
        const loc = Array.isArray(m.location) ? m.location : [];
        return el('tr', null,
          el('td', null, el('span', { class: 'swatch', 'aria-hidden': 'true', dataset: { mode: String(k + 1) } }), String(k + 1), m.non_quadratic ? el('span', { class: 'flag', title: 'measured to be far from Gaussian' }, ' *') : null),
          wide ? el('td', { class: 'note' }, loc.map(function (v, i) { return (names[i] || '?') + ' = ' + fmtSig(v); }).join(', '))
            : loc.map(function (v) { return el('td', { class: 'num' }, fmtSig(v)); }),
          el('td', { class: 'num' }, fmtSig(m.energy, 5)),
          el('td', { class: 'num' }, fmtSig(m.laplace_mass, 3)));
      });
      const table = el('table', { class: 'data-table' }, el('caption', null, 'Modes found by the optimiser'), el('thead', null, head), el('tbody', null, body));
      append(modesNode, el('div', { class: 'table-scroll' }, table));
      if (modes.length > 30) append(modesNode, el('p', { class: 'hint' }, '… and ' + (modes.length - 30) + ' more (all are in the results).'));
      if (modes.some(function (m) { return m.non_quadratic; })) append(modesNode, el('p', { class: 'hint' }, '* measured to be far from Gaussian: the Laplace value is unreliable for it.'));
      colourSwatches(modesNode);
    }
    const warns = (Array.isArray(r.warnings) ? r.warnings : []).concat(r.grid && Array.isArray(r.grid.warnings) ? r.grid.warnings : []);
    if (warns.length) append(modesNode, warnList(warns.map(function (w) { return { text: w, kind: 'warning' }; })));
  }

  function colourSwatches(root) {
    for (const s of root.querySelectorAll('.swatch[data-mode]')) s.style.background = KilnPlots.modeColor(Number(s.dataset.mode));
  }

  function warnList(items) {
    return el('ul', { class: 'warn-list' }, items.map(function (it) {
      return el('li', { class: it.kind }, it.source ? el('span', { class: 'source' }, it.source) : null, sentence(it.text));
    }));
  }

  // ------------------------------------------------------------------ density grid (D ≤ 2)
  function quantiles(arr, q) {
    const a = [];
    for (const v of arr) if (isFinite(v)) a.push(v);
    if (!a.length) return null;
    a.sort(function (x, y) { return x - y; });
    return [a[Math.floor(q * (a.length - 1))], a[Math.ceil((1 - q) * (a.length - 1))]];
  }
  function axisExtent(slot, i) {
    const c = slot.check && slot.check.result;
    const unknowns = (c && c.unknowns) || [];
    const u = unknowns[i] || {};
    let lo = Infinity, hi = -Infinity;
    const all = (c && Array.isArray(c.modes)) ? c.modes : [];
    let top = 0;
    for (const m of all) if (isNum(m.laplace_mass)) top = Math.max(top, m.laplace_mass);
    // Modes with a negligible share would stretch the map over empty space.
    const modes = top > 0 ? all.filter(function (m) { return !isNum(m.laplace_mass) || m.laplace_mass >= 1e-4 * top; }) : all;
    for (const m of modes) {
      const x = m.location && m.location[i];
      if (!isNum(x)) continue;
      const s = m.sd && isNum(m.sd[i]) && m.sd[i] > 0 ? m.sd[i] : 1;
      lo = Math.min(lo, x - 5 * s); hi = Math.max(hi, x + 5 * s);
    }
    const d = slot.run && slot.run.status === 'done' && slot.run.draws;
    if (d && d.cols[i]) {
      const q = quantiles(d.cols[i], 0.002);
      if (q) { const w = (q[1] - q[0]) * 0.15 || 1; lo = Math.min(lo, q[0] - w); hi = Math.max(hi, q[1] + w); }
    }
    if (!(hi > lo)) { lo = -3; hi = 3; }
    if (isNum(u.lower)) lo = Math.max(lo, u.lower);
    if (isNum(u.upper)) hi = Math.min(hi, u.upper);
    if (!(hi > lo)) { hi = lo + 1; }
    // Round outward to 3 significant digits of the span, so that small changes reuse the grid.
    const step = Math.pow(10, Math.floor(Math.log10(hi - lo)) - 2);
    return [Math.floor(lo / step) * step, Math.ceil(hi / step) * step].map(function (v, k) {
      if (k === 0 && isNum(u.lower)) return Math.max(v, u.lower);
      if (k === 1 && isNum(u.upper)) return Math.min(v, u.upper);
      return v;
    });
  }
  function ensureGrid(slotId) {
    const slot = state.slots[slotId];
    const c = slot && slot.check && slot.check.result;
    if (!c) return;
    const D = c.dimension || (c.unknowns ? c.unknowns.length : 0);
    if (D < 1 || D > 2) { slot.grid = null; slot.gridKey = null; return; }
    const json = slot.check.specJson;
    const rows = Math.max(1, Number(c.data_rows) || 1);
    const ix = D === 2 ? slot.pair[0] : 0, iy = D === 2 ? slot.pair[1] : 0;
    const ex = axisExtent(slot, ix);
    const ey = D === 2 ? axisExtent(slot, iy) : [0, 1];
    let nx, ny;
    if (D === 2) { nx = ny = Math.max(40, Math.min(180, Math.floor(Math.sqrt(4e6 / rows)))); } else { nx = Math.max(100, Math.min(900, Math.floor(4e6 / rows))); ny = 1; }
    const key = [json, ix, iy, ex[0], ex[1], ey[0], ey[1], nx, ny].join('|');
    if (key === slot.gridKey) return;
    slot.gridKey = key;
    const token = ++slot.gridToken;
    engineP.then(function (engine) { return engine.grid(json, { ix: ix, iy: iy, xmin: ex[0], xmax: ex[1], ymin: ey[0], ymax: ey[1], nx: nx, ny: ny }); }).then(function (values) {
      if (token !== slot.gridToken) return;
      slot.grid = { values: values, nx: nx, ny: ny, xmin: ex[0], xmax: ex[1], ymin: ey[0], ymax: ey[1], ix: ix, iy: iy, specJson: json };
      scheduleRender();
    }, function (e) {
      if (token !== slot.gridToken || (e && e.kind === 'cancelled')) { if (token === slot.gridToken) slot.gridKey = null; return; }
      slot.grid = { error: e };
      scheduleRender();
    });
  }

  // ------------------------------------------------------------------ running
  function normaliseDraws(d, D) {
    if (!d || !Array.isArray(d.x)) return null;
    const n = Array.isArray(d.mode) ? d.mode.length : Array.isArray(d.beta) ? d.beta.length : -1;
    let cols;
    const colsLike = d.x.length === D && Array.isArray(d.x[0]) && (n < 0 || d.x[0].length === n);
    if (colsLike) cols = d.x;
    else if (n >= 0 && d.x.length === n) {
      cols = [];
      for (let j = 0; j < D; j++) cols.push(d.x.map(function (row) { return row[j]; }));
    } else return null;
    return { names: Array.isArray(d.names) ? d.names.map(String) : null, cols: cols, mode: Array.isArray(d.mode) ? d.mode : null, beta: d.beta || null };
  }

  function setRunState(v) { document.body.dataset.runState = v; }

  async function startRun(slotId, queueRest) {
    if (state.running || !engineReady) return;
    const slot = state.slots[slotId];
    if (!slot) return;
    const built = buildSpec(slot);
    if (built.errors.length) {
      if (state.active !== slotId) switchSlot(slotId);
      slot.check = { error: { kind: 'local', message: built.errors[0].split('\n')[0].replace(/^error: /, ''), rendered: built.errors.join('\n') }, local: true };
      renderCheck();
      setProgressText('Fix the problems in model ' + slotId + ' first (shown under its editor).');
      state.queue = [];
      return;
    }
    state.queue = queueRest || [];
    const json = JSON.stringify(built.spec);
    const run = { status: 'running', specJson: json, overrides: built.settings, started: performance.now(), phase: 'Starting…', info: null, progress: null, result: null, draws: null, csv: null, error: null };
    slot.run = run;
    const running = { slotId: slotId, handle: null, cancelled: false };
    state.running = running;
    setRunState('running');
    renderAll();
    const engine = await engineP;
    if (running.cancelled) { finishRun(slot, run, running, { kind: 'cancelled' }); return; }
    const handle = engine.run(json, built.settings, {
      onPhase: function (t) { if (slot.run === run && run.status === 'running') { run.phase = t; scheduleRender(); } },
      onProgress: function (info) {
        if (slot.run !== run || run.status !== 'running') return;
        run.info = info;
        run.progress = info.progress;
        // For tests and benchmarks: the latest running log Z and its SE, as data attributes.
        const rl = info.progress && info.progress.running;
        if (rl && rl.length) {
          document.body.dataset.runningSe = String(rl[rl.length - 1].log_z_se);
          document.body.dataset.runningDraws = String(rl[rl.length - 1].draws);
        }
        scheduleRender();
      },
    });
    running.handle = handle;
    handle.done.then(function (fin) {
      const D = fin.result && Array.isArray(fin.result.unknowns) ? fin.result.unknowns.length : unknownNames(slot).length;
      Object.assign(run, {
        status: 'done', result: fin.result, draws: normaliseDraws(fin.draws, D), csv: fin.csv,
        progress: fin.progress || run.progress, elapsed: fin.elapsed, workers: fin.workers,
      });
      finishRun(slot, run, running, null);
    }, function (e) { finishRun(slot, run, running, e); });
  }
  function finishRun(slot, run, running, e) {
    if (e) {
      run.elapsed = performance.now() - run.started;
      if (e.kind === 'cancelled') run.status = 'cancelled'; else { run.status = 'error'; run.error = e; }
      state.queue = [];
    }
    if (state.running === running) state.running = null;
    setRunState(run.status);
    if (run.status === 'done') ensureGrid(state.slots.A === slot ? 'A' : 'B');
    renderAll();
    const next = state.queue.shift();
    if (next) startRun(next, state.queue);
  }

  function cancelRun() {
    state.queue = [];
    const r = state.running;
    if (!r) return;
    r.cancelled = true;
    if (r.handle) r.handle.cancel();
  }

  function setProgressText(t) { $('progress-text').textContent = t; }

  function renderRunBar() {
    const runBtn = $('run');
    const r = state.running;
    runBtn.textContent = 'Run model ' + state.active;
    runBtn.disabled = !!r || !activeSlot() || !engineReady;
    $('cancel').disabled = !r;
    $('run-both').hidden = !state.slots.B;
    $('run-both').disabled = !!r;
    const prog = $('progress');
    if (r) {
      const run = state.slots[r.slotId].run;
      const info = run.info;
      const who = state.slots.B ? 'Model ' + r.slotId + ': ' : '';
      if (!info) {
        prog.removeAttribute('value');
        setProgressText(who + run.phase);
      } else {
        prog.value = info.fraction;
        let t;
        if (info.stepKind === 'warmup') t = 'Warm-up, step ' + (info.stepIndex + 1) + ' of ' + info.stepCount;
        else if (info.stepKind === 'sampling') t = 'Sampling: ' + fmtInt(info.drawsDone) + ' of ' + fmtInt(info.drawsTotal) + ' draws';
        else t = run.phase;
        if (info.stepKind === 'done') t = run.phase;
        if (isNum(info.remaining) && info.stepKind !== 'done') t += info.remaining < 1000 ? ' · less than a second left' : ' · about ' + fmtDuration(info.remaining) + ' left';
        setProgressText(who + t);
      }
      return;
    }
    const slot = activeSlot();
    const run = slot && slot.run;
    if (!engineReady) { prog.value = 0; setProgressText('Loading the engine…'); return; }
    if (!run) { prog.value = 0; setProgressText(slot ? 'Ready. Ctrl+Enter in the editor also runs.' : 'Model B is empty.'); return; }
    if (run.status === 'done') {
      prog.value = 1;
      const dt = run.info ? fmtInt(run.info.drawsTotal) + ' draws' : '';
      setProgressText('Finished in ' + fmtDuration(run.elapsed) + (dt ? ' · ' + dt : '') + (run.workers ? ' · ' + run.workers + (run.workers === 1 ? ' worker' : ' workers') : ''));
    } else if (run.status === 'cancelled') {
      prog.value = run.info ? run.info.fraction : 0;
      setProgressText('Cancelled after ' + fmtDuration(run.elapsed) + '.');
    } else if (run.status === 'error') {
      prog.value = 0;
      setProgressText('Stopped with an error (see below).');
    }
  }

  // ------------------------------------------------------------------ results
  function runIsStale(slot) {
    if (!slot.run || slot.run.status === 'running') return false;
    const b = buildSpec(slot);
    if (b.errors.length) return true;
    return JSON.stringify(b.spec) !== slot.run.specJson || JSON.stringify(b.settings) !== JSON.stringify(slot.run.overrides);
  }
  function isDisagreement(r) {
    if (!r) return false;
    if (typeof r.verdict === 'string' && /disagree/i.test(r.verdict)) return true;
    return Array.isArray(r.cross_checks) && r.cross_checks.some(function (c) { return c && c.agrees === false; });
  }
  const CHECK_NAMES = {
    grid: 'Grid quadrature', importance: 'Importance sampling', laplace: 'Laplace approximation', exact: 'Exact (mixture)',
  };

  function renderReport() {
    const slot = activeSlot();
    $('report-kicker').textContent = 'Model ' + state.active;
    if (!slot) {
      $('results-heading').textContent = 'Model B is empty';
      setChildren($('report-meta'), 'Start model B from the left to compare two models.');
      for (const id of ['stale-note', 'run-error', 'verdict']) $(id).hidden = true;
      emptyResults('—');
      return;
    }
    const title = slot.form.title.trim() || 'Untitled model';
    $('results-heading').textContent = title;
    document.title = 'Kiln — ' + title;
    const run = slot.run;
    const r = run && run.status === 'done' ? run.result : null;
    const check = slot.check && slot.check.result;
    // Meta line.
    let meta;
    if (r) {
      const s = r.settings || {};
      meta = 'Seed ' + str(r.seed != null ? r.seed : s.seed) + ' · ' + s.chains + ' chains × ' + fmtInt(s.draws) + ' kept draws after ' + fmtInt(s.warmup) + ' warm-up · ' + s.method + ' method, ' + (s.integrator === 'hmc' ? 'static HMC' : 'NUTS') +
        (isNum(r.gradient_evaluations) ? ' · ' + fmtInt(r.gradient_evaluations) + ' energy evaluations' : '') + ' · ' + fmtDuration(run.elapsed);
    } else if (run && run.status === 'running') meta = 'Running… numbers below update as draws arrive.';
    else if (run && run.status === 'cancelled') meta = 'The last run was cancelled.';
    else if (slot.check && slot.check.error) meta = 'Not run yet: the model has a problem, shown under the editor.';
    else meta = check ? 'Not run yet. The modes and values below come from the check; press Run to sample.' : 'Not run yet.';
    setChildren($('report-meta'), meta);
    $('stale-note').hidden = !(run && run.status === 'done' && runIsStale(slot));
    // Error.
    $('run-error').hidden = !(run && run.status === 'error');
    if (run && run.status === 'error') $('run-error-text').textContent = (run.error && (run.error.rendered || run.error.message)) || String(run.error);
    // Verdict.
    const v = $('verdict');
    v.className = 'verdict';
    if (r) {
      const bad = isDisagreement(r);
      if (bad) v.classList.add('bad');
      setChildren(v, el('span', { class: 'verdict-tag' }, bad ? 'DISAGREEMENT' : 'CHECKS AGREE'), sentence(str(r.verdict || (bad ? 'the cross-checks disagree' : '')).replace(/^\s*DISAGREEMENT\s*:\s*/, '')));
      const nw = Array.isArray(r.warnings) ? r.warnings.length : 0;
      if (nw && !bad) append(v, el('span', { class: 'verdict-more' }, ' — but read the ' + (nw === 1 ? 'warning' : nw + ' warnings') + ' below.'));
      v.hidden = false;
    } else if (run && (run.status === 'running' || run.status === 'cancelled')) {
      v.classList.add('partial');
      setChildren(v, el('span', { class: 'verdict-tag' }, run.status === 'running' ? 'RUNNING' : 'CANCELLED'),
        run.status === 'running' ? 'The verdict comes when the run finishes; the running values below are provisional.' : 'The run was stopped before the end: the partial numbers below are not a result and should not be used.');
      v.hidden = false;
    } else v.hidden = true;
    renderLogZ(slot, r, check);
    renderWarnings(slot, r, check);
    renderModes(slot, r, check);
    renderUnknowns(slot, r);
    renderDiagnostics(r);
    $('dl-csv').disabled = !(r && run.csv);
    $('dl-json').disabled = !r;
    renderPrintModel(slot);
  }

  function emptyResults(msg) {
    $('logz-value').textContent = msg; $('logz-sub').textContent = '';
    clear($('cross-checks').tBodies[0]); clear($('warnings')); clear($('mode-table').tHead); clear($('mode-table').tBodies[0]);
    clear($('unknowns-summary').tBodies[0]); clear($('diagnostics')); $('modes-foot').textContent = '';
    $('dl-csv').disabled = true; $('dl-json').disabled = true;
  }

  function renderLogZ(slot, r, check) {
    const val = $('logz-value');
    const sub = $('logz-sub');
    val.className = 'logz-value';
    const run = slot.run;
    const running = run && (run.status === 'running' || run.status === 'cancelled') && run.progress && Array.isArray(run.progress.running) && run.progress.running.length ? run.progress.running[run.progress.running.length - 1] : null;
    if (r) {
      val.textContent = fmtPM(r.log_z, r.log_z_se);
      const cv = r.control_variates;
      const cvText = cv && cv.used
        ? ' With control variates from the base: without them ' + fmtPM(r.log_z_plain, r.log_z_plain_se) + ' (' + str(cv.note) + ').'
        : '';
      sub.textContent = '± is one standard error of the sampling (it cannot account for modes never found).' + cvText;
    } else if (running) {
      val.classList.add('partial');
      val.textContent = fmtPM(running.log_z, running.log_z_se);
      sub.textContent = (run.status === 'running' ? 'So far, after ' : 'Stopped after ') + fmtInt(running.draws) + ' kept draws: provisional.';
    } else {
      val.textContent = '—';
      sub.textContent = check ? 'Run the model for the sampled value; the check values are in the table.' : '';
    }
    const tb = $('cross-checks').tBodies[0];
    clear(tb);
    const rows = [];
    if (r && Array.isArray(r.cross_checks)) {
      for (const c of r.cross_checks) {
        const agree = c.agrees === true ? el('span', { class: 'pill yes' }, 'agrees') : c.agrees === false ? el('span', { class: 'pill no' }, 'disagrees') : el('span', { class: 'pill neutral' }, 'not judged');
        rows.push(el('tr', null,
          el('th', { scope: 'row' }, CHECK_NAMES[c.name] || str(c.name), c.note ? el('span', { class: 'check-note' }, str(c.note)) : null,
            c.agrees === true && isNum(c.z_score) && Math.abs(c.z_score) > 4 ? el('span', { class: 'check-note' }, 'many standard errors apart, but the gap is small enough in absolute terms to count as agreement') : null),
          el('td', { class: 'num' }, isNum(c.error) && c.error > 0 ? fmtPM(c.log_z, c.error) : fmtSig(c.log_z, 6) + (isNum(c.error) ? '' : ' (no error bar)')),
          el('td', { class: 'num' }, isNum(c.z_score) ? fmtFixed(c.z_score, 2) : '—'),
          el('td', null, agree)));
      }
    } else if (check) {
      const items = [['exact', check.exact_log_z, 'exact for a Gaussian mixture'], ['grid', check.grid_log_z, 'quadrature on a refined grid'], ['laplace', check.laplace_log_z, 'sum of Gaussian approximations at the modes']];
      for (const it of items) {
        if (!isNum(it[1])) continue;
        rows.push(el('tr', null, el('th', { scope: 'row' }, CHECK_NAMES[it[0]], el('span', { class: 'check-note' }, it[2])), el('td', { class: 'num' }, fmtSig(it[1], 6)), el('td', { class: 'num' }, '—'),
          el('td', null, el('span', { class: 'pill neutral' }, 'after a run'))));
      }
    }
    if (!rows.length) rows.push(el('tr', null, el('td', { colspan: 4, class: 'empty' }, 'No cross-checks yet.')));
    append(tb, rows);
  }

  function renderWarnings(slot, r, check) {
    const node = $('warnings');
    clear(node);
    const items = [];
    const run = slot.run;
    if (run && run.status === 'cancelled') items.push({ kind: 'warning', text: 'The run was cancelled before it finished; nothing below is a final result.' });
    if (r) {
      for (const w of (Array.isArray(r.warnings) ? r.warnings : [])) items.push({ kind: 'warning', text: w });
      for (const n of (Array.isArray(r.notes) ? r.notes : [])) items.push({ kind: 'note', text: n });
    } else if (slot.check && slot.check.error) {
      items.push({ kind: 'warning', text: 'The model cannot be used yet: ' + (slot.check.error.message || 'see the message under the editor') + '.', source: slot.check.local ? 'Form:' : 'Check:' });
    } else if (check) {
      for (const w of (Array.isArray(check.warnings) ? check.warnings : [])) items.push({ kind: 'warning', text: w, source: 'Check:' });
      if (check.grid && Array.isArray(check.grid.warnings)) for (const w of check.grid.warnings) items.push({ kind: 'warning', text: w, source: 'Grid:' });
    }
    if (!items.length) append(node, el('p', { class: 'muted' }, r ? 'No warnings: nothing in the diagnostics suggests a problem.' : (run && run.status === 'running' ? 'Warnings appear when the run finishes.' : 'No warnings from the check. A run adds its own diagnostics.')));
    else append(node, warnList(items));
  }

  function renderModes(slot, r, check) {
    const table = $('mode-table');
    const names = unknownNames(slot);
    const D = names.length;
    const wide = D > 5;
    clear(table.tHead); clear(table.tBodies[0]);
    const modes = r && Array.isArray(r.modes) ? r.modes : (check && Array.isArray(check.modes) ? check.modes : []);
    const exact = r && Array.isArray(r.exact_masses) ? r.exact_masses : (check && check.exact && Array.isArray(check.exact.masses) && !r ? check.exact.masses : null);
    const head = [el('th', { scope: 'col' }, 'Mode')];
    if (wide) head.push(el('th', { scope: 'col' }, 'location'));
    else for (const n of names) head.push(el('th', { scope: 'col', class: 'num' }, n));
    if (r) head.push(el('th', { scope: 'col', class: 'num' }, 'mass ± SE'));
    else head.push(el('th', { scope: 'col', class: 'num' }, 'energy'));
    head.push(el('th', { scope: 'col', class: 'num' }, 'Laplace mass'));
    if (exact) head.push(el('th', { scope: 'col', class: 'num' }, 'exact mass'));
    if (r) { head.push(el('th', { scope: 'col' }, 'visited')); head.push(el('th', { scope: 'col' }, 'found by')); }
    append(table.tHead, el('tr', null, head));
    const body = modes.slice(0, 200).map(function (m, k) {
      const loc = Array.isArray(m.location) ? m.location : [];
      const cells = [el('th', { scope: 'row' }, el('span', { class: 'swatch', 'aria-hidden': 'true', dataset: { mode: String(k + 1) } }), String(k + 1),
        m.found_by && m.found_by !== 'optimiser' ? el('span', { title: 'found by the chains, missed by the optimiser' }, ' +') : null,
        m.non_quadratic ? el('span', { class: 'flag', title: 'measured to be far from Gaussian' }, ' *') : null)];
      if (wide) cells.push(el('td', { class: 'note' }, loc.map(function (v, i) { return (names[i] || '?') + ' = ' + fmtSig(v); }).join(', ')));
      else for (let i = 0; i < D; i++) cells.push(el('td', { class: 'num' }, fmtSig(loc[i])));
      if (r) cells.push(el('td', { class: 'num' }, fmtPM(m.mass, m.mass_se)));
      else cells.push(el('td', { class: 'num' }, fmtSig(m.energy, 5)));
      cells.push(el('td', { class: 'num' }, fmtSig(m.laplace_mass, 3)));
      if (exact) cells.push(el('td', { class: 'num' }, fmtSig(exact[k], 4)));
      if (r) {
        cells.push(el('td', null, m.visited ? el('span', { class: 'pill yes' }, 'yes') : el('span', { class: 'pill no' }, 'no')));
        cells.push(el('td', null, m.found_by === 'optimiser' ? 'optimiser' : m.found_by ? str(m.found_by) + ' +' : '—'));
      }
      return el('tr', null, cells);
    });
    if (!body.length) body.push(el('tr', null, el('td', { colspan: head.length, class: 'empty' }, slot.check && slot.check.pending ? 'Checking…' : 'No modes yet: the model has not been checked successfully.')));
    append(table.tBodies[0], body);
    colourSwatches(table);
    const foot = [];
    if (modes.length > 200) foot.push('Showing the first 200 of ' + modes.length + ' modes; the JSON summary has them all.');
    if (r) foot.push('Mass is the share of Z in each mode from the sampler; the Laplace mass comes from the Gaussian approximations alone. “+” marks a mode the chains found that the optimiser had missed; a mode not visited got no draws.');
    else if (modes.length) foot.push('Modes from the optimiser. Energy is the value at the mode; run the model to weigh them by sampling.');
    $('modes-foot').textContent = foot.join(' ');
  }

  function renderUnknowns(slot, r) {
    const tb = $('unknowns-summary').tBodies[0];
    clear(tb);
    if (!r) { append(tb, el('tr', null, el('td', { colspan: 8, class: 'empty' }, 'Run the model to summarise the unknowns.'))); return; }
    const names = unknownNames(slot);
    names.forEach(function (n, i) {
      const q = Array.isArray(r.quantiles) && Array.isArray(r.quantiles[i]) ? r.quantiles[i] : [];
      const rh = r.rhat ? r.rhat[i] : null;
      const ess = r.ess ? r.ess[i] : null;
      const u = r.unknowns && r.unknowns[i];
      const bounds = u && (isNum(u.lower) || isNum(u.upper)) ? ' (' + (isNum(u.lower) ? fmtSig(u.lower) : '−∞') + ' to ' + (isNum(u.upper) ? fmtSig(u.upper) : '∞') + ')' : '';
      append(tb, el('tr', null,
        el('th', { scope: 'row' }, n, bounds ? el('span', { class: 'muted' }, bounds) : null),
        el('td', { class: 'num' }, fmtSig(r.mean && r.mean[i])),
        el('td', { class: 'num' }, fmtSig(r.sd && r.sd[i])),
        el('td', { class: 'num' }, fmtSig(q[0])), el('td', { class: 'num' }, fmtSig(q[1])), el('td', { class: 'num' }, fmtSig(q[2])),
        el('td', { class: 'num' + (isNum(rh) && rh > 1.01 ? ' flag' : '') , title: isNum(rh) && rh > 1.01 ? 'above 1.01: the chains disagree' : null }, isNum(rh) ? rh.toFixed(3) : fmtSig(rh)),
        el('td', { class: 'num' + (isNum(ess) && ess < 100 ? ' flag' : '') }, fmtInt(ess))));
    });
  }

  const DIAG = [
    ['acceptance', 'Mean acceptance', function (v, r) { return [fmtFixed(v, 3), 'target ' + str((r.settings || {}).target_accept || 0.8)]; }],
    ['divergences', 'Divergent transitions', function (v) { return [fmtInt(v), v > 0 ? 'the integrator broke down in places; results near those regions are suspect' : null, v > 0]; }],
    ['max_depth_hits', 'Trajectories stopped at the tree-depth limit', function (v) { return [fmtInt(v), null, v > 0]; }],
    ['independence_acceptance', 'Acceptance of independence moves from the base', function (v) { return [fmtPct(v)]; }],
    ['hamiltonian_share', 'Share of iterations with a Hamiltonian move', function (v) { return [fmtPct(v), 'the others only drew from the base and redrew β']; }],
    ['round_trips', 'Round trips between β = 0 and β = 1, per chain', function (v) { const a = Array.isArray(v) ? v : [v]; return [a.map(fmtInt).join(', '), a.some(function (x) { return x === 0; }) ? 'a chain never made a round trip' : null, a.some(function (x) { return x === 0; })]; }],
    ['share_near_beta_one', 'Share of time near β = 1', function (v) { return [fmtPct(v)]; }],
    ['mean_p1', 'Mean probability of β = 1 given the position', function (v) { return [fmtFixed(v, 3)]; }],
    ['log_z_ess', 'Effective draws of the log Z series', function (v) { return [fmtInt(v), v < 100 ? 'few: the log Z error bar is itself uncertain' : null, v < 100]; }],
    ['is_ess', 'Effective draws of the importance-sampling check', function (v) { return [fmtInt(v)]; }],
    ['bias_span', 'Span of the learnt tempering bias', function (v) { return [fmtSig(v, 3) + ' nats']; }],
    ['base_components', 'Components of the base mixture', function (v) { return [fmtInt(v)]; }],
    ['base_refitted', 'Base refitted during warm-up', function (v) { return [v ? 'yes' : 'no']; }],
    ['step_sizes', 'Step sizes, per chain', function (v) { return [(Array.isArray(v) ? v : [v]).map(function (x) { return fmtSig(x, 3); }).join(', ')]; }],
    ['far_from_modes', 'Share of target weight far from every known mode', function (v) { return [fmtPct(v), v > 0.01 ? 'a mode may be missing' : null, v > 0.01]; }],
  ];
  function renderDiagnostics(r) {
    const dl = $('diagnostics');
    clear(dl);
    if (!r) { append(dl, el('dt', null, 'Diagnostics'), el('dd', { class: 'muted' }, 'after a run')); return; }
    const d = r.diagnostics || {};
    const seen = new Set();
    function row(label, value, explain, flag) {
      append(dl, el('dt', null, label), el('dd', flag ? { class: 'flag' } : null, value, explain ? el('span', { class: 'explain' }, explain) : null));
    }
    for (const spec of DIAG) {
      if (!(spec[0] in d)) continue;
      seen.add(spec[0]);
      const out = spec[2](d[spec[0]], r);
      row(spec[1], out[0], out[1], out[2]);
    }
    for (const k of Object.keys(d)) {
      if (seen.has(k)) continue;
      const v = d[k];
      row(k.replace(/_/g, ' '), Array.isArray(v) ? v.map(function (x) { return fmtSig(x); }).join(', ') : (typeof v === 'object' && v !== null ? JSON.stringify(v) : fmtSig(v)));
    }
    if (isNum(r.gradient_evaluations)) row('Energy evaluations (with or without gradient)', fmtInt(r.gradient_evaluations));
  }

  function renderPrintModel(slot) {
    const node = $('print-model');
    clear(node);
    const f = slot.form;
    if (f.notes.trim()) append(node, el('p', null, f.notes));
    append(node, el('p', null, el('strong', null, 'Unknowns: '), f.variables.map(function (v) {
      const lo = str(v.lower).trim(), hi = str(v.upper).trim();
      return v.name + (lo || hi ? ' in [' + (lo || '−∞') + ', ' + (hi || '∞') + ']' : '');
    }).join('; ')));
    if (f.kind === 'mixture') {
      append(node, el('p', null, el('strong', null, 'Gaussian mixture: '), f.mixture.length + ' components'));
      append(node, el('pre', null, f.mixture.map(function (c) { return 'weight ' + c.weight + ', mean [' + c.mean + '], ' + (c.shape === 'sd' ? 'sd [' : 'cov [') + c.spread + ']'; }).join('\n')));
    } else {
      append(node, el('p', null, el('strong', null, f.kind === 'log_density' ? 'Log density:' : 'Energy:')));
      append(node, el('pre', null, f.formula));
      if (f.dataCsv.trim()) { const d = parseCsv(f.dataCsv); append(node, el('p', null, el('strong', null, 'Data: '), d.rows + ' rows of ' + d.names.join(', '))); }
    }
  }

  // ------------------------------------------------------------------ plots
  function renderPlots() {
    const slot = activeSlot();
    const cDen = $('plot-density'), cMar = $('plot-marginals'), cBeta = $('plot-beta'), cRun = $('plot-running');
    if (!slot) {
      KilnPlots.message(cDen, 'No model.', 200); KilnPlots.message(cMar, 'No model.', 120);
      KilnPlots.message(cBeta, 'No model.', 120); KilnPlots.message(cRun, 'No model.', 120);
      return;
    }
    const names = unknownNames(slot);
    const D = names.length;
    const check = slot.check && slot.check.result;
    const run = slot.run;
    const draws = run && run.status === 'done' ? run.draws : null;
    const modes = (run && run.status === 'done' && run.result && Array.isArray(run.result.modes)) ? run.result.modes : (check && Array.isArray(check.modes) ? check.modes : []);
    // Pair selectors.
    const pc = $('pair-controls');
    pc.hidden = D <= 1;
    if (D > 1) {
      slot.pair = [Math.min(slot.pair[0], D - 1), Math.min(slot.pair[1], D - 1)];
      if (slot.pair[0] === slot.pair[1]) slot.pair[1] = (slot.pair[0] + 1) % D;
      fillPairSelect($('pair-x'), names, slot.pair[0]);
      fillPairSelect($('pair-y'), names, slot.pair[1]);
    }
    const grid = slot.grid && !slot.grid.error && check && slot.grid.specJson === slot.check.specJson ? slot.grid : null;
    const note = $('density-note');
    if (!check && !draws) {
      $('density-caption').textContent = 'Density map';
      KilnPlots.message(cDen, slot.check && slot.check.pending ? 'Checking the model…' : 'The density map appears once the model checks without errors.', 300);
      note.textContent = '';
    } else if (D === 1) {
      $('density-caption').textContent = 'Density of ' + names[0] + (draws ? ' with the draws, coloured by mode' : '');
      let narrow = Infinity;
      for (const m of (check && check.modes) || []) if (m.sd && isNum(m.sd[0]) && m.laplace_mass > 1e-3) narrow = Math.min(narrow, m.sd[0]);
      const span = grid ? grid.xmax - grid.xmin : null;
      const bins = span && isFinite(narrow) ? Math.max(40, Math.min(300, Math.round(span / narrow))) : 80;
      KilnPlots.density1d(cDen, { name: names[0], grid: grid, bins: bins, samples: draws ? { x: draws.cols[0], mode: draws.mode } : null, modes: modes.map(function (m) { return m.location[0]; }) });
      note.textContent = grid ? 'The curve is the density computed on a grid and normalised; ticks mark the modes.' : (slot.grid && slot.grid.error ? 'Grid unavailable: ' + (slot.grid.error.message || '') : '');
    } else {
      const ix = slot.pair[0], iy = slot.pair[1];
      const useGrid = D === 2 && grid && grid.ix === ix && grid.iy === iy;
      $('density-caption').textContent = (D === 2 ? 'Log density' : 'Draws') + ' over ' + names[ix] + ' and ' + names[iy] + (draws ? ', draws coloured by mode' : '');
      KilnPlots.densityMap(cDen, {
        names: [names[ix], names[iy]], grid: useGrid ? grid : null,
        points: draws ? { x: draws.cols[ix], y: draws.cols[iy], mode: draws.mode } : null,
        modes: modes.map(function (m) { return [m.location[ix], m.location[iy]]; }),
      });
      if (D === 2) {
        note.textContent = useGrid ? 'Shading: log density relative to its peak (white is 12 or more below); contours where a Gaussian mode would enclose 68, 95 and 99.7 % of its mass; + marks the modes.' :
          (slot.grid && slot.grid.error ? 'The density grid is unavailable: ' + (slot.grid.error.message || '') : 'Computing the density grid…');
        if (D === 2 && !useGrid) ensureGrid(state.active);
      } else note.textContent = draws ? 'With more than two unknowns the map shows the draws of the chosen pair (other unknowns free); + marks the modes.' : 'With more than two unknowns the map shows draws; run the model. + marks the modes found by the check.';
    }
    if (draws) KilnPlots.marginals(cMar, { names: names, cols: draws.cols, mode: draws.mode });
    else KilnPlots.message(cMar, run && run.status === 'running' ? 'Histograms appear when the run finishes.' : 'Histograms of the draws appear after a run.', 120);
    const prog = run && run.progress;
    if (prog && Array.isArray(prog.beta_trace) && prog.beta_trace.some(function (t) { return t && t.length; })) KilnPlots.betaPlot(cBeta, { trace: prog.beta_trace });
    else KilnPlots.message(cBeta, run && run.status === 'running' ? 'The β trace appears once sampling starts.' : 'The β trace of each chain appears during a run.', 120);
    if (prog && Array.isArray(prog.running) && prog.running.length) {
      const refs = [];
      const src = (run.status === 'done' && run.result) ? run.result : check;
      if (src) {
        if (isNum(src.exact_log_z)) refs.push({ name: 'exact', value: src.exact_log_z });
        if (isNum(src.grid_log_z)) refs.push({ name: 'grid', value: src.grid_log_z });
        if (run.status === 'done' && isNum(src.is_log_z)) refs.push({ name: 'importance', value: src.is_log_z });
      }
      KilnPlots.runningLogZ(cRun, { running: prog.running, refs: refs });
    } else KilnPlots.message(cRun, run && run.status === 'running' ? 'The running log Z appears once sampling starts.' : 'The running estimate of log Z appears during a run.', 120);
  }
  function fillPairSelect(sel, names, chosen) {
    const want = names.join('\u0000');
    if (sel.dataset.names !== want) {
      clear(sel);
      names.forEach(function (n, i) { sel.appendChild(el('option', { value: String(i) }, n)); });
      sel.dataset.names = want;
    }
    sel.value = String(chosen);
  }

  // ------------------------------------------------------------------ compare
  function renderCompare() {
    const card = $('compare-card');
    const A = state.slots.A, B = state.slots.B;
    card.hidden = !B;
    clear(card);
    if (!B) return;
    const ra = A.run && A.run.status === 'done' ? A.run.result : null;
    const rb = B.run && B.run.status === 'done' ? B.run.result : null;
    append(card, el('h2', null, 'Compare model A with model B'));
    function side(id, slot, r) {
      const t = slot.form.title.trim() || 'Untitled model';
      const items = [];
      if (r) {
        for (const w of (r.warnings || [])) items.push({ kind: 'warning', text: w });
        if (isDisagreement(r)) items.unshift({ kind: 'warning', text: 'DISAGREEMENT: ' + str(r.verdict) });
      }
      return el('div', null,
        el('h3', null, id + ': ' + t),
        el('p', { class: 'muted' }, r ? 'log Z = ' + fmtPM(r.log_z, r.log_z_se) + (runIsStale(slot) ? ' (model changed since)' : '') : (slot.run && slot.run.status === 'running' ? 'running…' : 'not run yet')),
        r ? (items.length ? warnList(items) : el('p', { class: 'muted' }, 'No warnings.')) : null);
    }
    if (ra && rb && isNum(ra.log_z) && isNum(rb.log_z)) {
      const bf = ra.log_z - rb.log_z;
      const se = Math.sqrt(Math.pow(ra.log_z_se || 0, 2) + Math.pow(rb.log_z_se || 0, 2));
      let words;
      if (Math.abs(bf) <= 2 * se) words = 'Within their errors the two models are equally supported.';
      else {
        const fav = bf > 0 ? 'A' : 'B';
        const factor = Math.exp(Math.abs(bf));
        words = 'Model ' + fav + ' is favoured by a factor of about ' + (factor < 1e6 ? fmtSig(factor, 3) : 'e^' + fmtFixed(Math.abs(bf), 1)) + ' (Z_' + fav + ' / Z_' + (fav === 'A' ? 'B' : 'A') + ').';
      }
      append(card, el('div', { class: 'bf-row' },
        el('div', null, el('div', { class: 'logz-label' }, 'log Bayes factor log(Z_A / Z_B)'), el('div', { class: 'bf-value', 'data-testid': 'bayes-factor' }, fmtPM(bf, se))),
        el('p', { class: 'bf-words' }, words)));
      if (isDisagreement(ra) || isDisagreement(rb)) append(card, warnList([{ kind: 'warning', text: 'At least one run\'s cross-checks disagree: do not use this Bayes factor until that is resolved.' }]));
      if (runIsStale(A) || runIsStale(B)) append(card, warnList([{ kind: 'warning', text: 'A model changed after its run; run both again for a current Bayes factor.' }]));
      append(card, el('p', { class: 'hint' }, 'SE = √(SE_A² + SE_B²). A Bayes factor compares two normalised models of the same data; it inherits every caveat of both runs.'));
    } else {
      append(card, el('p', { 'data-testid': 'bayes-factor-missing' }, 'Run both models to see the log Bayes factor log(Z_A / Z_B) ± SE. “Run A and B” runs them one after the other.'));
    }
    append(card, el('div', { class: 'compare-grid' }, side('A', A, ra), side('B', B, rb)));
    append(card, el('p', { class: 'no-print' }, el('button', {
      type: 'button', class: 'link-button', 'data-testid': 'remove-b',
      onclick: function () {
        if (state.running && state.running.slotId === 'B') cancelRun();
        const prev = { form: B.form, settings: B.settings };
        state.slots.B = null;
        if (state.active === 'B') state.active = 'A';
        writeFormToDom(); saveSoon(); renderAll();
        notice(['Model B removed. '], { action: { label: 'Undo', fn: function () { state.slots.B = newSlot(prev.form, prev.settings); saveSoon(); scheduleCheck('B', 0); renderAll(); } } });
      },
    }, 'Remove model B')));
  }

  // ------------------------------------------------------------------ render loop
  let renderQueued = false;
  function scheduleRender() {
    if (renderQueued) return;
    renderQueued = true;
    requestAnimationFrame(function () { renderQueued = false; renderAll(); });
  }
  function renderAll() {
    renderRunBar();
    renderCompare();
    renderReport();
    renderPlots();
  }

  function switchSlot(id) {
    state.active = id;
    writeFormToDom();
    renderCheck();
    saveSoon();
    if (state.slots[id] && !state.slots[id].check) scheduleCheck(id, 0);
    renderAll();
  }

  // ------------------------------------------------------------------ files, demos, share
  function download(name, text, type) {
    const blob = text instanceof Blob ? text : new Blob([text], { type: type || 'application/octet-stream' });
    const url = URL.createObjectURL(blob);
    const a = el('a', { href: url, download: name });
    document.body.appendChild(a);
    a.click();
    a.remove();
    setTimeout(function () { URL.revokeObjectURL(url); }, 10000);
  }
  function slug(s) {
    const t = String(s || '').toLowerCase().replace(/[^a-z0-9]+/g, '-').replace(/^-+|-+$/g, '').slice(0, 60);
    return t || 'kiln-model';
  }
  function saveSpec() {
    const slot = activeSlot();
    if (!slot) return;
    const b = buildSpec(slot);
    if (b.errors.length) { notice(['The spec cannot be saved until these are fixed:', el('pre', null, b.errors.join('\n'))], { bad: true }); return; }
    download(slug(slot.form.title) + '.json', JSON.stringify(b.spec, null, 2) + '\n', 'application/json');
  }

  // What a share link and a single page carry: model A and, when there is one, model B, each as
  // {spec, settings}; `errors` lists what must be fixed first (prefixed by the model when two).
  function buildShared() {
    const A = state.slots.A, B = state.slots.B;
    const ba = buildSpec(A);
    const bb = B ? buildSpec(B) : null;
    const errors = ba.errors.map(function (e) { return (B ? 'model A: ' : '') + e; })
      .concat(bb ? bb.errors.map(function (e) { return 'model B: ' + e; }) : []);
    return {
      errors: errors,
      a: { spec: ba.spec, settings: ba.settings },
      b: bb ? { spec: bb.spec, settings: bb.settings } : null,
    };
  }

  async function saveSingle() {
    const A = state.slots.A;
    if (!A || !single) return;
    const shared = buildShared();
    if (shared.errors.length) { notice(['The page cannot be saved until these are fixed:', el('pre', null, shared.errors.join('\n'))], { bad: true }); return; }
    const btn = $('save-single');
    btn.disabled = true;
    try {
      const html = await single.build({
        spec: shared.a.spec, settings: shared.a.settings, title: A.form.title.trim() || 'Kiln model',
        b: shared.b || undefined,
      });
      download(slug(A.form.title) + '.html', html, 'text/html');
      notice(['Saved a single page with the engine, the demos and ' + (shared.b ? 'both models (A and B)' : 'this model') + ' inside. It opens from a file and needs no network.']);
    } catch (e) {
      notice(['The single page could not be made: ' + (e && e.message ? e.message : String(e))], { bad: true });
    } finally { btn.disabled = false; }
  }

  function fnv(text) {
    let h = 0x811c9dc5;
    for (let i = 0; i < text.length; i++) { h ^= text.charCodeAt(i); h = Math.imul(h, 0x01000193) >>> 0; }
    return h.toString(36);
  }

  async function loadDemos() {
    if (embeddedBundle && Array.isArray(embeddedBundle.demos)) { state.demos = embeddedBundle.demos; }
    else {
      try {
        const r = await fetch('pkg/demos.json', { cache: 'no-store' });
        if (!r.ok) throw new Error('HTTP ' + r.status);
        const j = await r.json();
        state.demos = Array.isArray(j) ? j.filter(function (d) { return d && typeof d.file === 'string' && d.spec && typeof d.spec === 'object'; }) : [];
      } catch (e) {
        state.demos = [];
        notice(['The demos could not be loaded (pkg/demos.json: ' + e.message + '). Build them with scripts/build-web.sh.'], { bad: true });
      }
    }
    const sel = $('demo-select');
    for (const d of state.demos) sel.appendChild(el('option', { value: d.file }, (typeof d.spec.title === 'string' && d.spec.title) || d.file));
  }
  function loadDemo(file, slotId, quiet) {
    const d = state.demos.find(function (x) { return x.file === file; });
    if (!d) {
      notice(['There is no demo called “' + file + '”. Available: ' + (state.demos.map(function (x) { return x.file; }).join(', ') || 'none') + '.'], { bad: true });
      return false;
    }
    let loaded;
    try { loaded = specToForm(d.spec); } catch (e) { notice(['The demo ' + file + ' could not be read: ' + e.message], { bad: true }); return false; }
    if (quiet) { state.slots[slotId] = newSlot(loaded.form, loaded.settings); afterModelReplaced(slotId); }
    else replaceSlotModel(slotId, loaded, 'Loaded the demo “' + (d.spec.title || file) + '”');
    return true;
  }

  function b64urlEncode(bytes) {
    let s = '';
    for (let i = 0; i < bytes.length; i += 0x8000) s += String.fromCharCode.apply(null, bytes.subarray(i, i + 0x8000));
    return btoa(s).replace(/\+/g, '-').replace(/\//g, '_').replace(/=+$/, '');
  }
  function b64urlDecode(t) {
    if (!/^[A-Za-z0-9_-]*$/.test(t)) throw new Error('the link contains characters that are not base64url');
    let s = t.replace(/-/g, '+').replace(/_/g, '/');
    while (s.length % 4) s += '=';
    const bin = atob(s);
    const out = new Uint8Array(bin.length);
    for (let i = 0; i < bin.length; i++) out[i] = bin.charCodeAt(i);
    return out;
  }
  async function deflate(text) {
    const stream = new Blob([new TextEncoder().encode(text)]).stream().pipeThrough(new CompressionStream('deflate-raw'));
    return new Uint8Array(await new Response(stream).arrayBuffer());
  }
  async function inflate(bytes, limit) {
    const reader = new Blob([bytes]).stream().pipeThrough(new DecompressionStream('deflate-raw')).getReader();
    const chunks = [];
    let total = 0;
    for (;;) {
      const r = await reader.read();
      if (r.done) break;
      total += r.value.length;
      if (total > limit) { reader.cancel(); throw new Error('the link expands to more than ' + Math.round(limit / 1048576) + ' MB'); }
      chunks.push(r.value);
    }
    const all = new Uint8Array(total);
    let o = 0;
    for (const c of chunks) { all.set(c, o); o += c.length; }
    return new TextDecoder('utf-8', { fatal: true }).decode(all);
  }

  // The link carries model A and, when there is one, model B, so a comparison travels whole:
  // {spec, settings} for A, and b: {spec, settings} for B.
  async function copyShareLink() {
    if (!state.slots.A) return;
    const shared = buildShared();
    if (shared.errors.length) { notice(['Fix these before sharing:', el('pre', null, shared.errors.join('\n'))], { bad: true }); return; }
    const bb = shared.b;
    const payload = JSON.stringify(bb ? { spec: shared.a.spec, settings: shared.a.settings, b: bb } : shared.a);
    let link;
    try {
      const here = location.protocol === 'file:' ? location.href.split('#')[0] : location.origin + location.pathname;
      link = here + '#spec=' + b64urlEncode(await deflate(payload));
    } catch (e) { notice(['This browser cannot compress the link (CompressionStream): ' + e.message], { bad: true }); return; }
    const input = $('share-link');
    input.value = link;
    $('share-fallback').hidden = false;
    let copied = false;
    try { await navigator.clipboard.writeText(link); copied = true; } catch (e) { copied = false; }
    notice([(copied ? 'Share link copied to the clipboard' : 'The share link is ready in “Take away” (copying was not allowed here)') +
      ' — ' + fmtInt(link.length) + ' characters. ' + (bb ? 'Both models (A and B) and their settings travel' : 'The model and its settings travel') +
      ' inside the link itself; nothing is stored anywhere else.' +
      (link.length > 60000 ? ' This link is long; some apps shorten or break links this size: a spec file is safer.' : '')]);
  }

  // One shared model: {spec, settings}. `where` names it in messages ('' or 'model B: ').
  function validateSharedModel(obj, where, allowed) {
    if (!obj || typeof obj !== 'object' || Array.isArray(obj)) throw new Error(where + 'the link does not hold a JSON object');
    for (const k of Object.keys(obj)) if (allowed.indexOf(k) < 0) throw new Error(where + 'unknown key `' + k + '` (allowed: ' + allowed.join(', ') + ')');
    if (!obj.spec || typeof obj.spec !== 'object' || Array.isArray(obj.spec)) throw new Error(where + 'the link has no `spec` object');
    const settings = {};
    if (obj.settings != null) {
      const s = obj.settings;
      if (typeof s !== 'object' || Array.isArray(s)) throw new Error(where + '`settings` must be an object');
      for (const k of Object.keys(s)) {
        const v = s[k];
        if (SETTING_KEYS.indexOf(k) < 0) throw new Error(where + 'unknown setting `' + k + '` (allowed: ' + SETTING_KEYS.join(', ') + ')');
        if (k === 'method') { if (v !== 'alternating' && v !== 'joint') throw new Error(where + '`method` must be "alternating" or "joint"'); }
        else if (k === 'integrator') { if (v !== 'nuts' && v !== 'hmc') throw new Error(where + '`integrator` must be "nuts" or "hmc"'); }
        else if (!(typeof v === 'number' && Number.isSafeInteger(v) && v >= 0)) throw new Error(where + '`' + k + '` must be a whole number ≥ 0');
        settings[k] = String(v);
      }
    }
    let loaded;
    try { loaded = specToForm(obj.spec); } catch (e) { throw new Error(where + e.message); }
    Object.assign(loaded.settings, settings);
    return loaded;
  }
  // A share link's contents: model A, and model B when the link carries a comparison.
  function validateShared(obj) {
    const a = validateSharedModel(obj, '', ['spec', 'settings', 'b']);
    const b = obj.b != null ? validateSharedModel(obj.b, 'model B: ', ['spec', 'settings']) : null;
    return { a: a, b: b };
  }

  async function applyHash() {
    const h = location.hash.replace(/^#/, '');
    if (!h) return false;
    const params = new URLSearchParams(h);
    const clean = function () { history.replaceState(null, '', location.pathname + location.search); };
    if (params.has('spec')) {
      try {
        const text = await inflate(b64urlDecode(params.get('spec')), 64 * 1024 * 1024);
        let obj;
        try { obj = JSON.parse(text); } catch (e) { throw new Error('the link does not hold valid JSON (' + e.message + ')'); }
        const loaded = validateShared(obj);
        if (state.active !== 'A') state.active = 'A';
        if (loaded.b) replaceModels({ A: loaded.a, B: loaded.b }, 'Opened a shared comparison');
        else replaceSlotModel('A', loaded.a, 'Opened a shared model');
        clean();
        return true;
      } catch (e) {
        notice(['This share link could not be opened:', el('pre', { 'data-testid': 'share-error' }, 'error: ' + (e && e.message ? e.message : String(e)))], { bad: true });
        clean();
        return false;
      }
    }
    if (params.has('demo')) {
      const ok = loadDemo(params.get('demo'), state.active, !state.hadStorage);
      clean();
      return ok;
    }
    return false;
  }

  function openSpecFile(file) {
    readFileText(file, function (text) {
      let obj;
      try { obj = JSON.parse(text); } catch (e) { notice([file.name + ' is not valid JSON:', el('pre', null, 'error: ' + e.message)], { bad: true }); return; }
      let loaded;
      try { loaded = specToForm(obj); } catch (e) { notice([file.name + ': ' + e.message], { bad: true }); return; }
      if (!state.slots[state.active]) state.slots[state.active] = newSlot();
      replaceSlotModel(state.active, loaded, 'Opened ' + file.name);
    });
  }

  // ------------------------------------------------------------------ wiring
  function wire() {
    wireForm();
    $('tab-a').addEventListener('click', function () { switchSlot('A'); });
    $('tab-b').addEventListener('click', function () { switchSlot('B'); });
    document.querySelector('.slot-tabs').addEventListener('keydown', function (ev) {
      if (ev.key === 'ArrowRight' || ev.key === 'ArrowLeft') { const id = state.active === 'A' ? 'B' : 'A'; switchSlot(id); $(id === 'A' ? 'tab-a' : 'tab-b').focus(); ev.preventDefault(); }
    });
    $('b-copy').addEventListener('click', function () {
      const a = state.slots.A;
      state.slots.B = newSlot(JSON.parse(JSON.stringify(a.form)), Object.assign({}, a.settings));
      if (!state.slots.B.form.title.trim()) state.slots.B.form.title = 'Model B';
      else state.slots.B.form.title = state.slots.B.form.title + ' (B)';
      afterModelReplaced('B');
      switchSlot('B');
      $('title-input').focus();
    });
    $('b-empty').addEventListener('click', function () {
      state.slots.B = newSlot();
      state.slots.B.form.title = 'Model B';
      afterModelReplaced('B');
      switchSlot('B');
      $('formula-input').focus();
    });
    $('demo-select').addEventListener('change', function (ev) {
      const file = ev.target.value;
      if (!file) return;
      if (state.running && state.running.slotId === state.active) { notice(['Wait for the run to finish (or cancel it) before loading a demo into this model.'], { bad: true }); ev.target.value = ''; return; }
      loadDemo(file, state.active, false);
      ev.target.value = '';
    });
    $('open-spec').addEventListener('click', function () { $('open-spec-file').value = ''; $('open-spec-file').click(); });
    $('open-spec-file').addEventListener('change', function (ev) {
      const f = ev.target.files && ev.target.files[0];
      if (f) openSpecFile(f);
      ev.target.value = ''; // choosing the same file again is a new choice
    });
    $('save-spec').addEventListener('click', saveSpec);
    $('dl-spec').addEventListener('click', saveSpec);
    $('share').addEventListener('click', copyShareLink);
    $('notice-close').addEventListener('click', hideNotice);
    $('run').addEventListener('click', function () { startRun(state.active); });
    $('run-both').addEventListener('click', function () { startRun('A', ['B']); });
    $('cancel').addEventListener('click', cancelRun);
    $('print').addEventListener('click', function () { window.print(); });
    if (single && single.build) $('save-single').addEventListener('click', saveSingle); else $('save-single').hidden = true;
    $('dl-csv').addEventListener('click', function () {
      const slot = activeSlot();
      if (slot && slot.run && slot.run.csv) download(slug(slot.form.title) + '-draws.csv', slot.run.csv, 'text/csv');
    });
    $('dl-json').addEventListener('click', function () {
      const slot = activeSlot();
      if (slot && slot.run && slot.run.result) download(slug(slot.form.title) + '-summary.json', JSON.stringify(slot.run.result, null, 2) + '\n', 'application/json');
    });
    for (const b of document.querySelectorAll('[data-save]')) {
      b.addEventListener('click', function () {
        const id = b.dataset.save;
        const slot = activeSlot();
        KilnPlots.savePng($(id), slug(slot ? slot.form.title : 'kiln') + '-' + id.replace('plot-', '') + '.png');
      });
    }
    $('pair-x').addEventListener('change', function (ev) { const s = activeSlot(); s.pair[0] = Number(ev.target.value); if (s.pair[0] === s.pair[1]) s.pair[1] = (s.pair[0] + 1) % unknownNames(s).length; ensureGrid(state.active); renderPlots(); });
    $('pair-y').addEventListener('change', function (ev) { const s = activeSlot(); s.pair[1] = Number(ev.target.value); if (s.pair[0] === s.pair[1]) s.pair[0] = (s.pair[1] + 1) % unknownNames(s).length; ensureGrid(state.active); renderPlots(); });
    window.addEventListener('hashchange', function () { applyHash(); });
    let lastW = 0;
    new ResizeObserver(function (entries) {
      const w = Math.round(entries[0].contentRect.width);
      if (w !== lastW) { lastW = w; scheduleRender(); }
    }).observe($('results'));
    window.addEventListener('beforeprint', function () { renderPlots(); });
    window.addEventListener('beforeunload', saveNow);
  }

  async function start() {
    document.body.dataset.ready = 'false';
    setRunState('idle');
    wire();
    // A single-file page keeps its edits under its own key, so it opens first with its own model.
    if (embeddedBundle) STORAGE_KEY += '.single.' + fnv(JSON.stringify([embeddedBundle.spec || null, embeddedBundle.settings || null].concat(embeddedBundle.b ? [embeddedBundle.b] : [])));
    state.hadStorage = restore();
    let fromEmbed = false;
    if (!state.hadStorage && embeddedBundle && embeddedBundle.spec) {
      try {
        const loaded = validateShared({ spec: embeddedBundle.spec, settings: embeddedBundle.settings || undefined, b: embeddedBundle.b || undefined });
        state.slots.A = newSlot(loaded.a.form, loaded.a.settings);
        if (loaded.b) state.slots.B = newSlot(loaded.b.form, loaded.b.settings);
        fromEmbed = true;
      } catch (e) {
        notice(['The model saved in this page could not be read: ' + e.message], { bad: true });
      }
    }
    writeFormToDom();
    renderAll();
    await loadDemos();
    const fromHash = await applyHash();
    if (!fromHash && !fromEmbed && !state.hadStorage && state.demos.some(function (d) { return d.file === DEFAULT_DEMO; })) loadDemo(DEFAULT_DEMO, 'A', true);
    writeFormToDom();
    scheduleCheck(state.active, 0);
    renderAll();
    await engineP;
    await firstCheckDone;
    document.body.dataset.ready = 'true';
    renderAll();
  }

  start();
})();
