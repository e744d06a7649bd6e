// Small pieces of the results shared by several views: message lists and mode swatches.
//
// Owns: warnList, messageItems, colourSwatches. Must not touch: the page state (callers hand
// in the items).
import { el } from './dom.js';
import { sentence, str } from './format.js';
import { modeColor } from './plots.js';

/**
 * The engine's messages ({code, sentence, remedy?}) as list items of one kind; `source` (for
 * example 'A:') is put before each sentence. Plain strings are accepted as sentences.
 */
export function messageItems(list, kind, source) {
  return (Array.isArray(list) ? list : []).map(function (m) {
    const msg = m && typeof m === 'object' ? m : { sentence: str(m) };
    return { kind: kind, text: msg.sentence, code: msg.code, remedy: msg.remedy, source: source };
  });
}

/**
 * items = [{kind: 'warning' | 'note', text, code?, remedy?, source?}] -> a list; each sentence
 * starts with a capital, a warning's remedy follows it on its own line.
 */
export function warnList(items) {
  return el('ul', { class: 'warn-list' }, items.map(function (it) {
    return el('li', { class: it.kind, dataset: it.code ? { code: it.code } : null },
      it.source ? el('span', { class: 'source' }, it.source) : null, sentence(it.text),
      it.code ? el('span', { class: 'code', title: 'the code of this message in the JSON summary' }, it.code) : null,
      it.remedy ? el('span', { class: 'remedy' }, el('span', { class: 'remedy-label' }, 'What to do: '), sentence(it.remedy)) : null);
  }));
}

/** Colours every `.swatch[data-mode]` under `root` with its mode's colour in the plots. */
export function colourSwatches(root) {
  for (const s of root.querySelectorAll('.swatch[data-mode]')) s.style.background = modeColor(Number(s.dataset.mode));
}
