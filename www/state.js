// The page's state: the two model slots (A and B), which one is shown, the running job.
//
// A slot is {form, settings (as typed), check, run, grid, pair, …}: what the user typed and what
// the engine said about it. Owns: state, newSlot, activeSlot, buildSpec, unknownNames.
// Must not touch: the DOM, storage or the engine (the modules that do read and write this).
import { emptyForm, DEFAULT_SETTINGS, formToSpec } from './spec-form.js';

/** The demo a first visit opens with. */
export const DEFAULT_DEMO = 'default-two-modes.json';

export function newSlot(form, settings) {
  return { form: form || emptyForm(), settings: Object.assign({}, DEFAULT_SETTINGS, settings || {}),
    check: null, checkToken: 0, checkTimer: null, lastCheckJson: null,
    run: null, grid: null, gridKey: null, gridToken: 0, pair: [0, 1] };
}

export const state = {
  active: 'A',
  slots: { A: newSlot(), B: null },
  demos: [],
  running: null,     // {slotId, handle, cancelled}
  queue: [],         // slot ids waiting to run after the current one
  hadStorage: false, // the workspace was restored from the browser's storage
};

export function activeSlot() {
  return state.slots[state.active];
}

/** The spec a slot's form describes: {spec, errors, settings} (see formToSpec). */
export function buildSpec(slot) {
  return formToSpec(slot.form, slot.settings);
}

/** The names of the unknowns: from the run, else the check, else the form. */
export function unknownNames(slot) {
  const r = slot.run && slot.run.result;
  if (r && Array.isArray(r.unknowns)) return r.unknowns.map(function (u) { return u.name; });
  const c = slot.check && slot.check.result;
  if (c && Array.isArray(c.unknowns)) return c.unknowns.map(function (u) { return u.name; });
  return slot.form.variables.map(function (v) { return v.name.trim(); });
}
