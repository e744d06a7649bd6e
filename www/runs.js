// Runs: starting one (or A then B), following its progress, cancelling it, and the run bar.
//
// Owns: startRun, cancelRun, renderRunBar, runIsStale, setRunState (body[data-run-state]),
// the slot's `run` and state.running / state.queue. A run that fails (the engine reports an
// error, traps, or a worker dies) gives the slot back its earlier finished result, if it had
// one, and says in the notice bar what happened; the model and settings are never touched.
// Must not touch: the results pane (report-view.js draws a finished run) or the form.
import { state, activeSlot, buildSpec, unknownNames } from './state.js';
import { engine, engineIsReady } from './engine-load.js';
import { switchSlot } from './slots.js';
import { localCheck, renderCheck } from './checking.js';
import { ensureGrid } from './grid.js';
import { renderAll, scheduleRender } from './render-loop.js';
import { isNum } from './numbers.js';
import { fmtInt, fmtDuration } from './format.js';
import { notice } from './notice.js';
import { $, el } from './dom.js';

// The engine's plot draws -> {names, cols: one array per unknown, mode, beta}, or null.
function normaliseDraws(d, D) {
  if (!d || !Array.isArray(d.x)) return null;
  const n = Array.isArray(d.mode) ? d.mode.length : Array.isArray(d.beta) ? d.beta.length : -1;
  let cols;
  const colsLike = d.x.length === D && Array.isArray(d.x[0]) && (n < 0 || d.x[0].length === n);
  if (colsLike) cols = d.x;
  else if (n >= 0 && d.x.length === n) {
    cols = [];
    for (let j = 0; j < D; j++) cols.push(d.x.map(function (row) { return row[j]; }));
  } else return null;
  return { names: Array.isArray(d.names) ? d.names.map(String) : null, cols: cols, mode: Array.isArray(d.mode) ? d.mode : null, beta: d.beta || null };
}

/** idle | running | done | cancelled | error: the latest run, for tests and benchmarks. */
export function setRunState(v) {
  document.body.dataset.runState = v;
}

/** Runs a slot's model; queueRest = slot ids to run after it. */
export async function startRun(slotId, queueRest) {
  if (state.running || !engineIsReady()) return;
  const slot = state.slots[slotId];
  if (!slot) return;
  const built = buildSpec(slot);
  if (built.errors.length) {
    if (state.active !== slotId) switchSlot(slotId);
    slot.check = localCheck(built.errors);
    renderCheck();
    setProgressText('Fix the problems in model ' + slotId + ' first (shown under its editor).');
    state.queue = [];
    return;
  }
  state.queue = queueRest || [];
  const json = JSON.stringify(built.spec);
  // The slot's latest finished result, kept to be shown again if this run fails.
  const earlier = slot.run && slot.run.status === 'done' ? slot.run : slot.run && slot.run.earlier ? slot.run.earlier : null;
  const run = { status: 'running', specJson: json, overrides: built.settings, started: performance.now(), phase: 'Starting…', info: null, progress: null, result: null, draws: null, csv: null, error: null, earlier: earlier };
  slot.run = run;
  const running = { slotId: slotId, handle: null, cancelled: false };
  state.running = running;
  setRunState('running');
  renderAll();
  const eng = await engine();
  if (running.cancelled) { finishRun(slot, run, running, { kind: 'cancelled' }); return; }
  const handle = eng.run(json, built.settings, {
    onPhase: function (t) { if (slot.run === run && run.status === 'running') { run.phase = t; scheduleRender(); } },
    onProgress: function (info) {
      if (slot.run !== run || run.status !== 'running') return;
      run.info = info;
      run.progress = info.progress;
      // For tests and benchmarks: the latest running log Z and its SE, as data attributes.
      const rl = info.progress && info.progress.running;
      if (rl && rl.length) {
        document.body.dataset.runningSe = String(rl[rl.length - 1].log_z_se);
        document.body.dataset.runningDraws = String(rl[rl.length - 1].draws);
      }
      scheduleRender();
    },
  });
  running.handle = handle;
  handle.done.then(function (fin) {
    const D = fin.result && Array.isArray(fin.result.unknowns) ? fin.result.unknowns.length : unknownNames(slot).length;
    Object.assign(run, {
      status: 'done', result: fin.result, draws: normaliseDraws(fin.draws, D), csv: fin.csv,
      progress: fin.progress || run.progress, elapsed: fin.elapsed, workers: fin.workers, earlier: null,
    });
    // Where the run's time went, for the workers benchmark (scripts/bench-workers.mjs).
    document.body.dataset.runTimings = JSON.stringify(fin.timings || {});
    finishRun(slot, run, running, null);
  }, function (e) { finishRun(slot, run, running, e); });
}

function finishRun(slot, run, running, e) {
  let failed = false;
  if (e) {
    run.elapsed = performance.now() - run.started;
    if (e.kind === 'cancelled') run.status = 'cancelled'; else { run.status = 'error'; run.error = e; failed = true; }
    state.queue = [];
  }
  if (state.running === running) state.running = null;
  setRunState(run.status);
  if (failed) reportFailure(slot, run);
  if (run.status === 'done') ensureGrid(state.slots.A === slot ? 'A' : 'B');
  renderAll();
  const next = state.queue.shift();
  if (next) startRun(next, state.queue);
}

// A failed run: the notice says what happened and that nothing was lost; the earlier result
// (if any) is shown again, marked stale by the report when the model changed since.
function reportFailure(slot, run) {
  const id = state.slots.A === slot ? 'A' : 'B';
  const e = run.error || {};
  const text = String(e.rendered || ('error: ' + (e.message || String(e)) + '\n'));
  const kept = run.earlier ? 'Your model, its settings and the earlier result are kept (shown below)' : 'Your model and its settings are kept';
  if (run.earlier && slot.run === run) slot.run = run.earlier;
  notice(['The run of model ' + id + ' stopped before it finished. ' + kept + '; Run starts it again with new workers.',
    el('pre', { 'data-testid': 'run-failure' }, text)], { bad: true });
}

/** Stops the running job at once (its workers are terminated) and forgets the queue. */
export function cancelRun() {
  state.queue = [];
  const r = state.running;
  if (!r) return;
  r.cancelled = true;
  if (r.handle) r.handle.cancel();
}

/** True when a finished run's model or settings differ from the slot's current ones. */
export function runIsStale(slot) {
  if (!slot.run || slot.run.status === 'running') return false;
  const b = buildSpec(slot);
  if (b.errors.length) return true;
  return JSON.stringify(b.spec) !== slot.run.specJson || JSON.stringify(b.settings) !== JSON.stringify(slot.run.overrides);
}

function setProgressText(t) {
  $('progress-text').textContent = t;
}

export function renderRunBar() {
  const runBtn = $('run');
  const r = state.running;
  const engineReady = engineIsReady();
  runBtn.textContent = 'Run model ' + state.active;
  runBtn.disabled = !!r || !activeSlot() || !engineReady;
  $('cancel').disabled = !r;
  $('run-both').hidden = !state.slots.B;
  $('run-both').disabled = !!r;
  const prog = $('progress');
  if (r) {
    const run = state.slots[r.slotId].run;
    const info = run.info;
    const who = state.slots.B ? 'Model ' + r.slotId + ': ' : '';
    if (!info) {
      prog.removeAttribute('value');
      setProgressText(who + run.phase);
    } else {
      prog.value = info.fraction;
      let t;
      if (info.stepKind === 'warmup') t = 'Warm-up, step ' + (info.stepIndex + 1) + ' of ' + info.stepCount;
      else if (info.stepKind === 'sampling') t = 'Sampling: ' + fmtInt(info.drawsDone) + ' of ' + fmtInt(info.drawsTotal) + ' draws';
      else t = run.phase;
      if (info.stepKind === 'done') t = run.phase;
      if (isNum(info.remaining) && info.stepKind !== 'done') t += info.remaining < 1000 ? ' · less than a second left' : ' · about ' + fmtDuration(info.remaining) + ' left';
      setProgressText(who + t);
    }
    return;
  }
  const slot = activeSlot();
  const run = slot && slot.run;
  if (!engineReady) { prog.value = 0; setProgressText('Loading the engine…'); return; }
  if (!run) { prog.value = 0; setProgressText(slot ? 'Ready. Ctrl+Enter in the editor also runs.' : 'Model B is empty.'); return; }
  if (run.status === 'done') {
    prog.value = 1;
    const dt = run.info ? fmtInt(run.info.drawsTotal) + ' draws' : '';
    setProgressText('Finished in ' + fmtDuration(run.elapsed) + (dt ? ' · ' + dt : '') + (run.workers ? ' · ' + run.workers + (run.workers === 1 ? ' worker' : ' workers') : ''));
  } else if (run.status === 'cancelled') {
    prog.value = run.info ? run.info.fraction : 0;
    setProgressText('Cancelled after ' + fmtDuration(run.elapsed) + '.');
  } else if (run.status === 'error') {
    prog.value = 0;
    setProgressText('Stopped with an error (see below).');
  }
}
