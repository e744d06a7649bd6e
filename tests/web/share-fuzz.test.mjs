// A fuzz test of the share-link decoder (www/share.js decodeShared): 12 000 mutated links,
// made from the real links of every demo and of a comparison by a seeded generator, in six
// ways: characters of the link changed, cut short, characters inserted or removed, bytes of the
// compressed part changed, the JSON inside changed before compressing, and foreign payloads
// (other JSON shapes, markup, keys that could pollute prototypes). Each decode must either give
// plain data that the page's form code can turn back into a spec, or fail with an Error whose
// message is plain words: no TypeError, RangeError or DOMException escapes, nothing hangs, and
// no object prototype changes. (That user text is then shown as text, never markup, is checked
// in the browser by tests/e2e/faults.test.mjs.)
import { test } from 'node:test';
import assert from 'node:assert/strict';
import zlib from 'node:zlib';
import { sharedModels, encodeShared, decodeShared } from '../../www/share.js';
import { specToForm, formToSpec } from '../../www/spec-form.js';
import { DEMOS } from './demos.mjs';

// A small seeded generator (mulberry32), so that a failure can be replayed.
function rng(seed) {
  let a = seed >>> 0;
  return function () {
    a = (a + 0x6d2b79f5) >>> 0;
    let t = a;
    t = Math.imul(t ^ (t >>> 15), t | 1);
    t ^= t + Math.imul(t ^ (t >>> 7), t | 61);
    return ((t ^ (t >>> 14)) >>> 0) / 4294967296;
  };
}

const B64 = 'ABCDEFGHIJKLMNOPQRSTUVWXYZabcdefghijklmnopqrstuvwxyz0123456789-_';
const ODD = ['+', '/', '=', '%', '#', '&', ' ', '\n', '<', '>', '"', "'", '\u0000', '\u00e9', '\u{1F600}', '\\'];
const deflate = (text) => zlib.deflateRawSync(Buffer.from(text)).toString('base64url');

const FOREIGN = [
  '{}', '[]', 'null', '0', '"spec"', 'true', '{"spec": null}', '{"spec": []}', '{"spec": "x^2"}',
  '{"version": 2, "data": [1, 2, 3]}', '{"url": "https://example.invalid/", "title": "elsewhere"}',
  '{"spec": {"variables": "x", "energy": 5}}', '{"spec": {"variables": [null, 3, "y"]}}',
  '{"spec": {"mixture": [null, {"weight": "<b>1</b>"}]}}', '{"spec": {"mixture": "many"}}',
  '{"spec": {"variables": [{"name": {"a": 1}}], "data": [[1]]}}', '{"spec": {"data": {"x": "1,2"}}}',
  '{"spec": {"title": "<img src=x onerror=alert(1)>", "energy": "<script>alert(1)</script>"}}',
  '{"spec": {"energy": "x^2", "__proto__": {"polluted": 1}}, "settings": {"__proto__": {"polluted": 1}}}',
  '{"__proto__": {"polluted": 1}, "spec": {"energy": "x"}}', '{"spec": {"energy": "x"}, "b": []}',
  '{"spec": {"energy": "x"}, "b": {"spec": {"constructor": {"prototype": {"polluted": 1}}}}}',
  '{"spec": {"energy": "x"}, "settings": {"seed": 1e400, "chains": -1}}', '{"spec": {"energy": "x"}, "settings": "fast"}',
  '{"spec": {"settings": {"seed": "1", "method": 3}, "variables": [{"name": "x", "lower": "a"}]}}',
  '{"spec": {"variables": [{"name": "x", "size": {"n": 2}, "elements": "a,b"}], "energy": ["x"]}}',
  '{"spec": {"mixture": [{"weight": 1, "mean": "0", "cov": [[1, 0], "0, 1"]}]}}',
];

function mutateText(r, s) {
  const i = Math.floor(r() * (s.length + 1));
  switch (Math.floor(r() * 7)) {
    case 0: return s.slice(0, i) + B64[Math.floor(r() * 64)] + s.slice(i + 1);         // change one
    case 1: return s.slice(0, i);                                                        // cut short
    case 2: return s.slice(0, i) + B64[Math.floor(r() * 64)] + s.slice(i);               // insert
    case 3: return s.slice(0, i) + s.slice(i + 1 + Math.floor(r() * 8));                // remove
    case 4: return s.slice(0, i) + ODD[Math.floor(r() * ODD.length)] + s.slice(i);      // foreign char
    case 5: return s.slice(0, i) + s.slice(Math.floor(r() * s.length));                 // splice
    default: { const j = Math.floor(r() * s.length); return s.slice(0, Math.min(i, j)) + s.slice(Math.max(i, j)) + s.slice(Math.min(i, j), Math.max(i, j)); }
  }
}

function mutateBytes(r, param) {
  const b = Buffer.from(param, 'base64url');
  const n = 1 + Math.floor(r() * 4);
  for (let k = 0; k < n && b.length; k++) b[Math.floor(r() * b.length)] ^= 1 << Math.floor(r() * 8);
  return b.toString('base64url');
}

function mutateJson(r, text) {
  const pieces = ['{', '}', '[', ']', ',', ':', '"', 'null', '1e999', '-0', '"<b>x</b>"', '"__proto__"', '""', '\\u0000', ' '];
  const i = Math.floor(r() * (text.length + 1));
  if (r() < 0.5) return text.slice(0, i) + pieces[Math.floor(r() * pieces.length)] + text.slice(i);
  return text.slice(0, i) + text.slice(i + 1 + Math.floor(r() * 4));
}

// Only plain JSON data: strings, finite numbers, booleans, null, arrays and plain objects.
function assertPlainData(v, where) {
  if (v === null || typeof v === 'string' || typeof v === 'boolean') return;
  if (typeof v === 'number') return;
  assert.equal(typeof v, 'object', where + ': ' + typeof v);
  const proto = Object.getPrototypeOf(v);
  assert.ok(proto === Object.prototype || proto === Array.prototype || proto === null, where + ': an object of another kind');
  for (const k of Object.keys(v)) assertPlainData(v[k], where + '.' + k);
}

test('12 000 mutated share links: plain data or a plain-words error, nothing else escapes', async () => {
  const seeds = [];
  for (const { spec } of DEMOS) seeds.push(await encodeShared(sharedModels(specToForm(spec), null)));
  const two = sharedModels(specToForm(DEMOS[0].spec), specToForm(DEMOS[1 % DEMOS.length].spec));
  seeds.push(await encodeShared(two));
  const payloads = seeds.map((p) => zlib.inflateRawSync(Buffer.from(p, 'base64url')).toString('utf8'));
  const protoKeys = Object.getOwnPropertyNames(Object.prototype).sort().join();
  const r = rng(20250117);
  const counts = { opened: 0, refused: 0 };
  const messages = new Map();
  const N = 12000;
  for (let n = 0; n < N; n++) {
    const k = Math.floor(r() * seeds.length);
    const way = n % 6;
    let link;
    if (way === 0 || way === 1) { link = seeds[k]; const m = 1 + Math.floor(r() * 3); for (let j = 0; j < m; j++) link = mutateText(r, link); }
    else if (way === 2) link = seeds[k].slice(0, Math.floor(r() * seeds[k].length));
    else if (way === 3) link = mutateBytes(r, seeds[k]);
    else if (way === 4) { let t = payloads[k]; const m = 1 + Math.floor(r() * 3); for (let j = 0; j < m; j++) t = mutateJson(r, t); link = deflate(t); }
    else link = deflate(FOREIGN[Math.floor(r() * FOREIGN.length)]);
    let out;
    try {
      out = await decodeShared(link);
    } catch (e) {
      assert.ok(e instanceof Error, `#${n} (way ${way}): a thrown ${typeof e} ${String(e)} for ${JSON.stringify(link.slice(0, 80))}`);
      assert.equal(e.constructor, Error, `#${n} (way ${way}): ${e.constructor.name} escaped: ${e.message} for ${JSON.stringify(link.slice(0, 200))}`);
      assert.ok(typeof e.message === 'string' && e.message.length > 10, `#${n}: an empty message`);
      assert.doesNotMatch(e.message, /undefined|\[object |Cannot read prop|is not a function|is not iterable/, `#${n} (way ${way}): ${e.message}`);
      const head = e.message.replace(/`[^`]*`/g, '`…`').slice(0, 60);
      messages.set(head, (messages.get(head) || 0) + 1);
      counts.refused++;
      continue;
    }
    counts.opened++;
    assertPlainData(out, `#${n}`);
    // What the page does next with an opened link: the form goes back to a spec (or to
    // messages under the editor), without throwing.
    for (const m of [out.a, out.b]) if (m) { const b = formToSpec(m.form, m.settings); assert.ok(Array.isArray(b.errors)); }
  }
  assert.equal(Object.getOwnPropertyNames(Object.prototype).sort().join(), protoKeys, 'Object.prototype changed');
  assert.equal(({}).polluted, undefined, 'a prototype was polluted');
  assert.equal(counts.opened + counts.refused, N);
  // The mutations reach both outcomes and many different messages.
  assert.ok(counts.opened > 500 && counts.refused > 5000, JSON.stringify(counts));
  assert.ok(messages.size >= 8, [...messages.keys()].join('\n'));
  console.log(`# ${N} links: ${counts.opened} opened, ${counts.refused} refused with ${messages.size} kinds of message`);
});
