// Kiln plots on <canvas>: crisp on high-DPI screens (backing store scaled by devicePixelRatio),
// white background (so saved PNGs and prints look the same), Okabe–Ito colours for modes and
// chains. Text is drawn with fillText only.
//
// Owns: drawing on a given canvas (message, densityMap, density1d, marginals, betaPlot,
// runningLogZ) and the mode colours (modeColor). Must not touch: the DOM beyond the canvas it
// is handed, the page state or the engine (plots-view.js decides what to draw, and saves PNGs).
import { quantiles } from './numbers.js';

// Okabe & Ito's colour-blind-safe set (2008, "Color universal design"), ordered so that
// neighbouring modes differ strongly; yellow late (weak on white).
const PALETTE = ['#0072B2', '#E69F00', '#009E73', '#D55E00', '#CC79A7', '#56B4E9', '#F0E442', '#000000'];
const FONT = '12px system-ui, -apple-system, "Segoe UI", Roboto, "Helvetica Neue", Arial, sans-serif';
const SMALL = '11px system-ui, -apple-system, "Segoe UI", Roboto, "Helvetica Neue", Arial, sans-serif';
// Neutrals: the light scheme's warm clay tones of app.css (the canvases stay light in both
// schemes): soot, ash, grog-soft, and a fired-clay frame.
const INK = '#2b2521';
const MUTED = '#665b52';
const GRIDLINE = '#ebe4da';
const FRAME = '#b5a898';

export function modeColor(m) {
  if (!(m >= 1)) return '#a39585';
  return PALETTE[(Math.floor(m) - 1) % PALETTE.length];
}
function chainColor(c) { return PALETTE[c % PALETTE.length]; }

function minus(s) { return String(s).replace(/-/g, '\u2212'); }

// Size the backing store to the canvas's CSS width and the given CSS height.
function prepare(canvas, cssHeight) {
  canvas.style.width = '100%';
  canvas.style.height = cssHeight + 'px';
  const w = Math.floor(canvas.clientWidth);
  if (!(w > 0)) return null; // hidden: drawn again when shown
  const dpr = Math.max(1, window.devicePixelRatio || 1);
  canvas.width = Math.round(w * dpr);
  canvas.height = Math.round(cssHeight * dpr);
  const ctx = canvas.getContext('2d');
  ctx.setTransform(dpr, 0, 0, dpr, 0, 0);
  ctx.fillStyle = '#ffffff';
  ctx.fillRect(0, 0, w, cssHeight);
  ctx.font = FONT;
  ctx.textBaseline = 'alphabetic';
  return { ctx: ctx, w: w, h: cssHeight };
}

function niceStep(range, target) {
  const raw = range / target;
  const mag = Math.pow(10, Math.floor(Math.log10(raw)));
  const f = raw / mag;
  return (f < 1.5 ? 1 : f < 3 ? 2 : f < 7 ? 5 : 10) * mag;
}
function ticks(lo, hi, target) {
  if (!(hi > lo)) { const c = isFinite(lo) ? lo : 0; lo = c - 1; hi = c + 1; }
  const step = niceStep(hi - lo, target || 5);
  const out = [];
  const start = Math.ceil(lo / step - 1e-9) * step;
  for (let i = 0; i < 100; i++) {
    const v = start + i * step;
    if (v > hi + step * 1e-9) break;
    out.push(Math.abs(v) < step * 1e-9 ? 0 : v);
  }
  return { values: out, step: step };
}
function fmtTick(v, step) {
  if (Math.abs(v) < step * 1e-6) return '0';
  const a = Math.abs(v);
  if (a >= 1e5 || a < 1e-4) return minus(v.toExponential(1));
  const d = Math.max(0, Math.min(10, -Math.floor(Math.log10(step) + 1e-9)));
  return minus(v.toFixed(d));
}

function scale(d0, d1, r0, r1) {
  const k = (r1 - r0) / ((d1 - d0) || 1);
  return function (v) { return r0 + (v - d0) * k; };
}

// When the span is tiny next to the values, ticks are shown relative to an offset named in
// the axis label (so 2.19722457 ± 1e-9 does not print as eleven-digit labels).
function offsetFor(range, step) {
  const mid = (range[0] + range[1]) / 2;
  if (!(Math.abs(mid) > 0) || step / Math.abs(mid) > 1e-6) return 0;
  const unit = Math.pow(10, Math.floor(Math.log10(step)) + 2);
  return Math.round(mid / unit) * unit;
}
function offsetLabel(label, off) {
  if (!off) return label;
  const t = String(Number(off.toPrecision(12)));
  return (label || '') + ' ' + (off > 0 ? '\u2212 ' + t : '+ ' + minus(t).replace('\u2212', ''));
}

// Frame, grid lines, ticks and axis labels. f = {x0, y0, x1, y1}; xr/yr = [min, max].
function axes(ctx, f, xr, yr, xlabel, ylabel, opt) {
  opt = opt || {};
  const sx = scale(xr[0], xr[1], f.x0, f.x1);
  const sy = scale(yr[0], yr[1], f.y1, f.y0);
  ctx.save();
  ctx.lineWidth = 1;
  const xt = ticks(xr[0], xr[1], opt.xTicks || Math.max(2, Math.round((f.x1 - f.x0) / 90)));
  const yt = opt.noYTicks ? { values: [], step: 1 } :
    ticks(yr[0], yr[1], opt.yTicks || Math.max(2, Math.round((f.y1 - f.y0) / 55)));
  if (!opt.noGrid) {
    ctx.strokeStyle = GRIDLINE;
    ctx.beginPath();
    for (const v of xt.values) { const x = Math.round(sx(v)) + 0.5; ctx.moveTo(x, f.y0); ctx.lineTo(x, f.y1); }
    for (const v of yt.values) { const y = Math.round(sy(v)) + 0.5; ctx.moveTo(f.x0, y); ctx.lineTo(f.x1, y); }
    ctx.stroke();
  }
  ctx.strokeStyle = FRAME;
  ctx.strokeRect(Math.round(f.x0) + 0.5, Math.round(f.y0) + 0.5, Math.round(f.x1 - f.x0), Math.round(f.y1 - f.y0));
  ctx.fillStyle = MUTED;
  ctx.strokeStyle = FRAME;
  ctx.font = SMALL;
  ctx.textAlign = 'center';
  ctx.textBaseline = 'top';
  const xoff = offsetFor(xr, xt.step), yoff = offsetFor(yr, yt.step);
  if (xoff) xlabel = offsetLabel(xlabel, xoff);
  if (yoff) ylabel = offsetLabel(ylabel, yoff);
  ctx.beginPath();
  for (const v of xt.values) {
    const x = Math.round(sx(v)) + 0.5;
    ctx.moveTo(x, f.y1); ctx.lineTo(x, f.y1 + 4);
    ctx.fillText(fmtTick(v - xoff, xt.step), x, f.y1 + 6);
  }
  ctx.textAlign = 'right';
  ctx.textBaseline = 'middle';
  for (const v of yt.values) {
    const y = Math.round(sy(v)) + 0.5;
    ctx.moveTo(f.x0 - 4, y); ctx.lineTo(f.x0, y);
    ctx.fillText(fmtTick(v - yoff, yt.step), f.x0 - 6, y);
  }
  ctx.stroke();
  ctx.fillStyle = INK;
  ctx.font = FONT;
  if (xlabel) {
    ctx.textAlign = 'center';
    ctx.textBaseline = 'top';
    ctx.fillText(xlabel, (f.x0 + f.x1) / 2, f.y1 + 22);
  }
  if (ylabel) {
    ctx.save();
    ctx.translate(f.x0 - (opt.yLabelGap || 46), (f.y0 + f.y1) / 2);
    ctx.rotate(-Math.PI / 2);
    ctx.textAlign = 'center';
    ctx.textBaseline = 'middle';
    ctx.fillText(ylabel, 0, 0);
    ctx.restore();
  }
  ctx.restore();
  return { sx: sx, sy: sy };
}

export function message(canvas, text, height) {
  const p = prepare(canvas, height || 200);
  if (!p) return;
  const ctx = p.ctx;
  ctx.strokeStyle = '#d9cfc2';
  ctx.setLineDash([4, 4]);
  ctx.strokeRect(8.5, 8.5, p.w - 17, p.h - 17);
  ctx.setLineDash([]);
  ctx.fillStyle = MUTED;
  ctx.textAlign = 'center';
  ctx.textBaseline = 'middle';
  ctx.fillText(text, p.w / 2, p.h / 2);
}

function legend(ctx, x, y, maxX, items) {
  ctx.save();
  ctx.font = SMALL;
  ctx.textBaseline = 'middle';
  ctx.textAlign = 'left';
  for (const it of items) {
    const tw = ctx.measureText(it.label).width;
    if (x + 14 + tw > maxX) break;
    ctx.fillStyle = it.color;
    if (it.line) ctx.fillRect(x, y - 1.5, 12, 3);
    else { ctx.beginPath(); ctx.arc(x + 5, y, 4, 0, 2 * Math.PI); ctx.fill(); }
    ctx.fillStyle = INK;
    ctx.fillText(it.label, x + 14, y);
    x += 14 + tw + 14;
  }
  ctx.restore();
}

function finiteRange(arr) {
  let lo = Infinity, hi = -Infinity;
  for (let i = 0; i < arr.length; i++) { const v = arr[i]; if (isFinite(v)) { if (v < lo) lo = v; if (v > hi) hi = v; } }
  return [lo, hi];
}
function quantileRange(arr, q) {
  const r = quantiles(arr, q);
  if (!r) return [0, 1];
  return r[0] < r[1] ? r : finiteRange(arr);
}
function pad(r, k) {
  let lo = r[0], hi = r[1];
  if (!(isFinite(lo) && isFinite(hi))) return [0, 1];
  if (!(hi > lo)) { const d = Math.abs(lo) * 0.1 || 1; lo -= d; hi += d; }
  const d = (hi - lo) * (k == null ? 0.04 : k);
  return [lo - d, hi + d];
}

// Relative log density -> colour: white far below the peak, muted slate at the peak.
const RAMP = [[0, [74, 93, 118]], [0.3, [133, 152, 176]], [0.6, [196, 207, 220]], [0.85, [233, 237, 242]], [1, [255, 255, 255]]];
const RAMP_SPAN = 12; // nats below the peak shown
function rampColor(t) {
  t = Math.min(1, Math.max(0, t));
  for (let i = 1; i < RAMP.length; i++) {
    if (t <= RAMP[i][0]) {
      const a = RAMP[i - 1], b = RAMP[i];
      const u = (t - a[0]) / (b[0] - a[0]);
      return [0, 1, 2].map(function (k) { return Math.round(a[1][k] + u * (b[1][k] - a[1][k])); });
    }
  }
  return [255, 255, 255];
}

// Marching squares: line segments where the grid crosses `level`.
function contourSegments(v, nx, ny, level) {
  const segs = [];
  function interp(a, b, va, vb) { const t = (level - va) / (vb - va); return a + t * (b - a); }
  for (let j = 0; j < ny - 1; j++) {
    for (let i = 0; i < nx - 1; i++) {
      const a = v[j * nx + i], b = v[j * nx + i + 1], c = v[(j + 1) * nx + i + 1], d = v[(j + 1) * nx + i];
      if (!(isFinite(a) && isFinite(b) && isFinite(c) && isFinite(d))) continue;
      const pts = [];
      if ((a < level) !== (b < level)) pts.push([interp(i, i + 1, a, b), j]);
      if ((b < level) !== (c < level)) pts.push([i + 1, interp(j, j + 1, b, c)]);
      if ((c < level) !== (d < level)) pts.push([interp(i + 1, i, c, d), j + 1]);
      if ((d < level) !== (a < level)) pts.push([i, interp(j + 1, j, d, a)]);
      if (pts.length === 2) segs.push(pts);
      else if (pts.length === 4) { segs.push([pts[0], pts[1]]); segs.push([pts[2], pts[3]]); }
    }
  }
  return segs;
}

function modeLegend(ctx, f, modes) {
  const items = [];
  const n = Math.min(modes.length, 12);
  for (let k = 0; k < n; k++) items.push({ color: modeColor(k + 1), label: 'mode ' + (k + 1) });
  if (modes.length > n) items.push({ color: '#ffffff', label: '… ' + (modes.length - n) + ' more' });
  legend(ctx, f.x0, 13, f.x1, items);
}

function drawModeMarks(ctx, modes, sx, sy) {
  ctx.save();
  ctx.font = SMALL;
  ctx.textAlign = 'left';
  ctx.textBaseline = 'bottom';
  modes.forEach(function (m, k) {
    const x = sx(m[0]), y = sy(m[1]);
    if (!isFinite(x) || !isFinite(y)) return;
    ctx.strokeStyle = '#ffffff';
    ctx.lineWidth = 4;
    ctx.beginPath(); ctx.moveTo(x - 6, y); ctx.lineTo(x + 6, y); ctx.moveTo(x, y - 6); ctx.lineTo(x, y + 6); ctx.stroke();
    ctx.strokeStyle = INK;
    ctx.lineWidth = 1.5;
    ctx.beginPath(); ctx.moveTo(x - 6, y); ctx.lineTo(x + 6, y); ctx.moveTo(x, y - 6); ctx.lineTo(x, y + 6); ctx.stroke();
    ctx.lineWidth = 3;
    ctx.strokeStyle = '#ffffff';
    ctx.strokeText(String(k + 1), x + 5, y - 4);
    ctx.fillStyle = INK;
    ctx.fillText(String(k + 1), x + 5, y - 4);
  });
  ctx.restore();
}

// Two unknowns: o = {names: [xname, yname], grid: {values, nx, ny, xmin, xmax, ymin, ymax} | null,
// points: {x: [], y: [], mode: []} | null, modes: [[x, y], ...]}
export function densityMap(canvas, o) {
  const p = prepare(canvas, o.height || 420);
  if (!p) return;
  const ctx = p.ctx;
  const g = o.grid;
  const f = { x0: 62, y0: 28, x1: p.w - (g ? 92 : 18), y1: p.h - 46 };
  let xr, yr;
  if (g) { xr = [g.xmin, g.xmax]; yr = [g.ymin, g.ymax]; } else if (o.points && o.points.x.length) {
    xr = pad(quantileRange(o.points.x, 0.001)); yr = pad(quantileRange(o.points.y, 0.001));
  } else { xr = [0, 1]; yr = [0, 1]; }
  if (o.extent) { xr = o.extent.x; yr = o.extent.y; }
  const sc0 = { sx: scale(xr[0], xr[1], f.x0, f.x1), sy: scale(yr[0], yr[1], f.y1, f.y0) };
  if (g) {
    const peak = finiteRange(g.values)[1];
    const off = document.createElement('canvas');
    off.width = g.nx; off.height = g.ny;
    const octx = off.getContext('2d');
    const img = octx.createImageData(g.nx, g.ny);
    for (let j = 0; j < g.ny; j++) {
      for (let i = 0; i < g.nx; i++) {
        const v = g.values[j * g.nx + i];
        const t = isFinite(v) ? (peak - v) / RAMP_SPAN : 1;
        const c = rampColor(t);
        const q = ((g.ny - 1 - j) * g.nx + i) * 4;
        img.data[q] = c[0]; img.data[q + 1] = c[1]; img.data[q + 2] = c[2]; img.data[q + 3] = 255;
      }
    }
    octx.putImageData(img, 0, 0);
    ctx.save();
    ctx.imageSmoothingEnabled = true;
    ctx.drawImage(off, f.x0, f.y0, f.x1 - f.x0, f.y1 - f.y0);
    // Contours where a Gaussian mode would hold 68 %, 95 % and 99.7 % of its mass.
    const cw = (f.x1 - f.x0) / g.nx, ch = (f.y1 - f.y0) / g.ny;
    ctx.strokeStyle = 'rgba(31, 35, 40, 0.45)';
    ctx.lineWidth = 0.8;
    ctx.beginPath();
    for (const lv of [1.15, 3.09, 5.91]) {
      for (const s of contourSegments(g.values, g.nx, g.ny, peak - lv)) {
        ctx.moveTo(f.x0 + (s[0][0] + 0.5) * cw, f.y1 - (s[0][1] + 0.5) * ch);
        ctx.lineTo(f.x0 + (s[1][0] + 0.5) * cw, f.y1 - (s[1][1] + 0.5) * ch);
      }
    }
    ctx.stroke();
    ctx.restore();
    // Colour bar.
    const bx = f.x1 + 14, bw = 12;
    for (let y = f.y0; y < f.y1; y++) {
      const c = rampColor((y - f.y0) / (f.y1 - f.y0));
      ctx.fillStyle = 'rgb(' + c[0] + ',' + c[1] + ',' + c[2] + ')';
      ctx.fillRect(bx, y, bw, 1);
    }
    ctx.strokeStyle = FRAME;
    ctx.strokeRect(bx + 0.5, f.y0 + 0.5, bw, f.y1 - f.y0);
    ctx.fillStyle = MUTED;
    ctx.font = SMALL;
    ctx.textAlign = 'left';
    ctx.textBaseline = 'middle';
    for (let v = 0; v <= RAMP_SPAN; v += 4) {
      const y = f.y0 + v / RAMP_SPAN * (f.y1 - f.y0);
      ctx.fillText(v === 0 ? '0' : minus('-' + v), bx + bw + 4, y);
    }
    ctx.save();
    ctx.translate(p.w - 10, (f.y0 + f.y1) / 2);
    ctx.rotate(-Math.PI / 2);
    ctx.textAlign = 'center';
    ctx.fillStyle = INK;
    ctx.fillText('log density \u2212 peak', 0, 0);
    ctx.restore();
  }
  const sc = axes(ctx, f, xr, yr, o.names[0], o.names[1], { noGrid: !!g });
  if (o.points && o.points.x.length) {
    ctx.save();
    ctx.beginPath();
    ctx.rect(f.x0, f.y0, f.x1 - f.x0, f.y1 - f.y0);
    ctx.clip();
    ctx.globalAlpha = o.points.x.length > 2500 ? 0.45 : 0.6;
    const n = o.points.x.length;
    for (let i = 0; i < n; i++) {
      ctx.fillStyle = modeColor(o.points.mode ? o.points.mode[i] : 1);
      ctx.fillRect(sc.sx(o.points.x[i]) - 1.3, sc.sy(o.points.y[i]) - 1.3, 2.6, 2.6);
    }
    ctx.restore();
  }
  if (o.modes && o.modes.length) {
    ctx.save();
    ctx.beginPath();
    ctx.rect(f.x0, f.y0, f.x1 - f.x0, f.y1 - f.y0);
    ctx.clip();
    drawModeMarks(ctx, o.modes, sc0.sx, sc0.sy);
    ctx.restore();
    if (o.points && o.points.x.length) modeLegend(ctx, f, o.modes);
    else legend(ctx, f.x0, 13, f.x1, [{ color: INK, label: '+ modes found by the optimiser (numbered as in the table)', line: true }]);
  }
}

// Histogram counts, stacked by mode: returns {edges, stacks: [[count per mode]...], modes}
function histogram(values, modeOf, lo, hi, bins) {
  const counts = [];
  const modeIds = new Map();
  for (let b = 0; b < bins; b++) counts.push(new Map());
  const w = (hi - lo) / bins;
  for (let i = 0; i < values.length; i++) {
    const v = values[i];
    if (!isFinite(v) || v < lo || v > hi) continue;
    const b = Math.min(bins - 1, Math.floor((v - lo) / w));
    const m = modeOf ? modeOf[i] : 1;
    modeIds.set(m, true);
    counts[b].set(m, (counts[b].get(m) || 0) + 1);
  }
  const modes = Array.from(modeIds.keys()).sort(function (a, b) { return a - b; });
  return { counts: counts, modes: modes, width: w };
}

function drawStacked(ctx, h, lo, sx, syCount) {
  for (let b = 0; b < h.counts.length; b++) {
    let acc = 0;
    const x0 = sx(lo + b * h.width), x1 = sx(lo + (b + 1) * h.width);
    for (const m of h.modes) {
      const c = h.counts[b].get(m) || 0;
      if (!c) continue;
      const y0 = syCount(acc), y1 = syCount(acc + c);
      ctx.fillStyle = modeColor(m);
      ctx.fillRect(x0, y1, Math.max(0.5, x1 - x0 - 0.6), y0 - y1);
      acc += c;
    }
  }
}

// One unknown: density curve from the grid, histogram of draws by mode.
// o = {name, grid: {values, nx, xmin, xmax} | null, samples: {x, mode} | null, modes: [x...]}
export function density1d(canvas, o) {
  const p = prepare(canvas, o.height || 380);
  if (!p) return;
  const ctx = p.ctx;
  const f = { x0: 62, y0: 28, x1: p.w - 18, y1: p.h - 46 };
  const g = o.grid;
  let xr = g ? [g.xmin, g.xmax] : pad(quantileRange(o.samples ? o.samples.x : [0, 1], 0.001));
  let dens = null;
  let ymax = 0;
  if (g) {
    const peak = finiteRange(g.values)[1];
    const dx = (g.xmax - g.xmin) / g.nx;
    let tot = 0;
    dens = new Float64Array(g.nx);
    for (let i = 0; i < g.nx; i++) { const v = g.values[i]; dens[i] = isFinite(v) ? Math.exp(v - peak) : 0; tot += dens[i] * dx; }
    for (let i = 0; i < g.nx; i++) { dens[i] /= tot || 1; if (dens[i] > ymax) ymax = dens[i]; }
  }
  let h = null;
  const bins = o.bins || 80;
  if (o.samples && o.samples.x.length) {
    h = histogram(o.samples.x, o.samples.mode, xr[0], xr[1], bins);
    const n = o.samples.x.length;
    for (const c of h.counts) { let s = 0; for (const v of c.values()) s += v; const d = s / (n * h.width); if (d > ymax) ymax = d; }
  }
  const yr = [0, (ymax || 1) * 1.08];
  const sc = axes(ctx, f, xr, yr, o.name, 'density', {});
  if (h) {
    const n = o.samples.x.length;
    drawStacked(ctx, h, xr[0], sc.sx, function (c) { return sc.sy(c / (n * h.width)); });
  }
  if (dens) {
    ctx.save();
    ctx.strokeStyle = INK;
    ctx.lineWidth = 1.4;
    ctx.beginPath();
    const dx = (g.xmax - g.xmin) / g.nx;
    for (let i = 0; i < g.nx; i++) {
      const x = sc.sx(g.xmin + (i + 0.5) * dx), y = sc.sy(dens[i]);
      if (i === 0) ctx.moveTo(x, y); else ctx.lineTo(x, y);
    }
    ctx.stroke();
    ctx.restore();
  }
  if (o.modes && o.modes.length) {
    ctx.save();
    ctx.font = SMALL;
    ctx.textAlign = 'center';
    ctx.fillStyle = INK;
    o.modes.forEach(function (m, k) {
      const x = sc.sx(m);
      if (!(x >= f.x0 && x <= f.x1)) return;
      ctx.fillRect(x - 0.5, f.y1 - 7, 1, 7);
      if (o.modes.length <= 12) ctx.fillText(String(k + 1), x, f.y1 - 10);
    });
    ctx.restore();
    const items = [{ color: INK, label: 'density from the grid', line: true }];
    if (h) for (let k = 0; k < Math.min(o.modes.length, 8); k++) items.push({ color: modeColor(k + 1), label: 'mode ' + (k + 1) });
    legend(ctx, f.x0, 13, f.x1, g ? items : items.slice(1));
  }
}

// Marginal histograms of each unknown, stacked by mode. o = {names, cols: [[...]...], mode}
export function marginals(canvas, o) {
  const D = o.names.length;
  const width = canvas.clientWidth || 600;
  const ncol = Math.max(1, Math.min(D, width > 900 ? 4 : width > 560 ? 3 : 2));
  const nrow = Math.ceil(D / ncol);
  const ph = 150;
  const p = prepare(canvas, nrow * ph + 8);
  if (!p) return;
  const ctx = p.ctx;
  const pw = p.w / ncol;
  for (let d = 0; d < D; d++) {
    const col = d % ncol, row = Math.floor(d / ncol);
    const f = { x0: col * pw + 14, y0: row * ph + 14, x1: (col + 1) * pw - 12, y1: row * ph + ph - 44 };
    const xr = pad(quantileRange(o.cols[d], 0.0005), 0.02);
    const h = histogram(o.cols[d], o.mode, xr[0], xr[1], 40);
    let mx = 0;
    for (const c of h.counts) { let s = 0; for (const v of c.values()) s += v; if (s > mx) mx = s; }
    const sc = axes(ctx, f, xr, [0, mx * 1.08 || 1], o.names[d], null,
      { noYTicks: true, noGrid: true, xTicks: Math.max(2, Math.round((f.x1 - f.x0) / 70)) });
    drawStacked(ctx, h, xr[0], sc.sx, sc.sy);
  }
}

// β trace per chain (one strip each, up to 8 chains; overlaid beyond) on the left, and the
// pooled histogram of β on the right.
export function betaPlot(canvas, o) {
  const trace = (o.trace || []).filter(function (t) { return Array.isArray(t); });
  const K = trace.length;
  const strips = K <= 8 ? Math.max(1, K) : 1;
  const stripH = strips === 1 ? 150 : Math.max(34, Math.min(60, Math.floor(240 / strips)));
  const gap = strips === 1 ? 0 : 6;
  const top = 26, bottom = 46;
  const p = prepare(canvas, top + strips * stripH + (strips - 1) * gap + bottom);
  if (!p) return;
  const ctx = p.ctx;
  const split = Math.round(p.w * 0.72);
  let n = 0;
  for (const t of trace) n = Math.max(n, t.length);
  const xr = [0, Math.max(1, n - 1)];
  const x0 = 66, x1 = split - 12;
  const sx = scale(xr[0], xr[1], x0, x1);
  for (let k = 0; k < strips; k++) {
    const f = { x0: x0, y0: top + k * (stripH + gap), x1: x1, y1: top + k * (stripH + gap) + stripH };
    ctx.fillStyle = '#fdf9f3';
    ctx.fillRect(f.x0, f.y0, f.x1 - f.x0, f.y1 - f.y0);
    ctx.strokeStyle = FRAME;
    ctx.lineWidth = 1;
    ctx.strokeRect(Math.round(f.x0) + 0.5, Math.round(f.y0) + 0.5, Math.round(f.x1 - f.x0), Math.round(f.y1 - f.y0));
    const sy = scale(0, 1, f.y1 - 2, f.y0 + 2);
    ctx.save();
    ctx.beginPath(); ctx.rect(f.x0, f.y0, f.x1 - f.x0, f.y1 - f.y0); ctx.clip();
    ctx.lineWidth = 0.8;
    const chainsHere = strips === 1 ? trace.map(function (t, c) { return c; }) : [k];
    ctx.globalAlpha = chainsHere.length > 1 ? 0.7 : 0.9;
    for (const c of chainsHere) {
      const t = trace[c];
      ctx.strokeStyle = chainColor(c);
      ctx.beginPath();
      for (let i = 0; i < t.length; i++) { const x = sx(i), y = sy(t[i]); if (i === 0) ctx.moveTo(x, y); else ctx.lineTo(x, y); }
      ctx.stroke();
    }
    ctx.restore();
    ctx.font = SMALL;
    ctx.fillStyle = MUTED;
    ctx.textAlign = 'right';
    ctx.textBaseline = 'middle';
    ctx.fillText('1', f.x0 - 4, f.y0 + 5);
    ctx.fillText('0', f.x0 - 4, f.y1 - 5);
    if (strips > 1) {
      ctx.fillStyle = chainColor(k);
      ctx.fillRect(6, (f.y0 + f.y1) / 2 - 1.5, 10, 3);
      ctx.fillStyle = INK;
      ctx.textAlign = 'left';
      ctx.fillText('chain ' + (k + 1), 19, (f.y0 + f.y1) / 2);
    }
  }
  const yBottom = top + strips * stripH + (strips - 1) * gap;
  // x axis under the last strip.
  const xt = ticks(xr[0], xr[1], Math.max(2, Math.round((x1 - x0) / 90)));
  ctx.font = SMALL;
  ctx.fillStyle = MUTED;
  ctx.strokeStyle = FRAME;
  ctx.textAlign = 'center';
  ctx.textBaseline = 'top';
  ctx.beginPath();
  for (const v of xt.values) { const x = Math.round(sx(v)) + 0.5; ctx.moveTo(x, yBottom); ctx.lineTo(x, yBottom + 4); ctx.fillText(fmtTick(v, xt.step), x, yBottom + 6); }
  ctx.stroke();
  ctx.font = FONT;
  ctx.fillStyle = INK;
  ctx.fillText('kept draw (thinned)', (x0 + x1) / 2, yBottom + 22);
  if (strips === 1) {
    ctx.save();
    ctx.translate(16, (top + yBottom) / 2);
    ctx.rotate(-Math.PI / 2);
    ctx.textAlign = 'center';
    ctx.textBaseline = 'middle';
    ctx.fillText('\u03b2', 0, 0);
    ctx.restore();
    const items = trace.slice(0, 12).map(function (t, c) { return { color: chainColor(c), label: 'chain ' + (c + 1), line: true }; });
    legend(ctx, x0, 12, x1, items);
  } else {
    ctx.font = SMALL; ctx.fillStyle = MUTED; ctx.textAlign = 'left'; ctx.textBaseline = 'middle';
    ctx.fillText('\u03b2 of each chain over its kept draws (0 at the bottom of a strip, 1 at the top)', x0, 12);
  }
  // Pooled histogram of β.
  const bins = 20;
  const counts = new Array(bins).fill(0);
  let total = 0;
  for (const t of trace) for (const b of t) { if (isFinite(b)) { counts[Math.min(bins - 1, Math.max(0, Math.floor(b * bins)))]++; total++; } }
  let mx = 0;
  for (const c of counts) mx = Math.max(mx, c / (total || 1));
  const g = { x0: split + 40, y0: top, x1: p.w - 14, y1: yBottom };
  const hs = axes(ctx, g, [0, 1], [0, (mx || 1) * 1.1], '\u03b2 (all chains)', 'share', { xTicks: 2, yTicks: 3, yLabelGap: 34 });
  ctx.fillStyle = '#8a7d70';
  for (let b = 0; b < bins; b++) {
    const xa = hs.sx(b / bins), xb = hs.sx((b + 1) / bins);
    const y = hs.sy(counts[b] / (total || 1));
    ctx.fillRect(xa + 0.5, y, Math.max(0.5, xb - xa - 1), g.y1 - y);
  }
}

// Running log Z with its ±2 SE band; refs = [{name, value}] drawn as dashed lines.
export function runningLogZ(canvas, o) {
  const p = prepare(canvas, o.height || 260);
  if (!p) return;
  const ctx = p.ctx;
  const run = (o.running || []).filter(function (r) { return isFinite(r.log_z); });
  if (!run.length) {
    ctx.fillStyle = MUTED; ctx.textAlign = 'center'; ctx.textBaseline = 'middle';
    ctx.fillText('The running estimate appears once sampling starts.', p.w / 2, p.h / 2);
    return;
  }
  const f = { x0: 70, y0: 26, x1: p.w - 18, y1: p.h - 46 };
  const skip = Math.floor(run.length * 0.15);
  let lo = Infinity, hi = -Infinity;
  run.forEach(function (r, i) {
    if (i < skip && i < run.length - 1) return;
    const se = isFinite(r.log_z_se) ? r.log_z_se : 0;
    lo = Math.min(lo, r.log_z - 2 * se); hi = Math.max(hi, r.log_z + 2 * se);
  });
  const refs = (o.refs || []).filter(function (r) { return isFinite(r.value); });
  for (const r of refs) { lo = Math.min(lo, r.value); hi = Math.max(hi, r.value); }
  // Differences below 1e-4 nats mean nothing for log Z: never zoom in further than that.
  if (hi - lo < 1e-4) { const mid = (lo + hi) / 2; lo = mid - 5e-5; hi = mid + 5e-5; }
  const yr = pad([lo, hi], 0.12);
  const xr = [0, Math.max(run[run.length - 1].draws, 1)];
  const sc = axes(ctx, f, xr, yr, 'kept draws (all chains)', 'log Z', { yLabelGap: 56 });
  ctx.save();
  ctx.beginPath(); ctx.rect(f.x0, f.y0, f.x1 - f.x0, f.y1 - f.y0); ctx.clip();
  ctx.fillStyle = 'rgba(0, 114, 178, 0.16)';
  ctx.beginPath();
  run.forEach(function (r, i) { const se = isFinite(r.log_z_se) ? r.log_z_se : 0; const x = sc.sx(r.draws), y = sc.sy(r.log_z + 2 * se); if (i === 0) ctx.moveTo(x, y); else ctx.lineTo(x, y); });
  for (let i = run.length - 1; i >= 0; i--) { const r = run[i]; const se = isFinite(r.log_z_se) ? r.log_z_se : 0; ctx.lineTo(sc.sx(r.draws), sc.sy(r.log_z - 2 * se)); }
  ctx.closePath();
  ctx.fill();
  const refColors = ['#E69F00', '#009E73', '#D55E00', '#CC79A7'];
  refs.forEach(function (r, k) {
    ctx.strokeStyle = refColors[k % refColors.length];
    ctx.setLineDash([6, 4]);
    ctx.lineWidth = 1.4;
    ctx.beginPath(); ctx.moveTo(f.x0, sc.sy(r.value)); ctx.lineTo(f.x1, sc.sy(r.value)); ctx.stroke();
  });
  ctx.setLineDash([]);
  ctx.strokeStyle = '#0072B2';
  ctx.lineWidth = 1.6;
  ctx.beginPath();
  run.forEach(function (r, i) { const x = sc.sx(r.draws), y = sc.sy(r.log_z); if (i === 0) ctx.moveTo(x, y); else ctx.lineTo(x, y); });
  ctx.stroke();
  if (run.length === 1) { ctx.fillStyle = '#0072B2'; ctx.beginPath(); ctx.arc(sc.sx(run[0].draws), sc.sy(run[0].log_z), 3, 0, 7); ctx.fill(); }
  ctx.restore();
  const items = [{ color: '#0072B2', label: 'running log Z', line: true }, { color: 'rgba(0, 114, 178, 0.3)', label: '\u00b12 SE', line: true }];
  refs.forEach(function (r, k) { items.push({ color: refColors[k % refColors.length], label: r.name, line: true }); });
  legend(ctx, f.x0, 12, f.x1, items);
}
