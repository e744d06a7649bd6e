// Numbers and engine text as the page shows them.
//
// Owns: str, sentence, messageOf, fmtSig, fmtFixed, fmtPM, fmtInt, fmtPct, fmtShare, fmtDuration.
// Numbers use the ASCII hyphen-minus so that they copy into other tools intact (the plots'
// tick labels, drawn on canvas, use the typographic minus instead; see plots.js).
// Must not touch: the DOM, the page state or the engine (pure; unit-tested under Node).
import { isNum } from './numbers.js';

/** Any value as text; null and undefined as ''. */
export function str(v) {
  return v == null ? '' : String(v);
}

/** Engine sentences start in lower case (they also appear mid-sentence in the command line). */
export function sentence(t) {
  t = str(t);
  return t ? t.charAt(0).toUpperCase() + t.slice(1) : t;
}

/** The message of an exception, or the thrown value as text. */
export function messageOf(e) {
  return e && e.message ? e.message : String(e);
}

/** `sig` significant digits (default 4), exponent form outside [1e-4, 1e6). */
export function fmtSig(v, sig) {
  if (v == null) return '—';
  if (typeof v !== 'number') return String(v);
  if (!isFinite(v)) return v > 0 ? '∞' : v < 0 ? '−∞' : 'NaN';
  sig = sig || 4;
  const a = Math.abs(v);
  if (a !== 0 && (a >= 1e6 || a < 1e-4)) return v.toExponential(sig - 1).replace('e+', 'e');
  return String(Number(v.toPrecision(sig)));
}

// Decimals that show the first two significant digits of a standard error.
function decimalsFor(se) {
  return Math.max(0, Math.min(10, 1 - Math.floor(Math.log10(se))));
}

/** `d` decimals; a value that rounds to zero is shown without a minus sign. */
export function fmtFixed(v, d) {
  if (!isNum(v)) return fmtSig(v);
  const t = v.toFixed(d);
  return /^-0\.?0*$/.test(t) ? t.slice(1) : t;
}

/** value ± standard error, both to the decimals the error calls for. */
export function fmtPM(v, se) {
  if (!isNum(v)) return fmtSig(v);
  if (se === 0) return fmtSig(v, 6) + ' ± 0';
  if (!isNum(se) || se < 0) return fmtSig(v, 6);
  const d = decimalsFor(se);
  return v.toFixed(d) + ' ± ' + se.toFixed(d);
}

/** A whole number with thousands separators. */
export function fmtInt(v) {
  return isNum(v) ? Math.round(v).toLocaleString('en-US') : fmtSig(v);
}

/** A share as a percentage (two decimals below 0.1 %). */
export function fmtPct(v) {
  return isNum(v) ? (v * 100).toFixed(v < 0.001 && v > 0 ? 2 : 1) + ' %' : fmtSig(v);
}

/**
 * A share of the mass as the command line writes it (common::format::share): two significant
 * digits below 10 %, whole percents above, never rounded to zero ('< 0.001 %').
 */
export function fmtShare(v) {
  if (!isNum(v)) return fmtSig(v);
  const p = 100 * v;
  if (p === 0) return '0 %';
  if (Math.abs(p) < 1e-3) return '< 0.001 %';
  const digits = Math.min(4, Math.max(0, 1 - Math.floor(Math.log10(Math.abs(p)))));
  return p.toFixed(digits) + ' %';
}

/** Milliseconds in words: 'under a second', '42 s', '3 min 5 s'. */
export function fmtDuration(ms) {
  if (!isNum(ms)) return '';
  const s = ms / 1000;
  if (s < 1) return 'under a second';
  if (s < 60) return Math.round(s) + ' s';
  const m = Math.floor(s / 60);
  return m + ' min ' + Math.round(s - 60 * m) + ' s';
}
