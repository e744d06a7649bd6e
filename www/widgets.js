// Small pieces of the results shared by several views: warning lists and mode swatches.
//
// Owns: warnList, colourSwatches. Must not touch: the page state (callers hand in the items).
import { el } from './dom.js';
import { sentence } from './format.js';
import { modeColor } from './plots.js';

/** items = [{kind: 'warning' | 'note', text, source?}] -> a list; texts start with a capital. */
export function warnList(items) {
  return el('ul', { class: 'warn-list' }, items.map(function (it) {
    return el('li', { class: it.kind }, it.source ? el('span', { class: 'source' }, it.source) : null, sentence(it.text));
  }));
}

/** Colours every `.swatch[data-mode]` under `root` with its mode's colour in the plots. */
export function colourSwatches(root) {
  for (const s of root.querySelectorAll('.swatch[data-mode]')) s.style.background = modeColor(Number(s.dataset.mode));
}
