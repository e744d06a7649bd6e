// Keeping the workspace in the browser's storage, so that nothing typed is lost on reload.
//
// Stored: {v: 1, active, A, B}, each slot as the form as typed (even when it does not parse
// yet), its settings and, when it parses, the spec it describes. A single-file page keeps its
// edits under its own key, so that it opens first with its own model.
// Owns: the storage key, saveSoon, saveNow, restore, useSinglePageKey.
// Must not touch: the DOM beyond a notice when storage is full, and the engine.
import { state, newSlot, buildSpec } from './state.js';
import { sanitiseForm, sanitiseSettings } from './spec-form.js';
import { notice } from './notice.js';

let storageKey = 'kiln.workspace.v1';
let saveTimer = null;
let storageWarned = false;

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

function slotSnapshot(s) {
  if (!s) return null;
  const b = buildSpec(s);
  return { form: s.form, settings: s.settings, spec: b.errors.length ? null : b.spec };
}

export function saveNow() {
  try {
    localStorage.setItem(storageKey, JSON.stringify({ v: 1, active: state.active, A: slotSnapshot(state.slots.A), B: slotSnapshot(state.slots.B) }));
  } catch (e) {
    if (!storageWarned) {
      storageWarned = true;
      notice(['This model is too large to keep in the browser\'s storage, so it will not be restored on reload. Use “Save spec” to keep it in a file.'], { bad: true });
    }
  }
}

/** Puts the stored workspace into the state; false when there is none (or it cannot be read). */
export function restore() {
  let raw = null;
  try { raw = localStorage.getItem(storageKey); } catch (e) { raw = null; }
  if (!raw) return false;
  try {
    const w = JSON.parse(raw);
    if (!w || w.v !== 1 || !w.A) return false;
    state.slots.A = newSlot(sanitiseForm(w.A.form), sanitiseSettings(w.A.settings));
    state.slots.B = w.B ? newSlot(sanitiseForm(w.B.form), sanitiseSettings(w.B.settings)) : null;
    state.active = w.active === 'B' && state.slots.B ? 'B' : 'A';
    return true;
  } catch (e) { return false; }
}
