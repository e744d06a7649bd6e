// Replacing a model with a way back: loading a demo, a file or a share link into a slot, and
// removing model B, each offer one Undo in the notice bar.
//
// The latest undo stays available (pendingUndo) until it is used, so that a message shown after
// it (a share link that cannot be opened, say) can offer it again.
// Owns: replaceModels, replaceSlotModel, removeModelB, pendingUndo.
// Must not touch: how a model is read (models-io.js) or shown (editor.js).
import { state, newSlot } from './state.js';
import { afterModelReplaced } from './slots.js';
import { cancelRun } from './runs.js';
import { writeFormToDom } from './editor.js';
import { saveSoon } from './storage.js';
import { scheduleCheck } from './checking.js';
import { renderAll } from './render-loop.js';
import { notice } from './notice.js';

let lastUndo = null;

// Offers `fn` as the Undo of the notice `parts`; it runs once at most.
function offerUndo(parts, fn) {
  const action = { label: 'Undo', fn: function () { if (lastUndo !== action) return; lastUndo = null; fn(); } };
  lastUndo = action;
  notice(parts, { action: action });
}

/** The latest Undo not yet used ({label, fn}), or null. */
export function pendingUndo() {
  return lastUndo;
}

/**
 * Replaces the models in one or both slots ({A: loaded, B: loaded}, loaded = {form, settings}),
 * with one undo that restores every replaced slot as it was (an emptied slot B stays empty).
 */
export function replaceModels(models, label) {
  const ids = Object.keys(models).sort();
  const prev = {};
  for (const id of ids) {
    const old = state.slots[id];
    prev[id] = old ? { form: JSON.parse(JSON.stringify(old.form)), settings: Object.assign({}, old.settings) } : null;
    state.slots[id] = newSlot(models[id].form, models[id].settings);
  }
  if (ids.some(function (id) { return prev[id]; })) {
    offerUndo([label + ' (model' + (ids.length > 1 ? 's ' : ' ') + ids.join(' and ') + '). '], function () {
      if (state.running && ids.indexOf(state.running.slotId) >= 0) return;
      for (const id of ids) {
        const p = prev[id];
        state.slots[id] = p ? newSlot(p.form, p.settings) : id === 'A' ? newSlot() : null;
      }
      if (ids.indexOf('B') >= 0 && !state.slots.B && state.active === 'B') state.active = 'A';
      for (const id of ids) if (state.slots[id]) afterModelReplaced(id);
    });
  }
  for (const id of ids) afterModelReplaced(id);
}

/** Replaces the model in one slot, keeping the previous one for an undo. */
export function replaceSlotModel(slotId, loaded, label) {
  const models = {};
  models[slotId] = loaded;
  replaceModels(models, label);
}

/** Removes model B (cancelling its run), with an undo that brings it back. */
export function removeModelB() {
  const B = state.slots.B;
  if (!B) return;
  if (state.running && state.running.slotId === 'B') cancelRun();
  const prev = { form: B.form, settings: B.settings };
  state.slots.B = null;
  if (state.active === 'B') state.active = 'A';
  writeFormToDom(); saveSoon(); renderAll();
  offerUndo(['Model B removed. '], function () { state.slots.B = newSlot(prev.form, prev.settings); saveSoon(); scheduleCheck('B', 0); renderAll(); });
}
