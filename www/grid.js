// The density on a grid, for the density map of models with one or two unknowns.
//
// Owns: ensureGrid (asks the engine for log_density_grid over the region that matters, when
// the model, the pair shown or the region changed) and the slot's grid fields.
// Must not touch: the DOM (plots-view.js draws the grid).
import { state } from './state.js';
import { isNum, quantiles } from './numbers.js';
import { engine } from './engine-load.js';
import { scheduleRender } from './render-loop.js';

function axisExtent(slot, i) {
  const c = slot.check && slot.check.result;
  const unknowns = (c && c.unknowns) || [];
  const u = unknowns[i] || {};
  let lo = Infinity, hi = -Infinity;
  const all = (c && Array.isArray(c.modes)) ? c.modes : [];
  let top = 0;
  for (const m of all) if (isNum(m.laplace_mass)) top = Math.max(top, m.laplace_mass);
  // Modes with a negligible share would stretch the map over empty space.
  const modes = top > 0 ? all.filter(function (m) { return !isNum(m.laplace_mass) || m.laplace_mass >= 1e-4 * top; }) : all;
  for (const m of modes) {
    const x = m.location && m.location[i];
    if (!isNum(x)) continue;
    const s = m.sd && isNum(m.sd[i]) && m.sd[i] > 0 ? m.sd[i] : 1;
    lo = Math.min(lo, x - 5 * s); hi = Math.max(hi, x + 5 * s);
  }
  const d = slot.run && slot.run.status === 'done' && slot.run.draws;
  if (d && d.cols[i]) {
    const q = quantiles(d.cols[i], 0.002);
    if (q) { const w = (q[1] - q[0]) * 0.15 || 1; lo = Math.min(lo, q[0] - w); hi = Math.max(hi, q[1] + w); }
  }
  if (!(hi > lo)) { lo = -3; hi = 3; }
  if (isNum(u.lower)) lo = Math.max(lo, u.lower);
  if (isNum(u.upper)) hi = Math.min(hi, u.upper);
  if (!(hi > lo)) { hi = lo + 1; }
  // Round outward to 3 significant digits of the span, so that small changes reuse the grid.
  const step = Math.pow(10, Math.floor(Math.log10(hi - lo)) - 2);
  return [Math.floor(lo / step) * step, Math.ceil(hi / step) * step].map(function (v, k) {
    if (k === 0 && isNum(u.lower)) return Math.max(v, u.lower);
    if (k === 1 && isNum(u.upper)) return Math.min(v, u.upper);
    return v;
  });
}

export function ensureGrid(slotId) {
  const slot = state.slots[slotId];
  const c = slot && slot.check && slot.check.result;
  if (!c) return;
  const D = c.dimension || (c.unknowns ? c.unknowns.length : 0);
  if (D < 1 || D > 2) { slot.grid = null; slot.gridKey = null; return; }
  const json = slot.check.specJson;
  const rows = Math.max(1, Number(c.data_rows) || 1);
  const ix = D === 2 ? slot.pair[0] : 0, iy = D === 2 ? slot.pair[1] : 0;
  const ex = axisExtent(slot, ix);
  const ey = D === 2 ? axisExtent(slot, iy) : [0, 1];
  let nx, ny;
  if (D === 2) { nx = ny = Math.max(40, Math.min(180, Math.floor(Math.sqrt(4e6 / rows)))); } else { nx = Math.max(100, Math.min(900, Math.floor(4e6 / rows))); ny = 1; }
  const key = [json, ix, iy, ex[0], ex[1], ey[0], ey[1], nx, ny].join('|');
  if (key === slot.gridKey) return;
  slot.gridKey = key;
  const token = ++slot.gridToken;
  engine().then(function (eng) { return eng.grid(json, { ix: ix, iy: iy, xmin: ex[0], xmax: ex[1], ymin: ey[0], ymax: ey[1], nx: nx, ny: ny }); }).then(function (values) {
    if (token !== slot.gridToken) return;
    slot.grid = { values: values, nx: nx, ny: ny, xmin: ex[0], xmax: ex[1], ymin: ey[0], ymax: ey[1], ix: ix, iy: iy, specJson: json };
    scheduleRender();
  }, function (e) {
    if (token !== slot.gridToken || (e && e.kind === 'cancelled')) { if (token === slot.gridToken) slot.gridKey = null; return; }
    slot.grid = { error: e };
    scheduleRender();
  });
}
