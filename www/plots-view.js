// The four plots of the active slot: which data each canvas gets (plots.js draws it), the
// choice of the pair of unknowns shown in the density map, and saving a plot as PNG.
//
// Owns: renderPlots, choosePair, savePlotPng, the slot's `pair`.
// Must not touch: the canvases' drawing (plots.js), the engine (grid.js asks it for the grid).
import { state, activeSlot, unknownNames } from './state.js';
import { ensureGrid } from './grid.js';
import { message, densityMap, density1d, marginals, betaPlot, runningLogZ } from './plots.js';
import { $, el, clear } from './dom.js';
import { download, slug } from './files.js';
import { isNum } from './numbers.js';

export function renderPlots() {
  const slot = activeSlot();
  const cDen = $('plot-density'), cMar = $('plot-marginals'), cBeta = $('plot-beta'), cRun = $('plot-running');
  if (!slot) {
    message(cDen, 'No model.', 200); message(cMar, 'No model.', 120);
    message(cBeta, 'No model.', 120); message(cRun, 'No model.', 120);
    return;
  }
  const names = unknownNames(slot);
  const D = names.length;
  const check = slot.check && slot.check.result;
  const run = slot.run;
  const draws = run && run.status === 'done' ? run.draws : null;
  const modes = (run && run.status === 'done' && run.result && Array.isArray(run.result.modes)) ? run.result.modes : (check && Array.isArray(check.modes) ? check.modes : []);
  // Pair selectors.
  const pc = $('pair-controls');
  pc.hidden = D <= 1;
  if (D > 1) {
    slot.pair = [Math.min(slot.pair[0], D - 1), Math.min(slot.pair[1], D - 1)];
    if (slot.pair[0] === slot.pair[1]) slot.pair[1] = (slot.pair[0] + 1) % D;
    fillPairSelect($('pair-x'), names, slot.pair[0]);
    fillPairSelect($('pair-y'), names, slot.pair[1]);
  }
  const grid = slot.grid && !slot.grid.error && check && slot.grid.specJson === slot.check.specJson ? slot.grid : null;
  const note = $('density-note');
  if (!check && !draws) {
    $('density-caption').textContent = 'Density map';
    message(cDen, slot.check && slot.check.pending ? 'Checking the model…' : 'The density map appears once the model checks without errors.', 300);
    note.textContent = '';
  } else if (D === 1) {
    $('density-caption').textContent = 'Density of ' + names[0] + (draws ? ' with the draws, coloured by mode' : '');
    let narrow = Infinity;
    for (const m of (check && check.modes) || []) if (m.sd && isNum(m.sd[0]) && m.laplace_mass > 1e-3) narrow = Math.min(narrow, m.sd[0]);
    const span = grid ? grid.xmax - grid.xmin : null;
    const bins = span && isFinite(narrow) ? Math.max(40, Math.min(300, Math.round(span / narrow))) : 80;
    density1d(cDen, { name: names[0], grid: grid, bins: bins, samples: draws ? { x: draws.cols[0], mode: draws.mode } : null, modes: modes.map(function (m) { return m.location[0]; }) });
    note.textContent = grid ? 'The curve is the density computed on a grid and normalised; ticks mark the modes.' : (slot.grid && slot.grid.error ? 'Grid unavailable: ' + (slot.grid.error.message || '') : '');
  } else {
    const ix = slot.pair[0], iy = slot.pair[1];
    const useGrid = D === 2 && grid && grid.ix === ix && grid.iy === iy;
    $('density-caption').textContent = (D === 2 ? 'Log density' : 'Draws') + ' over ' + names[ix] + ' and ' + names[iy] + (draws ? ', draws coloured by mode' : '');
    densityMap(cDen, {
      names: [names[ix], names[iy]], grid: useGrid ? grid : null,
      points: draws ? { x: draws.cols[ix], y: draws.cols[iy], mode: draws.mode } : null,
      modes: modes.map(function (m) { return [m.location[ix], m.location[iy]]; }),
    });
    if (D === 2) {
      note.textContent = useGrid ? 'Shading: log density relative to its peak (white is 12 or more below); contours where a Gaussian mode would enclose 68, 95 and 99.7 % of its mass; + marks the modes.' :
        (slot.grid && slot.grid.error ? 'The density grid is unavailable: ' + (slot.grid.error.message || '') : 'Computing the density grid…');
      if (D === 2 && !useGrid) ensureGrid(state.active);
    } else note.textContent = draws ? 'With more than two unknowns the map shows the draws of the chosen pair (other unknowns free); + marks the modes.' : 'With more than two unknowns the map shows draws; run the model. + marks the modes found by the check.';
  }
  if (draws) marginals(cMar, { names: names, cols: draws.cols, mode: draws.mode });
  else message(cMar, run && run.status === 'running' ? 'Histograms appear when the run finishes.' : 'Histograms of the draws appear after a run.', 120);
  const prog = run && run.progress;
  if (prog && Array.isArray(prog.beta_trace) && prog.beta_trace.some(function (t) { return t && t.length; })) betaPlot(cBeta, { trace: prog.beta_trace });
  else message(cBeta, run && run.status === 'running' ? 'The β trace appears once sampling starts.' : 'The β trace of each chain appears during a run.', 120);
  if (prog && Array.isArray(prog.running) && prog.running.length) {
    const refs = [];
    const src = (run.status === 'done' && run.result) ? run.result : check;
    if (src) {
      if (isNum(src.exact_log_z)) refs.push({ name: 'exact', value: src.exact_log_z });
      if (isNum(src.grid_log_z)) refs.push({ name: 'grid', value: src.grid_log_z });
      if (run.status === 'done' && isNum(src.is_log_z)) refs.push({ name: 'importance', value: src.is_log_z });
    }
    runningLogZ(cRun, { running: prog.running, refs: refs });
  } else message(cRun, run && run.status === 'running' ? 'The running log Z appears once sampling starts.' : 'The running estimate of log Z appears during a run.', 120);
}

function fillPairSelect(sel, names, chosen) {
  const want = names.join('\u0000');
  if (sel.dataset.names !== want) {
    clear(sel);
    names.forEach(function (n, i) { sel.appendChild(el('option', { value: String(i) }, n)); });
    sel.dataset.names = want;
  }
  sel.value = String(chosen);
}

/** The user chose unknown `index` for axis k (0: x, 1: y) of the density map; the other axis moves off it. */
export function choosePair(k, index) {
  const s = activeSlot();
  s.pair[k] = index;
  if (s.pair[0] === s.pair[1]) s.pair[1 - k] = (s.pair[k] + 1) % unknownNames(s).length;
  ensureGrid(state.active);
  renderPlots();
}

/** Saves the canvas with this id as a PNG named after the model. */
export function savePlotPng(id) {
  const slot = activeSlot();
  const filename = slug(slot ? slot.form.title : 'kiln') + '-' + id.replace('plot-', '') + '.png';
  $(id).toBlob(function (blob) {
    if (!blob) return;
    download(filename, blob);
  }, 'image/png');
}
