// The two model slots as the user moves between them: switching tabs, starting model B,
// and bringing the page up to date after a slot's model was replaced.
//
// Owns: switchSlot, afterModelReplaced, startModelB.
// Must not touch: what a slot holds beyond creating it (spec-form.js, editor.js, runs.js).
import { state, newSlot } from './state.js';
import { $ } from './dom.js';
import { writeFormToDom } from './editor.js';
import { scheduleCheck, renderCheck } from './checking.js';
import { saveSoon } from './storage.js';
import { renderAll } from './render-loop.js';

export function switchSlot(id) {
  state.active = id;
  writeFormToDom();
  renderCheck();
  saveSoon();
  if (state.slots[id] && !state.slots[id].check) scheduleCheck(id, 0);
  renderAll();
}

/** After a slot got a new model: show it if active, keep it, check it at once, redraw. */
export function afterModelReplaced(slotId) {
  if (state.active === slotId) writeFormToDom();
  saveSoon();
  scheduleCheck(slotId, 0);
  renderAll();
}

/** Starts model B as a copy of A (asCopy) or empty, and shows it. */
export function startModelB(asCopy) {
  if (asCopy) {
    const a = state.slots.A;
    state.slots.B = newSlot(JSON.parse(JSON.stringify(a.form)), Object.assign({}, a.settings));
    if (!state.slots.B.form.title.trim()) state.slots.B.form.title = 'Model B';
    else state.slots.B.form.title = state.slots.B.form.title + ' (B)';
  } else {
    state.slots.B = newSlot();
    state.slots.B.form.title = 'Model B';
  }
  afterModelReplaced('B');
  switchSlot('B');
  $(asCopy ? 'title-input' : 'formula-input').focus();
}
