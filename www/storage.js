// Keeping the workspace in the browser's storage, so that nothing typed is lost on reload.
//
// Stored: {v: 1, active, A, B}, each slot as the form as typed (even when it does not parse
// yet), its settings and, when it parses, the spec it describes. A single-file page keeps its
// edits under its own key, so that it opens first with its own model.
// When the storage is disabled or full the page goes on working and says, once, that edits
// are not kept; when only the data tables are too large, everything else is kept without them
// (and the notice says the data must be loaded again after a reload).
// Owns: the storage key, saveSoon, saveNow, restore, useSinglePageKey, storageState, storageShortfall
// (body[data-storage]: ok | no-data | off).
// Must not touch: the DOM beyond that attribute and a notice, and the engine.
import { state, newSlot, buildSpec } from './state.js';
import { sanitiseForm, sanitiseSettings } from './spec-form.js';
import { notice } from './notice.js';

let storageKey = 'kiln.workspace.v1';
let saveTimer = null;
let warned = '';
// The size of the data tables (characters) that last did not fit: at that size or more, the
// page does not try again (a large paste would otherwise be serialised twice per edit).
let tooLarge = Infinity;

function dataSize() {
  return ['A', 'B'].reduce(function (n, id) { return n + (state.slots[id] ? state.slots[id].form.dataCsv.length : 0); }, 0);
}

// A short hash of a text (FNV-1a, 32 bits, base 36).
function fnv(text) {
  let h = 0x811c9dc5;
  for (let i = 0; i < text.length; i++) { h ^= text.charCodeAt(i); h = Math.imul(h, 0x01000193) >>> 0; }
  return h.toString(36);
}

/** Called once at start by a single-file page with its embedded bundle. */
export function useSinglePageKey(bundle) {
  storageKey += '.single.' + fnv(JSON.stringify([bundle.spec || null, bundle.settings || null].concat(bundle.b ? [bundle.b] : [])));
}

export function saveSoon() {
  clearTimeout(saveTimer);
  saveTimer = setTimeout(saveNow, 250);
}

function slotSnapshot(s, withData) {
  if (!s) return null;
  if (!withData) {
    // The form without its data table (nor a spec, which would carry the data).
    const form = Object.assign({}, s.form, { dataCsv: '' });
    return { form: form, settings: s.settings, spec: null, dataDropped: s.form.dataCsv.length > 0 };
  }
  const b = buildSpec(s);
  return { form: s.form, settings: s.settings, spec: b.errors.length ? null : b.spec };
}

function store(text) {
  localStorage.setItem(storageKey, text);
}

/** What the page keeps right now: ok | no-data (the data tables are not kept) | off. */
export function storageState() {
  return document.body.dataset.storage || 'ok';
}

function setState(v, message, quiet) {
  document.body.dataset.storage = v;
  if (message && warned !== v) {
    warned = v;
    if (!quiet) notice([message], { bad: true });
  }
}

/** What a caller's own notice adds when the storage does not keep everything (else ''). */
export function storageShortfall() {
  const v = storageState();
  if (v === 'no-data') return 'The data table is too large for the browser\'s storage: after a reload it must be loaded again (“Save spec” keeps everything in a file).';
  if (v === 'off') return 'The browser\'s storage is full or disabled: edits are not kept after a reload (“Save spec” keeps the model in a file).';
  return '';
}

/** Keeps the workspace now. `opt.quiet`: a change of storage state shows no notice (the caller
 *  says it in its own, with storageShortfall). */
export function saveNow(opt) {
  const quiet = !!(opt && opt.quiet === true);
  clearTimeout(saveTimer);
  const snap = function (withData) {
    return JSON.stringify({ v: 1, active: state.active, A: slotSnapshot(state.slots.A, withData), B: slotSnapshot(state.slots.B, withData) });
  };
  const size = dataSize();
  if (size < tooLarge) {
    try {
      store(snap(true));
      if (storageState() !== 'ok') setState('ok', null);
      return;
    } catch (e) { tooLarge = size; /* full or disabled: try without the data below */ }
  }
  try {
    store(snap(false));
    setState('no-data', 'The data table is too large for the browser\'s storage: the model, formula and settings are kept, but after a reload the data must be loaded again. Use “Save spec” to keep everything in a file.', quiet);
  } catch (e) {
    setState('off', 'This browser does not let the page keep anything (its storage is full or disabled): edits are not kept after this tab is closed or reloaded. The page works as usual; use “Save spec” to keep the model in a file.', quiet);
  }
}

/** Puts the stored workspace into the state; false when there is none (or it cannot be read). */
export function restore() {
  let raw = null;
  let readable = true;
  try { raw = localStorage.getItem(storageKey); } catch (e) { raw = null; readable = false; }
  if (!readable) {
    setState('off', 'This browser does not let the page keep anything (its storage is disabled): edits are not kept after this tab is closed or reloaded. The page works as usual; use “Save spec” to keep the model in a file.');
    return false;
  }
  if (!raw) return false;
  try {
    const w = JSON.parse(raw);
    if (!w || w.v !== 1 || !w.A) return false;
    state.slots.A = newSlot(sanitiseForm(w.A.form), sanitiseSettings(w.A.settings));
    state.slots.B = w.B ? newSlot(sanitiseForm(w.B.form), sanitiseSettings(w.B.settings)) : null;
    state.active = w.active === 'B' && state.slots.B ? 'B' : 'A';
    if (w.A.dataDropped || (w.B && w.B.dataDropped)) {
      notice(['The data table was too large for the browser\'s storage and was not kept: load it again (the model, formula and settings are as you left them).'], { bad: true });
    }
    return true;
  } catch (e) { return false; }
}
