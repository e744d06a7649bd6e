// Unit tests of www/format.js and www/numbers.js: how numbers are read and shown. Every
// expected string is worked out from the rules in the comments, not taken from the page.
import { test } from 'node:test';
import assert from 'node:assert/strict';
import { str, sentence, messageOf, fmtSig, fmtFixed, fmtPM, fmtInt, fmtPct, fmtShare, fmtDuration } from '../../www/format.js';
import { isNum, parseNumber, quantiles } from '../../www/numbers.js';

test('fmtSig: four significant digits, exponent form outside [1e-4, 1e6), ASCII minus', () => {
  assert.equal(fmtSig(1234.5678), '1235');            // 1234.5678 to 4 digits
  assert.equal(fmtSig(0.000123456), '0.0001235');     // just above 1e-4: still positional
  assert.equal(fmtSig(0.00001234), '1.234e-5');       // below 1e-4: exponent, 4 digits
  assert.equal(fmtSig(2500000), '2.500e6');           // 1e6 and above: 'e+' shortened to 'e'
  assert.equal(fmtSig(-1.5), '-1.5');                 // hyphen-minus, so it pastes into other tools
  assert.equal(fmtSig(123.456, 6), '123.456');
  assert.equal(fmtSig(0), '0');
  assert.equal(fmtSig(-Infinity), '\u2212\u221e');
  assert.equal(fmtSig(Infinity), '\u221e');
  assert.equal(fmtSig(NaN), 'NaN');
  assert.equal(fmtSig(null), '—');
  assert.equal(fmtSig(undefined), '—');
  assert.equal(fmtSig('free text'), 'free text');
});

test('fmtPM: the error decides the decimals (two significant digits of the error)', () => {
  // SE 0.0123: log10 ≈ −1.9, floor −2, so 1 − (−2) = 3 decimals.
  assert.equal(fmtPM(-12.3456, 0.0123), '-12.346 ± 0.012');
  // SE 0.5: log10 ≈ −0.3, floor −1, so 2 decimals.
  assert.equal(fmtPM(3.14159, 0.5), '3.14 ± 0.50');
  // SE 25: log10 ≈ 1.4, floor 1, so 0 decimals; 1234.5 is exact and a tie rounds up.
  assert.equal(fmtPM(1234.5, 25), '1235 ± 25');
  assert.equal(fmtPM(1.5, 0), '1.5 ± 0');
  assert.equal(fmtPM(2.25, NaN), '2.25');             // no usable error: the value alone
  assert.equal(fmtPM(2.25, -1), '2.25');
  assert.equal(fmtPM(null, 0.1), '—');
});

test('fmtFixed drops the sign of a value that rounds to zero', () => {
  assert.equal(fmtFixed(-0.0004, 3), '0.000');
  assert.equal(fmtFixed(-0.4, 0), '0');
  assert.equal(fmtFixed(-0.0006, 3), '-0.001');
  assert.equal(fmtFixed(2.5, 2), '2.50');
  assert.equal(fmtFixed(NaN, 2), 'NaN');
});

test('fmtInt, fmtPct and fmtDuration', () => {
  assert.equal(fmtInt(1234567.4), '1,234,567');
  assert.equal(fmtInt(999.5), '1,000');
  assert.equal(fmtInt(NaN), 'NaN');
  assert.equal(fmtPct(0.1234), '12.3 %');
  assert.equal(fmtPct(0.0005), '0.05 %');             // below 0.1 %: two decimals
  assert.equal(fmtPct(0), '0.0 %');
  assert.equal(fmtDuration(500), 'under a second');
  assert.equal(fmtDuration(42400), '42 s');
  assert.equal(fmtDuration(185000), '3 min 5 s');
  assert.equal(fmtDuration(undefined), '');
});

test('str, sentence and messageOf', () => {
  assert.equal(str(null), '');
  assert.equal(str(undefined), '');
  assert.equal(str(0), '0');
  assert.equal(sentence('the checks agree'), 'The checks agree');
  assert.equal(sentence(null), '');
  assert.equal(messageOf(new Error('went wrong')), 'went wrong');
  assert.equal(messageOf('plain text'), 'plain text');
});

test('parseNumber takes decimal numbers only', () => {
  assert.equal(parseNumber('1'), 1);
  assert.equal(parseNumber(' -2.5 '), -2.5);
  assert.equal(parseNumber('.5'), 0.5);
  assert.equal(parseNumber('1.'), 1);
  assert.equal(parseNumber('+3e-4'), 0.0003);
  assert.equal(parseNumber('1e+21'), 1e21);
  for (const bad of ['', ' ', '1,5', '0x10', 'Infinity', 'NaN', '1e999', '--1', '1e', 'e5']) {
    assert.equal(parseNumber(bad), null, JSON.stringify(bad));
  }
});

test('isNum and quantiles', () => {
  assert.equal(isNum(3), true);
  assert.equal(isNum('3'), false);
  assert.equal(isNum(NaN), false);
  assert.equal(isNum(Infinity), false);
  // Finite values 1..5 (NaN and ∞ dropped); q = 0.25 picks index floor(1) and ceil(3).
  assert.deepEqual(quantiles([5, 1, NaN, 3, Infinity, 2, 4], 0.25), [2, 4]);
  assert.deepEqual(quantiles(Float64Array.of(7), 0.1), [7, 7]);
  assert.equal(quantiles([NaN, -Infinity], 0.1), null);
});

test('fmtShare writes a share as the command line does (the cases of common::format::share\'s test)', () => {
  assert.equal(fmtShare(0.34), '34 %');
  assert.equal(fmtShare(0.00042), '0.042 %');
  assert.equal(fmtShare(0.0012345), '0.12 %');
  assert.equal(fmtShare(1e-9), '< 0.001 %');
  assert.equal(fmtShare(0), '0 %');
  assert.equal(fmtShare(1), '100 %');
});
