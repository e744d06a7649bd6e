// The results pane for the active slot: title and meta line, stale note, run error, verdict,
// the warnings under it (notes folded), log Z and the cross-checks, modes (the engine's order,
// the tiny tail folded into one row), unknowns (the engine's summary), diagnostics and the
// printed model.
//
// Owns: renderReport, verdictOf (the engine's typed verdict), coverageText, whether a folded
// mode row is open. Engine text is shown as text only; the page orders nothing itself.
// Must not touch: the state (it only reads it), the editor, the plots (plots-view.js).
import { state, activeSlot, unknownNames } from './state.js';
import { runIsStale } from './runs.js';
import { isNum } from './numbers.js';
import { str, sentence, fmtSig, fmtFixed, fmtPM, fmtInt, fmtPct, fmtShare, fmtDuration } from './format.js';
import { $, el, append, clear, setChildren } from './dom.js';
import { warnList, messageItems, colourSwatches } from './widgets.js';

/**
 * The engine's typed verdict of a run: {state: 'agree' | 'disagree' | 'not_enough_evidence',
 * search_limited, headline, sentence, voted, abstained}. The page reads it and never matches
 * text.
 */
export function verdictOf(r) {
  const v = r && r.verdict && typeof r.verdict === 'object' ? r.verdict : null;
  return v || { state: 'not_enough_evidence', search_limited: true, headline: 'No verdict', sentence: '', voted: [], abstained: [] };
}

const FOUND_BY = {
  starts: 'scattered starts', barrier: 'across a barrier', lattice: 'from neighbouring modes', scan: 'the dense scan', chains: 'the chains +',
};

const CHECK_NAMES = {
  grid: 'Grid quadrature', importance: 'Importance sampling', laplace: 'Laplace approximation', exact: 'Exact (mixture)',
};

export function renderReport() {
  const slot = activeSlot();
  $('report-kicker').textContent = 'Model ' + state.active;
  if (!slot) {
    $('results-heading').textContent = 'Model B is empty';
    setChildren($('report-meta'), 'Start model B from the left to compare two models.');
    for (const id of ['stale-note', 'run-error', 'verdict']) $(id).hidden = true;
    emptyResults('—');
    return;
  }
  const title = slot.form.title.trim() || 'Untitled model';
  $('results-heading').textContent = title;
  document.title = 'Kiln — ' + title;
  const run = slot.run;
  const r = run && run.status === 'done' ? run.result : null;
  const check = slot.check && slot.check.result;
  // Meta line.
  let meta;
  if (r) {
    const s = r.settings || {};
    meta = 'Seed ' + str(r.seed != null ? r.seed : s.seed) + ' · ' + s.chains + ' chains × (' + fmtInt(s.warmup) + ' warm-up + ' + fmtInt(s.draws) + ' kept draws) · ' +
      (s.method === 'joint' ? 'β moves with the position' : 'position moves, then an exact draw of β') + ' · ' +
      (s.integrator === 'hmc' ? 'trajectories of fixed length' : 'trajectories that stop when they turn back') +
      (isNum(s.acceptance_goal) ? ' · acceptance goal ' + str(s.acceptance_goal) : '') +
      (isNum(r.energy_evaluations) ? ' · ' + fmtInt(r.energy_evaluations) + ' energy evaluations' : '') + ' · ' + fmtDuration(run.elapsed);
  } else if (run && run.status === 'running') meta = 'Running… numbers below update as draws arrive.';
  else if (run && run.status === 'cancelled') meta = 'The last run was cancelled.';
  else if (slot.check && slot.check.error) meta = 'Not run yet: the model has a problem, shown under the editor.';
  else meta = check ? 'Not run yet. The modes and values below come from the check; press Run to sample.' : 'Not run yet.';
  setChildren($('report-meta'), meta);
  $('stale-note').hidden = !(run && run.status === 'done' && runIsStale(slot));
  // Error.
  $('run-error').hidden = !(run && run.status === 'error');
  if (run && run.status === 'error') $('run-error-text').textContent = (run.error && (run.error.rendered || run.error.message)) || String(run.error);
  // Verdict.
  const v = $('verdict');
  v.className = 'verdict';
  if (r) {
    const verdict = verdictOf(r);
    v.dataset.state = verdict.state;
    v.dataset.searchLimited = verdict.search_limited ? 'true' : 'false';
    if (verdict.state === 'disagree') v.classList.add('bad');
    else if (verdict.state !== 'agree' || verdict.search_limited) v.classList.add('caution');
    setChildren(v, el('span', { class: 'verdict-tag', 'data-testid': 'verdict-headline' }, str(verdict.headline)),
      el('span', { 'data-testid': 'verdict-sentence' }, ' ' + sentence(verdict.sentence)));
    const nw = Array.isArray(r.warnings) ? r.warnings.length : 0;
    if (nw && verdict.state === 'agree') append(v, el('span', { class: 'verdict-more' }, ' Read the ' + (nw === 1 ? 'warning' : nw + ' warnings') + ' below.'));
    v.hidden = false;
  } else if (run && (run.status === 'running' || run.status === 'cancelled')) {
    v.classList.add('partial');
    setChildren(v, el('span', { class: 'verdict-tag' }, run.status === 'running' ? 'RUNNING' : 'CANCELLED'),
      run.status === 'running' ? 'The verdict comes when the run finishes; the running values below are provisional.' : 'The run was stopped before the end: the partial numbers below are not a result and should not be used.');
    v.hidden = false;
  } else v.hidden = true;
  renderLogZ(slot, r, check);
  renderWarnings(slot, r, check);
  renderModes(slot, r, check);
  renderUnknowns(slot, r);
  renderDiagnostics(r);
  $('dl-csv').disabled = !(r && run.csv);
  $('dl-json').disabled = !r;
  renderPrintModel(slot);
}

function emptyResults(msg) {
  $('logz-value').textContent = msg; $('logz-sub').textContent = '';
  clear($('cross-checks').tBodies[0]); clear($('warnings')); clear($('notes')); $('notes-fold').hidden = true;
  clear($('mode-table').tHead); clear($('mode-table').tBodies[0]); $('modes-caption').textContent = '';
  clear($('unknowns-summary').tHead); clear($('unknowns-summary').tBodies[0]); $('unknowns-caption').textContent = '';
  clear($('diagnostics')); $('modes-foot').textContent = '';
  $('dl-csv').disabled = true; $('dl-json').disabled = true;
}

function renderLogZ(slot, r, check) {
  const val = $('logz-value');
  const sub = $('logz-sub');
  val.className = 'logz-value';
  const run = slot.run;
  const running = run && (run.status === 'running' || run.status === 'cancelled') && run.progress && Array.isArray(run.progress.running) && run.progress.running.length ? run.progress.running[run.progress.running.length - 1] : null;
  if (r) {
    val.textContent = fmtPM(r.log_z, r.log_z_se);
    const cv = r.control_variates;
    const cvText = cv && cv.used
      ? ' With control variates from the base: without them ' + fmtPM(r.log_z_plain, r.log_z_plain_se) + ' (' + str(cv.note) + ').'
      : '';
    const pr = r.proposals;
    const prText = pr && pr.used
      ? ' Combined with the independence proposals: the tempered estimate alone ' + fmtPM(pr.log_z_tempered, pr.se_tempered) + ', the proposals alone ' + fmtPM(pr.log_z_proposals, pr.se_proposals) + ' (' + str(pr.note) + ').'
      : '';
    sub.textContent = '± is one standard error of the sampling (it cannot account for modes never found).' + cvText + prText;
  } else if (running) {
    val.classList.add('partial');
    val.textContent = fmtPM(running.log_z, running.log_z_se);
    sub.textContent = (run.status === 'running' ? 'So far, after ' : 'Stopped after ') + fmtInt(running.draws) + ' kept draws: provisional.';
  } else {
    val.textContent = '—';
    sub.textContent = check ? 'Run the model for the sampled value; the check values are in the table.' : '';
  }
  const tb = $('cross-checks').tBodies[0];
  clear(tb);
  const rows = [];
  if (r && Array.isArray(r.cross_checks)) {
    for (const c of r.cross_checks) {
      const agree = c.agrees === true ? el('span', { class: 'pill yes' }, 'agrees') : c.agrees === false ? el('span', { class: 'pill no' }, 'disagrees') : el('span', { class: 'pill neutral' }, 'does not vote');
      rows.push(el('tr', null,
        el('th', { scope: 'row' }, CHECK_NAMES[c.name] || str(c.name), c.note ? el('span', { class: 'check-note' }, str(c.note)) : null,
          !c.votes && c.abstains_because ? el('span', { class: 'check-note' }, 'Does not vote: ' + str(c.abstains_because) + '.') : null),
        el('td', { class: 'num' }, isNum(c.error) && c.error > 0 ? fmtPM(c.log_z, c.error) : fmtSig(c.log_z, 6) + (isNum(c.error) ? '' : ' (no error bar)')),
        el('td', { class: 'num' }, isNum(c.z_score) ? fmtFixed(c.z_score, 2) : '—'),
        el('td', null, agree)));
    }
  } else if (check) {
    const items = [['exact', check.exact_log_z, 'exact for a Gaussian mixture'], ['grid', check.grid_log_z, 'quadrature on a refined grid'], ['laplace', check.laplace_log_z, 'sum of Gaussian approximations at the modes']];
    for (const it of items) {
      if (!isNum(it[1])) continue;
      rows.push(el('tr', null, el('th', { scope: 'row' }, CHECK_NAMES[it[0]], el('span', { class: 'check-note' }, it[2])), el('td', { class: 'num' }, fmtSig(it[1], 6)), el('td', { class: 'num' }, '—'),
        el('td', null, el('span', { class: 'pill neutral' }, 'after a run'))));
    }
  }
  if (!rows.length) rows.push(el('tr', null, el('td', { colspan: 4, class: 'empty' }, 'No cross-checks yet.')));
  append(tb, rows);
}

// Warnings (what to act on, each with what to do) in the card under the verdict; notes (what
// Kiln chose and why) in a fold after them, closed unless the reader opened it.
function renderWarnings(slot, r, check) {
  const node = $('warnings');
  const notesNode = $('notes');
  clear(node); clear(notesNode);
  const items = [];
  let notes = [];
  const run = slot.run;
  if (run && run.status === 'cancelled') items.push({ kind: 'warning', text: 'the run was cancelled before it finished; nothing below is a final result', remedy: 'run the model again and let it finish' });
  if (r) {
    items.push(...messageItems(r.warnings, 'warning'));
    notes = messageItems(r.notes, 'note');
  } else if (slot.check && slot.check.error) {
    items.push({ kind: 'warning', text: 'the model cannot be used yet: ' + (slot.check.error.message || 'see the message under the editor'), remedy: 'correct the model as the message under the editor says', source: slot.check.local ? 'Form:' : 'Check:' });
  } else if (check) {
    items.push(...messageItems(check.warnings, 'warning', 'Check:'));
    notes = messageItems(check.notes, 'note', 'Check:');
  }
  $('act-card').classList.toggle('calm', !items.length);
  if (!items.length) append(node, el('p', { class: 'muted', 'data-testid': 'no-warnings' }, r ? 'No warnings: nothing in the diagnostics calls for action.' : (run && run.status === 'running' ? 'Warnings appear when the run finishes.' : 'No warnings from the check. A run adds its own diagnostics.')));
  else append(node, warnList(items));
  const fold = $('notes-fold');
  fold.hidden = !notes.length;
  $('notes-summary').textContent = 'What Kiln chose, and why (' + (notes.length === 1 ? '1 note' : notes.length + ' notes') + ')';
  if (notes.length) append(notesNode, warnList(notes));
}

// The mode table whose folded row the reader opened (kept across re-renders of the same result).
let openFold = null;

/** The engine's row order: {shown, folded} (1-based mode numbers); every mode, by number, without one. */
function tableOrder(t, n) {
  const ok = (a) => Array.isArray(a) && a.every(function (k) { return Number.isInteger(k) && k >= 1 && k <= n; });
  if (t && ok(t.shown) && ok(t.folded) && t.shown.length + t.folded.length === n) return t;
  return { shown: Array.from({ length: n }, function (_, k) { return k + 1; }), folded: [], folded_mass: 0, folded_not_visited: 0 };
}

function renderModes(slot, r, check) {
  const table = $('mode-table');
  const names = unknownNames(slot);
  const D = names.length;
  const wide = D > 5;
  clear(table.tHead); clear(table.tBodies[0]);
  const modes = r && Array.isArray(r.modes) ? r.modes : (check && Array.isArray(check.modes) ? check.modes : []);
  const exact = r && Array.isArray(r.exact_masses) ? r.exact_masses : (check && check.exact && Array.isArray(check.exact.masses) && !r ? check.exact.masses : null);
  const tbl = r ? r.mode_table : check && check.mode_table;
  const order = tableOrder(tbl, modes.length);
  const head = [el('th', { scope: 'col' }, 'Mode')];
  if (wide) head.push(el('th', { scope: 'col' }, 'location'));
  else for (const n of names) head.push(el('th', { scope: 'col', class: 'num' }, n));
  if (r) head.push(el('th', { scope: 'col', class: 'num' }, 'mass ± SE'));
  else head.push(el('th', { scope: 'col', class: 'num' }, 'energy'));
  head.push(el('th', { scope: 'col', class: 'num' }, 'Laplace mass'));
  if (exact) head.push(el('th', { scope: 'col', class: 'num' }, 'exact mass'));
  if (r) { head.push(el('th', { scope: 'col' }, 'visited')); head.push(el('th', { scope: 'col' }, 'found by')); }
  append(table.tHead, el('tr', null, head));
  function row(k, folded) {
    const m = modes[k - 1];
    const loc = Array.isArray(m.location) ? m.location : [];
    const cells = [el('th', { scope: 'row' }, el('span', { class: 'swatch', 'aria-hidden': 'true', dataset: { mode: String(k) } }), String(k),
      m.found_by === 'chains' ? el('span', { title: 'found by the chains, missed by the mode search' }, ' +') : null,
      m.non_quadratic ? el('span', { class: 'flag', title: 'measured to be far from Gaussian' }, ' *') : null)];
    if (wide) cells.push(el('td', { class: 'note' }, loc.map(function (v, i) { return (names[i] || '?') + ' = ' + fmtSig(v); }).join(', ')));
    else for (let i = 0; i < D; i++) cells.push(el('td', { class: 'num' }, fmtSig(loc[i])));
    if (r) cells.push(el('td', { class: 'num' }, m.visited && isNum(m.mass_se) ? fmtPM(m.mass, m.mass_se) : 'not visited'));
    else cells.push(el('td', { class: 'num' }, fmtSig(m.energy, 5)));
    cells.push(el('td', { class: 'num' }, fmtSig(m.laplace_mass, 3)));
    if (exact) cells.push(el('td', { class: 'num' }, fmtSig(exact[k - 1], 4)));
    if (r) {
      cells.push(el('td', null, m.visited ? el('span', { class: 'pill yes' }, 'yes') : el('span', { class: 'pill no' }, 'no')));
      cells.push(el('td', null, FOUND_BY[m.found_by] || str(m.found_by || '—')));
    }
    return el('tr', folded ? { class: 'folded', 'data-testid': 'folded-mode', hidden: openFold !== tbl } : null, cells);
  }
  const body = order.shown.slice(0, 200).map(function (k) { return row(k, false); });
  if (order.folded.length) {
    const n = order.folded.length;
    const nv = order.folded_not_visited || 0;
    const open = openFold === tbl;
    const label = n + ' more modes, ' + fmtShare(order.folded_mass) + ' together' + (nv === n ? ', none visited' : nv ? ', ' + nv + ' of them not visited' : '');
    body.push(el('tr', { class: 'fold-row', 'data-testid': 'fold-row' }, el('td', { colspan: head.length },
      el('button', {
        type: 'button', class: 'link-button fold-toggle', 'aria-expanded': open ? 'true' : 'false', 'data-testid': 'fold-toggle',
        onclick: function () { openFold = openFold === tbl ? null : tbl; renderModes(slot, r, check); },
      }, label))));
    for (const k of order.folded.slice(0, 200)) body.push(row(k, true));
  }
  if (!body.length) body.push(el('tr', null, el('td', { colspan: head.length, class: 'empty' }, slot.check && slot.check.pending ? 'Checking…' : 'No modes yet: the model has not been checked successfully.')));
  append(table.tBodies[0], body);
  colourSwatches(table);
  const cov = (r && r.mode_coverage) || (check && check.mode_coverage);
  $('modes-caption').textContent = modes.length ? (r ? 'Largest mass first. ' : 'Largest Laplace mass first. ') + (cov ? coverageText(cov) : '') : '';
  const foot = [];
  if (order.shown.length > 200 || order.folded.length > 200) foot.push('Showing at most 200 rows of each part; the JSON summary has every mode.');
  if (r) foot.push('Mass is the share of Z in each mode from the sampler; the Laplace mass comes from the Gaussian approximations alone. “+” marks a mode the chains found that the mode search had missed; a mode not visited got no draws, so its mass is not estimated.' + (order.folded.length ? ' Modes that together hold under 0.1 % share one row; open it to see them.' : ''));
  else if (modes.length) foot.push('Modes from the optimiser. Energy is the value at the mode; run the model to weigh them by sampling.');
  $('modes-foot').textContent = foot.join(' ');
}

/** The mode search's evidence in one paragraph (the figures are in the JSON summary). */
export function coverageText(c) {
  const k = c.counts || {};
  const parts = ['Mode search: ' + str(c.summary) + '.',
    fmtInt(k.converged) + ' of ' + fmtInt(c.starts) + ' starts ended in ' + fmtInt(k.distinct) + ' distinct modes, ' + fmtInt(k.singletons) + ' reached by only one start; chance that one more start finds a new mode ' + fmtPct(c.new_mode_chance) + ' (Good–Turing); expected modes not yet seen ' + (isNum(c.expected_unseen) ? fmtFixed(c.expected_unseen, 2) : 'unknown') + ' (Boender & Rinnooy Kan).'];
  for (const l of (c.limitations || [])) parts.push('Limitation: ' + sentence(l.sentence));
  return parts.join(' ');
}

// The engine's unknowns summary (run::digest): unknown | prior | median | interval | mean ± sd |
// R-hat | effective draws, the prior column only when a prior was given, the level stated.
function renderUnknowns(slot, r) {
  const table = $('unknowns-summary');
  const tb = table.tBodies[0];
  clear(table.tHead); clear(tb);
  const sum = r && r.unknowns_summary && Array.isArray(r.unknowns_summary.rows) ? r.unknowns_summary : null;
  const level = sum && isNum(sum.interval_level) ? sum.interval_level : 0.9;
  const pct = str(Number((100 * level).toPrecision(4)));
  const priors = sum ? sum.rows.some(function (u) { return u.prior != null; }) : false;
  const cols = ['unknown'].concat(priors ? ['prior'] : [], ['median', pct + ' % interval', 'mean ± sd', 'R-hat', 'effective draws']);
  append(table.tHead, el('tr', null, cols.map(function (c, i) { return el('th', { scope: 'col', class: i === 0 || c === 'prior' ? null : 'num' }, c); })));
  $('unknowns-caption').textContent = sum ? 'Target draws weighted by p(β = 1 | x); the interval holds the central ' + pct + ' % of the mass.' : '';
  if (!sum) { append(tb, el('tr', null, el('td', { colspan: cols.length, class: 'empty' }, 'Run the model to summarise the unknowns.'))); return; }
  sum.rows.forEach(function (u, i) {
    const info = r.unknowns && r.unknowns[i];
    const bounds = info && (isNum(info.lower) || isNum(info.upper)) ? ' (' + (isNum(info.lower) ? fmtSig(info.lower) : '−∞') + ' to ' + (isNum(info.upper) ? fmtSig(info.upper) : '∞') + ')' : '';
    const iv = Array.isArray(u.interval) ? u.interval : [];
    const rh = u.rhat, ess = u.effective_draws;
    append(tb, el('tr', null,
      el('th', { scope: 'row' }, str(u.name), bounds ? el('span', { class: 'muted' }, bounds) : null),
      priors ? el('td', { class: 'code' }, u.prior == null ? '—' : str(u.prior)) : null,
      el('td', { class: 'num' }, fmtSig(u.median)),
      el('td', { class: 'num' }, fmtSig(iv[0]) + ' to ' + fmtSig(iv[1])),
      el('td', { class: 'num' }, fmtSig(u.mean) + ' ± ' + fmtSig(u.sd)),
      el('td', { class: 'num' + (isNum(rh) && rh > 1.01 ? ' flag' : ''), title: isNum(rh) && rh > 1.01 ? 'above 1.01: the chains disagree' : null }, isNum(rh) ? rh.toFixed(3) : fmtSig(rh)),
      el('td', { class: 'num' + (isNum(ess) && ess < 100 ? ' flag' : '') }, fmtInt(ess))));
  });
}

// [key in result.diagnostics, label, value -> [text, explanation or null, flagged]].
const DIAG = [
  ['acceptance', 'Mean acceptance', function (v, r) { return [fmtFixed(v, 3), 'goal ' + str((r.settings || {}).acceptance_goal || 0.8)]; }],
  ['divergences', 'Divergent transitions', function (v) { return [fmtInt(v), v > 0 ? 'the integrator broke down in places; results near those regions are suspect' : null, v > 0]; }],
  ['max_depth_hits', 'Trajectories stopped at the tree-depth limit', function (v) { return [fmtInt(v), null, v > 0]; }],
  ['independence_acceptance', 'Acceptance of independence moves from the base', function (v) { return [fmtPct(v)]; }],
  ['hamiltonian_share', 'Share of iterations with a Hamiltonian move', function (v) { return [fmtPct(v), 'the others only drew from the base and redrew β']; }],
  ['round_trips', 'Round trips between β = 0 and β = 1, per chain', function (v) { const a = Array.isArray(v) ? v : [v]; return [a.map(fmtInt).join(', '), a.some(function (x) { return x === 0; }) ? 'a chain never made a round trip' : null, a.some(function (x) { return x === 0; })]; }],
  ['share_near_beta_one', 'Share of time near β = 1', function (v) { return [fmtPct(v)]; }],
  ['mean_p1', 'Mean probability of β = 1 given the position', function (v) { return [fmtFixed(v, 3)]; }],
  ['log_z_ess', 'Effective draws of the log Z series', function (v) { return [fmtInt(v), v < 100 ? 'few: the log Z error bar is itself uncertain' : null, v < 100]; }],
  ['is_ess', 'Effective draws of the importance-sampling check', function (v) { return [fmtInt(v)]; }],
  ['bias_span', 'Span of the learnt tempering bias', function (v) { return [fmtSig(v, 3) + ' nats']; }],
  ['base_components', 'Components of the base mixture', function (v) { return [fmtInt(v)]; }],
  ['base_refitted', 'Base refitted during warm-up', function (v) { return [v ? 'yes' : 'no']; }],
  ['step_sizes', 'Step sizes, per chain', function (v) { return [(Array.isArray(v) ? v : [v]).map(function (x) { return fmtSig(x, 3); }).join(', ')]; }],
  ['far_from_modes', 'Share of target weight far from every known mode', function (v) { return [fmtPct(v), v > 0.01 ? 'a mode may be missing' : null, v > 0.01]; }],
];

function renderDiagnostics(r) {
  const dl = $('diagnostics');
  clear(dl);
  if (!r) { append(dl, el('dt', null, 'Diagnostics'), el('dd', { class: 'muted' }, 'after a run')); return; }
  const d = r.diagnostics || {};
  const seen = new Set();
  function row(label, value, explain, flag) {
    append(dl, el('dt', null, label), el('dd', flag ? { class: 'flag' } : null, value, explain ? el('span', { class: 'explain' }, explain) : null));
  }
  for (const spec of DIAG) {
    if (!(spec[0] in d)) continue;
    seen.add(spec[0]);
    const out = spec[2](d[spec[0]], r);
    row(spec[1], out[0], out[1], out[2]);
  }
  for (const k of Object.keys(d)) {
    if (seen.has(k)) continue;
    const v = d[k];
    row(k.replace(/_/g, ' '), Array.isArray(v) ? v.map(function (x) { return fmtSig(x); }).join(', ') : (typeof v === 'object' && v !== null ? JSON.stringify(v) : fmtSig(v)));
  }
  if (isNum(r.energy_evaluations)) row('Energy evaluations (with or without gradient)', fmtInt(r.energy_evaluations));
}

// The model as text, for the printed report.
function renderPrintModel(slot) {
  const node = $('print-model');
  clear(node);
  const f = slot.form;
  if (f.notes.trim()) append(node, el('p', null, f.notes));
  append(node, el('p', null, el('strong', null, 'Unknowns: '), f.variables.map(function (v) {
    const lo = str(v.lower).trim(), hi = str(v.upper).trim();
    return v.name + (lo || hi ? ' in [' + (lo || '−∞') + ', ' + (hi || '∞') + ']' : '');
  }).join('; ')));
  if (f.kind === 'mixture') {
    append(node, el('p', null, el('strong', null, 'Gaussian mixture: '), f.mixture.length + ' components'));
    append(node, el('pre', null, f.mixture.map(function (c) { return 'weight ' + c.weight + ', mean [' + c.mean + '], ' + (c.shape === 'sd' ? 'sd [' : 'cov [') + c.spread + ']'; }).join('\n')));
  } else {
    append(node, el('p', null, el('strong', null, f.kind === 'log_density' ? 'Log density:' : 'Energy:')));
    append(node, el('pre', null, f.formula));
    const d = slot.check && slot.check.result;
    if (f.dataCsv.trim() && d && d.data_rows) append(node, el('p', null, el('strong', null, 'Data: '), d.data_rows + ' rows of ' + d.data_columns.join(', ')));
  }
}
