// Static checks of the page's sources: no API that turns text into code or markup, the
// page's Content-Security-Policy meta tag equal to the header the local server sends, no
// inline script, every module headed by what it owns and must not touch, the pure modules
// free of the DOM, and one definition of each top-level name across the page's modules.
import { test } from 'node:test';
import assert from 'node:assert/strict';
import fs from 'node:fs';
import path from 'node:path';
import { ROOT } from './harness.mjs';
import { CSP } from '../../scripts/serve-csp.mjs';

const www = path.join(ROOT, 'www');
const sources = fs.readdirSync(www).filter((f) => f.endsWith('.js') || f.endsWith('.html'));
const scripts = sources.filter((f) => f.endsWith('.js'));
// The lines of a source that are not comment lines.
const code = (f) => fs.readFileSync(path.join(www, f), 'utf8').split('\n').filter((l) => !/^\s*(\/\/|\*|\/\*)/.test(l)).join('\n');

test('no source turns text into code or markup', () => {
  const forbidden = [/\.innerHTML\s*=/, /\.outerHTML\s*=/, /insertAdjacentHTML/, /document\.write/, /\beval\s*\(/, /new\s+Function\s*\(/, /setTimeout\s*\(\s*['"`]/,
    /\bFunction\s*\(/, /setInterval\s*\(\s*['"`]/, /createContextualFragment/, /parseFromString/, /\.srcdoc\s*=/, /\bimport\s*\(/];
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

test('index.html runs no inline script and loads the page as one module', () => {
  const html = fs.readFileSync(path.join(www, 'index.html'), 'utf8');
  const tags = html.match(/<script\b[^>]*>/gi) || [];
  assert.deepEqual(tags, ['<script type="module" src="main.js">']);
  assert.doesNotMatch(html, /<script type="module" src="main.js">[^<]/, 'no inline code after the tag');
  assert.doesNotMatch(html, /\son[a-z]+\s*=/i, 'no inline event handler attributes');
});

test('every script starts with a comment that says what it owns and what it must not touch', () => {
  assert.ok(scripts.length >= 20, 'the page\'s modules are in www/');
  for (const f of scripts) {
    const text = fs.readFileSync(path.join(www, f), 'utf8');
    const head = text.slice(0, text.search(/^(?!\/\/)/m));
    assert.ok(head.length > 0, `${f} starts with a comment`);
    assert.match(head, /Owns:/, `${f}: what it owns`);
    assert.match(head, /Must not touch:/, `${f}: what it must not touch`);
  }
});

test('the pure modules use no DOM, storage or address of the page', () => {
  const pure = ['numbers.js', 'format.js', 'csv.js', 'spec-form.js', 'base64.js', 'share.js', 'bundle.js', 'state.js'];
  for (const f of pure) {
    assert.doesNotMatch(code(f), /\b(document|window|localStorage|sessionStorage|location|navigator|requestAnimationFrame)\b/, f);
    assert.doesNotMatch(code(f), /^import .* from '\.\/(dom|notice|files|editor|checking|runs|render-loop)\.js';/m, `${f} imports a DOM module`);
  }
});

test('each top-level name is defined in one module only (one implementation of each idea)', () => {
  const where = new Map();
  for (const f of scripts) {
    for (const m of code(f).matchAll(/^(?:export )?(?:async )?(?:function|const|let|class) ([A-Za-z_$][\w$]*)/gm)) {
      assert.ok(!where.has(m[1]), `${m[1]} is defined in ${where.get(m[1])} and in ${f}`);
      where.set(m[1], f);
    }
  }
});
