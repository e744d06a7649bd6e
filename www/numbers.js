// Numbers as the page reads them: the one syntax of a typed number, and helpers on finite values.
//
// Owns: isNum, parseNumber, quantiles.
// Must not touch: the DOM, the page state or the engine (pure; unit-tested under Node).

/** True for a finite number (not NaN, not ±∞, not a numeric string). */
export function isNum(v) {
  return typeof v === 'number' && isFinite(v);
}

const NUMBER_RE = /^[+-]?(\d+\.?\d*|\.\d+)([eE][+-]?\d+)?$/;

/** A decimal number typed by the user ('1', '-2.5', '.5', '3e-4'), or null. */
export function parseNumber(t) {
  t = String(t).trim();
  if (!NUMBER_RE.test(t)) return null;
  const n = Number(t);
  return isFinite(n) ? n : null;
}

/** [lower, upper] order statistics at q and 1 − q of the finite values, or null when there are none. */
export function quantiles(arr, q) {
  const a = [];
  for (const v of arr) if (isFinite(v)) a.push(v);
  if (!a.length) return null;
  a.sort(function (x, y) { return x - y; });
  return [a[Math.floor(q * (a.length - 1))], a[Math.ceil((1 - q) * (a.length - 1))]];
}
