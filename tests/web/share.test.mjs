// Unit tests of www/share.js and www/base64.js: a share link's payload, its encoding (checked
// against Node's own zlib), the round trip of every demo, and the messages of a bad link.
import { test } from 'node:test';
import assert from 'node:assert/strict';
import zlib from 'node:zlib';
import { sharedModels, sharePayload, encodeShared, decodeShared, readShared, linkBase } from '../../www/share.js';
import { specToForm, formToSpec } from '../../www/spec-form.js';
import { bytesToBase64, base64ToBytes, bytesToBase64url, base64urlToBytes } from '../../www/base64.js';
import { DEMOS } from './demos.mjs';

const param = (obj) => zlib.deflateRawSync(Buffer.from(JSON.stringify(obj))).toString('base64url');
const good = { variables: [{ name: 'x' }], energy: 'x^2/2' };

test('base64 and base64url of bytes whose encodings differ', () => {
  // fb ff = 111110 111111 1111(00): 62, 63, 60 -> '+', '/', '8', then one '=' of padding.
  const bytes = Uint8Array.of(0xfb, 0xff);
  assert.equal(bytesToBase64(bytes), '+/8=');
  assert.equal(bytesToBase64url(bytes), '-_8');
  assert.deepEqual(base64urlToBytes('-_8'), bytes);
  assert.deepEqual(base64ToBytes('+/8='), bytes);
  assert.throws(() => base64urlToBytes('+/8'), /not base64url/);
  // Longer than one chunk of 0x8000 bytes.
  const big = Uint8Array.from({ length: 100003 }, (_, i) => (i * 7919) % 256);
  assert.equal(bytesToBase64(big), Buffer.from(big).toString('base64'));
  assert.deepEqual(base64urlToBytes(bytesToBase64url(big)), big);
});

test('every demo travels through a share link unchanged', async () => {
  for (const { file, spec } of DEMOS) {
    const loaded = specToForm(spec);
    const shared = sharedModels(loaded, null);
    assert.deepEqual(shared.errors, [], file);
    assert.equal(shared.b, null);
    const p = await encodeShared(shared);
    assert.match(p, /^[A-Za-z0-9_-]+$/, file);
    // The parameter is raw deflate of the payload, base64url: Node's zlib reads it.
    const inside = JSON.parse(zlib.inflateRawSync(Buffer.from(p, 'base64url')).toString('utf8'));
    assert.deepEqual(Object.keys(inside).sort(), ['settings', 'spec']);
    assert.deepEqual(inside, JSON.parse(sharePayload(shared)));
    assert.deepEqual(inside.spec.energy ?? inside.spec.mixture, spec.energy ?? spec.mixture, file);
    const opened = await decodeShared(p);
    assert.equal(opened.b, null);
    const back = formToSpec(opened.a.form, opened.a.settings);
    assert.deepEqual(back.spec, shared.a.spec, file);
    assert.deepEqual(back.settings, shared.a.settings, file);
  }
});

test('a comparison carries model B with its own settings', async () => {
  const a = specToForm(DEMOS[0].spec);
  a.settings.seed = '7';
  const b = specToForm(DEMOS[1].spec);
  b.settings.draws = '500';
  b.settings.method = 'joint';
  const shared = sharedModels(a, b);
  const p = await encodeShared(shared);
  const inside = JSON.parse(zlib.inflateRawSync(Buffer.from(p, 'base64url')).toString('utf8'));
  assert.deepEqual(Object.keys(inside).sort(), ['b', 'settings', 'spec']);
  assert.equal(inside.settings.seed, 7);
  assert.equal(inside.b.settings.draws, 500);
  assert.equal(inside.b.settings.method, 'joint');
  const opened = await decodeShared(p);
  assert.equal(opened.a.settings.seed, '7');
  assert.equal(opened.b.settings.draws, '500');
  assert.equal(opened.b.settings.method, 'joint');
  assert.deepEqual(formToSpec(opened.b.form, opened.b.settings).spec, shared.b.spec);
});

test('what must be fixed first is prefixed by the model when there are two', () => {
  const a = specToForm(good);
  a.settings.seed = 'x';
  const b = specToForm(good);
  b.form.variables[0].lower = 'low';
  assert.deepEqual(sharedModels(a, null).errors, ['error: the seed must be a whole number of at least 0, not `x`\n --> run settings\n']);
  assert.deepEqual(sharedModels(a, b).errors, [
    'model A: error: the seed must be a whole number of at least 0, not `x`\n --> run settings\n',
    'model B: error: the lower bound `low` is not a number\n --> unknowns, row 1 (x)\n',
  ]);
});

test('a bad link is refused with a message that says why (and names model B)', async () => {
  await assert.rejects(decodeShared('ab$c'), /the link contains characters that are not base64url/);
  await assert.rejects(decodeShared(zlib.deflateRawSync(Buffer.from('{nope')).toString('base64url')), /^Error: the link does not hold valid JSON \(/);
  await assert.rejects(decodeShared(param([good])), /^Error: the link does not hold a JSON object, so it is not a Kiln model$/);
  await assert.rejects(decodeShared(param({ settings: {} })), /^Error: the link does not hold a Kiln model \(no `spec`; it has: `settings`\)$/);
  await assert.rejects(decodeShared(param({ spec: good, extra: 1 })), /^Error: unknown key `extra` \(allowed: spec, settings, b\)$/);
  await assert.rejects(decodeShared(param({ spec: good, settings: { seed: 1.5 } })), /^Error: `seed` must be a whole number ≥ 0$/);
  await assert.rejects(decodeShared(param({ spec: good, settings: { speed: 1 } })), /^Error: unknown setting `speed`/);
  await assert.rejects(decodeShared(param({ spec: good, settings: { method: 'fast' } })), /^Error: `method` must be "alternating" or "joint"$/);
  await assert.rejects(decodeShared(param({ spec: good, b: { spec: good, settings: { seed: -1 } } })), /^Error: model B: `seed` must be a whole number ≥ 0$/);
  await assert.rejects(decodeShared(param({ spec: good, b: { spec: [] } })), /^Error: model B: the link has no `spec` object$/);
  await assert.rejects(decodeShared(param({ spec: good, b: { spec: good, b: {} } })), /^Error: model B: unknown key `b` \(allowed: spec, settings\)$/);
  // A link that inflates past the limit stops there.
  await assert.rejects(decodeShared(param({ spec: { ...good, notes: 'n'.repeat(5000) } }), 1000), /the link expands to more than 0 MB/);
});

test('readShared accepts a single page\'s bundle with absent parts', () => {
  const r = readShared({ spec: good, settings: undefined, b: undefined });
  assert.equal(r.b, null);
  assert.equal(r.a.form.formula, 'x^2/2');
  assert.equal(r.a.settings.seed, '1');
});

test('linkBase is the page without its fragment', () => {
  assert.equal(linkBase({ protocol: 'file:', href: 'file:///tmp/kiln.html#spec=abc' }), 'file:///tmp/kiln.html');
  assert.equal(linkBase({ protocol: 'http:', origin: 'http://127.0.0.1:8080', pathname: '/index.html', href: 'http://127.0.0.1:8080/index.html?q#demo=x' }), 'http://127.0.0.1:8080/index.html');
});
