// Static checks of the page's sources: no API that turns text into code or markup, and the
// page's Content-Security-Policy meta tag equal to the header the local server sends.
import { test } from 'node:test';
import assert from 'node:assert/strict';
import fs from 'node:fs';
import path from 'node:path';
import { ROOT } from './harness.mjs';
import { CSP } from '../../scripts/serve-csp.mjs';

const www = path.join(ROOT, 'www');
const sources = fs.readdirSync(www).filter((f) => f.endsWith('.js') || f.endsWith('.html'));

test('no source turns text into code or markup', () => {
  const forbidden = [/\.innerHTML\s*=/, /\.outerHTML\s*=/, /insertAdjacentHTML/, /document\.write/, /\beval\s*\(/, /new\s+Function\s*\(/, /setTimeout\s*\(\s*['"`]/];
  for (const f of sources) {
    const text = fs.readFileSync(path.join(www, f), 'utf8')
      .split('\n').filter((l) => !/^\s*(\/\/|\*)/.test(l)).join('\n');
    for (const re of forbidden) assert.doesNotMatch(text, re, `${f} uses ${re}`);
  }
});

test('the page declares the same Content-Security-Policy as the server sends', () => {
  const html = fs.readFileSync(path.join(www, 'index.html'), 'utf8');
  const m = html.match(/<meta[^>]+http-equiv="Content-Security-Policy"[^>]+content="([^"]+)"/i);
  assert.ok(m, 'no CSP meta tag');
  assert.equal(m[1], CSP);
  assert.match(CSP, /default-src 'none'/);
  assert.doesNotMatch(CSP, /unsafe-inline|unsafe-eval[^']/);
});
