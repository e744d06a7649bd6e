// The model editor (left pane): the active slot's form shown in the page and every edit
// written back into it, as typed.
//
// Owns: writeFormToDom, wireForm, the unknowns rows (name, size or element names, bounds,
// prior) and mixture rows, the data summary (the engine reads the CSV: `readCsv`), and
// `changed` (after an edit: save, check, redraw), and large pastes into the data table (counted
// in slices with progress while the page keeps answering, refused above the limit of 10^6
// cells with the table left as it was); a table too large to lay out in the box is shown by its
// first lines, read-only, and kept whole. User text goes into inputs' values and text nodes only.
// Must not touch: the results pane, runs, the engine beyond reading the data for the summary
// (checking.js asks it to check).
import { state, activeSlot } from './state.js';
import { SETTING_KEYS, newComponent } from './spec-form.js';
import { fmtInt } from './format.js';
import { engine } from './engine-load.js';
import { wireSuggestions } from './suggest.js';
import { $, el, clear } from './dom.js';
import { notice } from './notice.js';
import { readFileText } from './files.js';
import { saveSoon, saveNow, storageShortfall } from './storage.js';
import { scheduleCheck } from './checking.js';
import { scheduleRender } from './render-loop.js';

// The input or select that holds a run setting.
function settingInputId(k) {
  return k === 'method' ? 'method-select' : k === 'integrator' ? 'integrator-select' : k + '-input';
}

/** Shows the active slot (or the empty-B panel) in the editor. */
export function writeFormToDom() {
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
  showDataText(f.dataCsv);
  for (const k of SETTING_KEYS) $(settingInputId(k)).value = slot.settings[k];
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
        spellcheck: 'false', autocapitalize: 'off', inputmode: key === 'lower' || key === 'upper' ? 'decimal' : null,
        oninput: function (ev) { v[key] = ev.target.value; changed(); },
      });
    }
    tb.appendChild(el('tr', null,
      el('td', null, input('name', 'unknown-name', 'Name of unknown ' + (i + 1), 'name')),
      el('td', null, input('size', 'unknown-size', 'Size of unknown ' + (i + 1) + ': a number of elements, or their names separated by commas; empty for one number', '1')),
      el('td', null, input('lower', 'unknown-lower', 'Lower bound of unknown ' + (i + 1), 'none')),
      el('td', null, input('upper', 'unknown-upper', 'Upper bound of unknown ' + (i + 1), 'none')),
      el('td', null, input('prior', 'unknown-prior', 'Prior of unknown ' + (i + 1) + ', as in normal(0, 10)', 'none')),
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

// A table longer than this is not put into the text box whole: laying out a box of megabytes
// blocks the page for seconds (measured in Chromium: 4.9 MB of CSV, 1.9 s of layout and 0.4 s
// to paint). The box then shows the first lines, read-only, and a note says so; the table is
// kept whole in the slot, and a paste or a file replaces it.
const BOX_CHARS = 200000;
const PREVIEW_LINES = 50;

/** Puts the active slot's table `text` into the data box (whole, or its first lines). */
function showDataText(text) {
  const box = $('data-input');
  const note = $('data-preview-note');
  if (text.length <= BOX_CHARS) {
    box.readOnly = false;
    delete box.dataset.preview;
    box.value = text;
    note.hidden = true;
    clear(note);
    return;
  }
  let end = 0;
  for (let i = 0; i < PREVIEW_LINES && end >= 0; i++) end = text.indexOf('\n', end + 1);
  box.value = text.slice(0, end < 0 ? text.length : end) + '\n…';
  box.readOnly = true;
  box.dataset.preview = 'true';
  clear(note);
  note.append('The box shows the first ' + PREVIEW_LINES + ' lines of ' + fmtInt(text.length) + ' characters: a table this large is kept whole but not shown whole, and cannot be edited here. A paste or a file replaces it. ',
    el('button', { type: 'button', class: 'small', 'data-testid': 'data-remove', onclick: function () { activeSlot().form.dataCsv = ''; showDataText(''); changed(); $('data-input').focus(); } }, 'Remove the table'));
  note.hidden = false;
}

// The summary line under the data table, from the engine's reading of the CSV (the same
// reader as the command line's). Each slot keeps the answer for the text it was given.
let dataTimer = null;
let dataToken = 0;
// The read under way ({slot, text}), from its timer until its answer.
let dataReading = null;

function showDataInfo(node, info) {
  if (info.error) {
    node.textContent = 'The data cannot be read: ' + (info.error.message || String(info.error)) + '. The check above shows where.';
    return;
  }
  const d = info.shape;
  node.textContent = fmtInt(d.rows) + (d.rows === 1 ? ' row' : ' rows') + ' × ' + d.names.length + (d.names.length === 1 ? ' column: ' : ' columns: ') + d.names.join(', ') + '. Read in this browser; nothing is uploaded.';
}

function renderDataSummary() {
  const slot = activeSlot();
  const f = slot.form;
  const node = $('data-summary');
  if (!f.dataCsv.trim()) { node.textContent = 'No data. Paste CSV with a header row, or load a file; files are read in this browser and never uploaded.'; return; }
  const text = f.dataCsv;
  if (slot.dataInfo && slot.dataInfo.text === text) { showDataInfo(node, slot.dataInfo); return; }
  node.textContent = 'Reading the data…';
  // A read of this very table is on its way: other edits (typing in the title) do not put it
  // off again.
  if (dataReading && dataReading.slot === slot && dataReading.text === text) return;
  clearTimeout(dataTimer);
  const token = ++dataToken;
  const reading = dataReading = { slot: slot, text: text };
  dataTimer = setTimeout(async function () {
    let info;
    try {
      const eng = await engine();
      info = { text: text, shape: await eng.readCsv(text) };
    } catch (e) {
      if (e && e.kind === 'cancelled') {
        // The helper was replaced (a newer check preempted it): read again if this table is
        // still the one shown, so the summary never stays at "Reading the data…".
        if (dataReading === reading) dataReading = null;
        if (token === dataToken && activeSlot() === slot && slot.form.dataCsv === text) renderDataSummary();
        return;
      }
      info = { text: text, error: e };
    }
    if (dataReading === reading) dataReading = null;
    slot.dataInfo = info;
    if (token === dataToken && activeSlot() === slot && slot.form.dataCsv === text) showDataInfo($('data-summary'), info);
  }, 200);
}

// After every edit of the active slot: keep it, check it, redraw.
function changed() {
  saveSoon();
  scheduleCheck(state.active);
  renderDataSummary();
  scheduleRender();
}

// A name for a new unknown that is not taken yet.
function nextName(vars) {
  const used = new Set(vars.map(function (v) { return v.name; }));
  for (const c of ['x', 'y', 'z', 'u', 'v', 'w']) if (!used.has(c)) return c;
  for (let i = 1; ; i++) if (!used.has('x' + i)) return 'x' + i;
}

// Pasting a large table: the engine's limits (README: at most 10^6 cells, 64 MiB of CSV).
const CELL_LIMIT = 1000000;
const CHAR_LIMIT = 64 * 1024 * 1024;
// Pastes shorter than this go in as the browser does them.
const LARGE_PASTE = 100000;
// Characters counted between two pauses that let the page answer input.
const PASTE_SLICE = 1 << 19;

// The number of fields in a CSV header line, with the delimiter the engine would take from it
// (the one of , ; tab that splits it most), counting only delimiters outside quotes.
function headerFields(line) {
  let best = 1;
  for (const d of [',', ';', '\t']) {
    let n = 1;
    let quoted = false;
    for (let i = 0; i < line.length; i++) {
      const c = line[i];
      if (c === '"') quoted = !quoted;
      else if (c === d && !quoted) n++;
    }
    if (n > best) best = n;
  }
  return best;
}

let pasteToken = 0;

// Counts the rows (non-blank lines after the header) of `text` in slices, showing progress in
// the data summary; then either puts the text in the slot or refuses it, saying why.
async function pasteLarge(slot, text) {
  const token = ++pasteToken;
  const node = $('data-summary');
  const limitText = 'the limit is ' + fmtInt(CELL_LIMIT) + ' cells (rows × columns)';
  const refuse = function (what) {
    notice(['The pasted table was not used: ' + what + '; ' + limitText + '. The data table is as it was.'], { bad: true });
    if (activeSlot() === slot) renderDataSummary();
  };
  if (text.length > CHAR_LIMIT) { refuse('it is ' + fmtInt(text.length) + ' characters long, more than 64 MiB'); return; }
  document.body.dataset.paste = 'reading';
  let firstEnd = text.indexOf('\n');
  if (firstEnd < 0) firstEnd = text.length;
  const columns = headerFields(text.slice(0, firstEnd));
  let rows = 0;
  let pos = firstEnd + 1;
  while (pos < text.length) {
    const stop = Math.min(text.length, pos + PASTE_SLICE);
    while (pos < stop) {
      let end = text.indexOf('\n', pos);
      if (end < 0) end = text.length;
      // A blank line (or one of delimiters only) is skipped by the engine: not a row.
      for (let i = pos; i < end; i++) {
        const c = text.charCodeAt(i);
        if (c !== 32 && c !== 9 && c !== 13 && c !== 44 && c !== 59) { rows++; break; }
      }
      pos = end + 1;
    }
    if (rows * columns > CELL_LIMIT) break;
    if (activeSlot() === slot) node.textContent = 'Reading the pasted data: ' + Math.round(100 * Math.min(pos, text.length) / text.length) + ' % (' + fmtInt(rows) + ' rows of ' + columns + ' columns so far; ' + limitText + ')…';
    await new Promise(function (r) { setTimeout(r, 0); });
    if (token !== pasteToken) return;
  }
  document.body.dataset.paste = 'done';
  if (rows * columns > CELL_LIMIT) {
    refuse('it has ' + (pos < text.length ? 'more than ' : '') + fmtInt(rows * columns) + ' cells (' + fmtInt(rows) + ' rows × ' + columns + ' columns)');
    return;
  }
  slot.form.dataCsv = text;
  if (activeSlot() === slot) showDataText(text);
  // Kept at once, so that this notice also says whether the storage took the table (the
  // storage's own notice would otherwise replace this one a moment later).
  saveNow({ quiet: true });
  const shortfall = storageShortfall();
  notice(['Pasted ' + fmtInt(rows) + ' rows × ' + columns + ' columns (' + fmtInt(rows * columns) + ' cells; ' + limitText + ').' + (shortfall ? ' ' + shortfall : '')], { bad: !!shortfall });
  if (activeSlot() === slot) changed();
  else { saveSoon(); scheduleCheck(state.slots.A === slot ? 'A' : 'B'); }
}

/** Connects the editor's fields to the active slot. */
export function wireForm() {
  $('title-input').addEventListener('input', function (ev) { activeSlot().form.title = ev.target.value; changed(); });
  $('notes-input').addEventListener('input', function (ev) { activeSlot().form.notes = ev.target.value; changed(); });
  $('formula-input').addEventListener('input', function (ev) { activeSlot().form.formula = ev.target.value; changed(); });
  wireSuggestions($('formula-input'));
  $('data-input').addEventListener('input', function (ev) { activeSlot().form.dataCsv = ev.target.value; changed(); });
  $('data-input').addEventListener('paste', function (ev) {
    const text = ev.clipboardData ? ev.clipboardData.getData('text/plain') : '';
    const box = ev.target;
    // A box showing only the first lines of a large table: a paste replaces the whole table.
    if (box.dataset.preview) { ev.preventDefault(); pasteLarge(activeSlot(), text); return; }
    if (text.length < LARGE_PASTE) return; // the browser pastes it as usual
    ev.preventDefault();
    const before = box.value;
    pasteLarge(activeSlot(), before.slice(0, box.selectionStart) + text + before.slice(box.selectionEnd));
  });
  for (const r of document.querySelectorAll('input[name=kind]')) {
    r.addEventListener('change', function (ev) {
      const f = activeSlot().form;
      f.kind = ev.target.value;
      if (f.kind === 'mixture' && !f.mixture.length) {
        f.mixture.push(newComponent(f));
        renderMixtureRows();
      }
      renderKind();
      changed();
    });
  }
  $('add-unknown').addEventListener('click', function () {
    const f = activeSlot().form;
    f.variables.push({ name: nextName(f.variables), size: '', lower: '', upper: '', prior: '' });
    renderUnknownRows();
    changed();
    focusIn('unknowns-table', f.variables.length - 1);
  });
  $('add-component').addEventListener('click', function () {
    const f = activeSlot().form;
    f.mixture.push(newComponent(f));
    renderMixtureRows();
    changed();
    focusIn('mixture-table', f.mixture.length - 1);
  });
  for (const k of SETTING_KEYS) {
    const id = settingInputId(k);
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
      showDataText(text);
      changed();
      notice(['Read ' + file.name + ' (' + fmtInt(file.size) + ' bytes) in this browser.']);
    });
  });
  $('model-form').addEventListener('submit', function (ev) { ev.preventDefault(); });
}
