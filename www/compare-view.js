// The comparison card: shown while model B exists; the log Bayes factor log(Z_A / Z_B) ± SE
// and what it means once both have run (or, when either verdict is not "agree", the engine's
// refusal and its reason instead of a number to use), each side's verdict, log Z, mode-search
// figures and warnings, and the button that removes model B.
//
// Owns: renderCompare and the request of the engine's comparison of the two runs.
// Must not touch: the state (it only reads it; removing B is undo.js's), the results pane.
import { state } from './state.js';
import { verdictOf } from './report-view.js';
import { engine } from './engine-load.js';
import { scheduleRender } from './render-loop.js';
import { runIsStale } from './runs.js';
import { removeModelB } from './undo.js';
import { str, sentence, fmtPM, fmtInt, fmtPct } from './format.js';
import { el, append, clear, $ } from './dom.js';
import { warnList, messageItems } from './widgets.js';

// The engine's comparison of the two finished runs (run::bayes_factor, via compare_runs):
// requested once per pair of results, kept until either run changes.
let pair = { a: null, b: null, result: null, error: null };

function comparisonOf(ra, rb) {
  if (pair.a === ra && pair.b === rb) return pair;
  pair = { a: ra, b: rb, result: null, error: null };
  const mine = pair;
  engine().then(function (eng) { return eng.compare(ra, rb); })
    .then(function (res) { mine.result = res; }, function (e) { mine.error = e; })
    .then(function () { if (pair === mine) scheduleRender(); });
  return pair;
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
    const v = r ? verdictOf(r) : null;
    const c = r && r.mode_coverage;
    const k = (c && c.counts) || {};
    const items = r ? messageItems(r.warnings, 'warning') : [];
    return el('div', { class: 'compare-side', 'data-testid': 'compare-side-' + id },
      el('h3', null, id + ': ' + t),
      el('p', { class: 'muted' }, r ? 'log Z = ' + fmtPM(r.log_z, r.log_z_se) + (runIsStale(slot) ? ' (model changed since)' : '') : (slot.run && slot.run.status === 'running' ? 'running…' : 'not run yet')),
      v ? el('p', null, el('span', { class: 'side-verdict', 'data-state': v.state, 'data-testid': 'compare-verdict-' + id }, str(v.headline)),
        v.search_limited ? ' (the mode search was limited)' : '') : null,
      c ? el('p', { class: 'hint', 'data-testid': 'compare-coverage-' + id }, 'Mode search: ' + fmtInt(k.converged) + ' of ' + fmtInt(c.starts) + ' starts ended in ' + fmtInt(k.distinct) +
        ' distinct modes; chance that one more start finds a new one ' + fmtPct(c.new_mode_chance) + (c.rule_held ? '; the stopping rule held.' : '; the stopping rule did not hold.')) : null,
      r ? (items.length ? warnList(items) : el('p', { class: 'muted' }, 'No warnings.')) : null);
  }
  const cmp = ra && rb ? comparisonOf(ra, rb) : null;
  const bf = cmp && cmp.result;
  if (bf) {
    append(card, el('div', { class: 'bf-row' },
      el('div', null, el('div', { class: 'logz-label' }, 'log Bayes factor log(Z_A / Z_B)' + (bf.judged ? '' : ', not to be used')),
        el('div', { class: bf.judged ? 'bf-value' : 'bf-value refused', 'data-testid': 'bayes-factor' }, fmtPM(bf.log_bayes_factor, bf.log_bayes_factor_se))),
      bf.judged
        ? el('p', { class: 'bf-words', 'data-testid': 'bayes-factor-meaning' }, sentence(bf.meaning) + '.')
        : el('p', { class: 'bf-words refused', 'data-testid': 'bayes-factor-refused' }, 'Not to be used: ' + str(bf.refused_because) + '.')));
    if (runIsStale(A) || runIsStale(B)) append(card, warnList([{ kind: 'warning', text: 'A model changed after its run; run both again for a current Bayes factor.' }]));
    append(card, el('p', { class: 'hint' }, 'SE = √(SE_A² + SE_B²). A Bayes factor compares two normalised models of the same data; it inherits every caveat of both runs.'));
  } else if (cmp && cmp.error) {
    append(card, el('p', { class: 'error-text' }, 'The comparison failed: ' + str((cmp.error && cmp.error.message) || cmp.error)));
  } else if (cmp) {
    append(card, el('p', { class: 'muted' }, 'Comparing the two runs…'));
  } else {
    append(card, el('p', { 'data-testid': 'bayes-factor-missing' }, 'Run both models to see the log Bayes factor log(Z_A / Z_B) ± SE. “Run A and B” runs them one after the other.'));
  }
  append(card, el('div', { class: 'compare-grid' }, side('A', A, ra), side('B', B, rb)));
  append(card, el('p', { class: 'no-print' }, el('button', {
    type: 'button', class: 'link-button', 'data-testid': 'remove-b', onclick: removeModelB,
  }, 'Remove model B')));
}
