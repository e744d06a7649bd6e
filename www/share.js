// Share links: what a link (and a single page) carries, and its encoding.
//
// A link holds, after `#spec=`, the base64url of the raw-deflated JSON
//   {spec, settings}               one model (A), or
//   {spec, settings, b: {spec, settings}}   a comparison of A and B.
// Owns: sharedModels (the {spec, settings} of A and B, or what must be fixed first),
// sharePayload, encodeShared / decodeShared (payload <-> `#spec=` parameter), readShared
// (checks a decoded object and turns it into forms; a bad model B is named), linkBase.
// Every way a link can be bad (not base64url, cut short, damaged, not UTF-8, not JSON, not a
// Kiln model, a bad model) ends in an Error with a message in plain words: nothing else escapes
// decodeShared (fuzzed in tests/web/share-fuzz.test.mjs).
// Must not touch: the DOM, the page state or storage (no DOM; uses CompressionStream, which
// browsers and Node both have; unit-tested under Node).
import { SETTING_KEYS, formToSpec, specToForm } from './spec-form.js';
import { bytesToBase64url, base64urlToBytes } from './base64.js';

/** The most a link may expand to. */
const SHARE_LIMIT = 64 * 1024 * 1024;

/**
 * What a share link and a single page carry: model A and, when there is one, model B, each as
 * {spec, settings}; `errors` lists what must be fixed first (prefixed by the model when two).
 * A and B are {form, settings} (B may be null).
 */
export function sharedModels(A, B) {
  const ba = formToSpec(A.form, A.settings);
  const bb = B ? formToSpec(B.form, B.settings) : null;
  const errors = ba.errors.map(function (e) { return (B ? 'model A: ' : '') + e; })
    .concat(bb ? bb.errors.map(function (e) { return 'model B: ' + e; }) : []);
  return {
    errors: errors,
    a: { spec: ba.spec, settings: ba.settings },
    b: bb ? { spec: bb.spec, settings: bb.settings } : null,
  };
}

/** The JSON text a link carries for sharedModels(…) without errors. */
export function sharePayload(shared) {
  const bb = shared.b;
  return JSON.stringify(bb ? { spec: shared.a.spec, settings: shared.a.settings, b: bb } : shared.a);
}

async function deflate(text) {
  const stream = new Blob([new TextEncoder().encode(text)]).stream().pipeThrough(new CompressionStream('deflate-raw'));
  return new Uint8Array(await new Response(stream).arrayBuffer());
}

const DAMAGED = 'the link is damaged or cut short (its compressed part does not unpack); copy the whole link again';

async function inflate(bytes, limit) {
  if (!bytes.length) throw new Error('the link holds no model (nothing after `#spec=`)');
  const reader = new Blob([bytes]).stream().pipeThrough(new DecompressionStream('deflate-raw')).getReader();
  const chunks = [];
  let total = 0;
  for (;;) {
    let r;
    try { r = await reader.read(); } catch (e) { throw new Error(DAMAGED); }
    if (r.done) break;
    total += r.value.length;
    if (total > limit) { reader.cancel().catch(function () {}); throw new Error('the link expands to more than ' + Math.round(limit / 1048576) + ' MB'); }
    chunks.push(r.value);
  }
  const all = new Uint8Array(total);
  let o = 0;
  for (const c of chunks) { all.set(c, o); o += c.length; }
  try { return new TextDecoder('utf-8', { fatal: true }).decode(all); } catch (e) { throw new Error('the link is damaged: what it unpacks to is not text (UTF-8)'); }
}

// base64url -> bytes, with the page's words for a link whose characters or length are wrong.
function linkBytes(param) {
  if (typeof param !== 'string') throw new Error('the link holds no model');
  try { return base64urlToBytes(param); } catch (e) {
    if (/not base64url/.test(e.message)) throw new Error('the link contains characters that are not base64url (was it changed or cut?)');
    throw new Error(DAMAGED);
  }
}

/** sharedModels(…) -> the value of the link's `spec` parameter. */
export async function encodeShared(shared) {
  return bytesToBase64url(await deflate(sharePayload(shared)));
}

/** The link's `spec` parameter -> {a: {form, settings}, b: {form, settings} | null}; throws a message. */
export async function decodeShared(param, limit) {
  const text = await inflate(linkBytes(param), limit || SHARE_LIMIT);
  let obj;
  try { obj = JSON.parse(text); } catch (e) { throw new Error('the link does not hold valid JSON (' + e.message + ')'); }
  return readShared(obj);
}

// True when an object is a plain JSON object (not null, not an array).
function isObject(v) {
  return !!v && typeof v === 'object' && !Array.isArray(v);
}

// One shared model: {spec, settings}. `where` names it in messages ('' or 'model B: ').
function readSharedModel(obj, where, allowed) {
  if (!isObject(obj)) throw new Error(where + 'the link does not hold a JSON object, so it is not a Kiln model');
  if (!('spec' in obj) && !where) throw new Error('the link does not hold a Kiln model (no `spec`; it has: ' + Object.keys(obj).slice(0, 8).map(function (k) { return '`' + k + '`'; }).join(', ') + ')');
  for (const k of Object.keys(obj)) if (allowed.indexOf(k) < 0) throw new Error(where + 'unknown key `' + k + '` (allowed: ' + allowed.join(', ') + ')');
  if (!isObject(obj.spec)) throw new Error(where + 'the link has no `spec` object');
  const settings = {};
  if (obj.settings != null) {
    const s = obj.settings;
    if (typeof s !== 'object' || Array.isArray(s)) throw new Error(where + '`settings` must be an object');
    for (const k of Object.keys(s)) {
      const v = s[k];
      if (SETTING_KEYS.indexOf(k) < 0) throw new Error(where + 'unknown setting `' + k + '` (allowed: ' + SETTING_KEYS.join(', ') + ')');
      if (k === 'method') { if (v !== 'alternating' && v !== 'joint') throw new Error(where + '`method` must be "alternating" or "joint"'); }
      else if (k === 'integrator') { if (v !== 'nuts' && v !== 'hmc') throw new Error(where + '`integrator` must be "nuts" or "hmc"'); }
      else if (!(typeof v === 'number' && Number.isSafeInteger(v) && v >= 0)) throw new Error(where + '`' + k + '` must be a whole number ≥ 0');
      settings[k] = String(v);
    }
  }
  let loaded;
  try { loaded = specToForm(obj.spec); } catch (e) {
    // specToForm's own messages are plain words; anything else means a shape it did not expect.
    const own = e && e.constructor === Error && typeof e.message === 'string';
    throw new Error(where + (own ? e.message : 'the link\'s spec is not a Kiln spec (' + String(e && e.message) + ')'));
  }
  Object.assign(loaded.settings, settings);
  return loaded;
}

/** A decoded link (or a single page's bundle): model A, and model B when it carries a comparison. */
export function readShared(obj) {
  const a = readSharedModel(obj, '', ['spec', 'settings', 'b']);
  const b = obj.b != null ? readSharedModel(obj.b, 'model B: ', ['spec', 'settings']) : null;
  return { a: a, b: b };
}

/** The address a link starts with: the page itself, without its fragment. */
export function linkBase(loc) {
  return loc.protocol === 'file:' ? loc.href.split('#')[0] : loc.origin + loc.pathname;
}
