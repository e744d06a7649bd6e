// The comparison card: shown while model B exists; the log Bayes factor log(Z_A / Z_B) once
// both have run, each side's log Z and warnings, and the button that removes model B.
//
// Owns: renderCompare, bayesFactor.
// Must not touch: the state (it only reads it; removing B is undo.js's), the results pane.
import { state } from './state.js';
import { isDisagreement } from './report-view.js';
import { runIsStale } from './runs.js';
import { removeModelB } from './undo.js';
import { isNum } from './numbers.js';
import { str, fmtSig, fmtFixed, fmtPM } from './format.js';
import { el, append, clear, $ } from './dom.js';
import { warnList } from './widgets.js';

// Replaced by the engine's typed value (issue 12/13)
/**
 * The log Bayes factor of two finished runs, log Z_A − log Z_B, with SE = √(SE_A² + SE_B²),
 * and whether the two models are equally supported within their errors (|value| ≤ 2·SE);
 * null when either run has no finite log Z.
 */
export function bayesFactor(ra, rb) {
  if (!(ra && rb && isNum(ra.log_z) && isNum(rb.log_z))) return null;
  const value = ra.log_z - rb.log_z;
  const se = Math.sqrt(Math.pow(ra.log_z_se || 0, 2) + Math.pow(rb.log_z_se || 0, 2));
  return { value: value, se: se, withinErrors: Math.abs(value) <= 2 * se };
}

export function renderCompare() {
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
  const bf = bayesFactor(ra, rb);
  if (bf) {
    let words;
    if (bf.withinErrors) words = 'Within their errors the two models are equally supported.';
    else {
      const fav = bf.value > 0 ? 'A' : 'B';
      const factor = Math.exp(Math.abs(bf.value));
      words = 'Model ' + fav + ' is favoured by a factor of about ' + (factor < 1e6 ? fmtSig(factor, 3) : 'e^' + fmtFixed(Math.abs(bf.value), 1)) + ' (Z_' + fav + ' / Z_' + (fav === 'A' ? 'B' : 'A') + ').';
    }
    append(card, el('div', { class: 'bf-row' },
      el('div', null, el('div', { class: 'logz-label' }, 'log Bayes factor log(Z_A / Z_B)'), el('div', { class: 'bf-value', 'data-testid': 'bayes-factor' }, fmtPM(bf.value, bf.se))),
      el('p', { class: 'bf-words' }, words)));
    if (isDisagreement(ra) || isDisagreement(rb)) append(card, warnList([{ kind: 'warning', text: 'At least one run\'s cross-checks disagree: do not use this Bayes factor until that is resolved.' }]));
    if (runIsStale(A) || runIsStale(B)) append(card, warnList([{ kind: 'warning', text: 'A model changed after its run; run both again for a current Bayes factor.' }]));
    append(card, el('p', { class: 'hint' }, 'SE = √(SE_A² + SE_B²). A Bayes factor compares two normalised models of the same data; it inherits every caveat of both runs.'));
  } else {
    append(card, el('p', { 'data-testid': 'bayes-factor-missing' }, 'Run both models to see the log Bayes factor log(Z_A / Z_B) ± SE. “Run A and B” runs them one after the other.'));
  }
  append(card, el('div', { class: 'compare-grid' }, side('A', A, ra), side('B', B, rb)));
  append(card, el('p', { class: 'no-print' }, el('button', {
    type: 'button', class: 'link-button', 'data-testid': 'remove-b', onclick: removeModelB,
  }, 'Remove model B')));
}
