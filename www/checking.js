// Checking as you type: the engine's check_spec on the model in a slot, shortly after each
// edit, and its answer under the editor (the error box with the engine's caret text, the
// status line, the modes the optimiser found).
//
// Owns: scheduleCheck, localCheck, renderCheck, firstCheckDone and the slot's check fields.
// Must not touch: the form's fields (editor.js) or the results pane (report-view.js).
import { state, activeSlot, buildSpec, unknownNames } from './state.js';
import { engine } from './engine-load.js';
import { ensureGrid } from './grid.js';
import { scheduleRender } from './render-loop.js';
import { $, el, append, clear } from './dom.js';
import { isNum } from './numbers.js';
import { fmtSig, fmtFixed, fmtShare, fmtDuration } from './format.js';
import { warnList, messageItems, colourSwatches } from './widgets.js';

let firstCheckResolve = null;
/** Resolves once the first check (of any slot) has an answer. */
export const firstCheckDone = new Promise(function (resolve) { firstCheckResolve = resolve; });

/** The check of a form with local errors (rendered texts from formToSpec): never sent to the engine. */
export function localCheck(errors) {
  return { error: { kind: 'local', message: errors[0].split('\n')[0].replace(/^error: /, ''), rendered: errors.join('\n') }, local: true };
}

export function scheduleCheck(slotId, delay) {
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
    slot.check = localCheck(built.errors);
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
    const eng = await engine();
    const res = await eng.check(json);
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

/** Draws the active slot's check under the editor. */
export function renderCheck() {
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
    // The engine's order (largest Laplace mass first); the tiny tail is one line under it.
    const t = r.mode_table;
    const valid = t && Array.isArray(t.shown) && Array.isArray(t.folded) && t.shown.length + t.folded.length === modes.length &&
      t.shown.concat(t.folded).every(function (k) { return Number.isInteger(k) && k >= 1 && k <= modes.length; });
    const shown = valid ? t.shown : modes.map(function (_, k) { return k + 1; });
    const body = shown.slice(0, 30).map(function (n) {
      const k = n - 1;
      const m = modes[k];
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
    if (shown.length > 30) append(modesNode, el('p', { class: 'hint' }, '… and ' + (shown.length - 30) + ' more (all are in the results).'));
    if (valid && t.folded.length) append(modesNode, el('p', { class: 'hint', 'data-testid': 'check-folded' }, '… ' + t.folded.length + ' more modes, ' + fmtShare(t.folded_mass) + ' of the Laplace mass together (listed in the results).'));
    if (modes.some(function (m) { return m.non_quadratic; })) append(modesNode, el('p', { class: 'hint' }, '* measured to be far from Gaussian: the Laplace value is unreliable for it.'));
    colourSwatches(modesNode);
  }
  // The check's warnings (the grid's among them); its notes are in the results pane's fold.
  const warns = messageItems(r.warnings, 'warning');
  if (warns.length) append(modesNode, warnList(warns));
}
