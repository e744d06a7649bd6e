// The development server (scripts/serve.mjs) against hostile request paths: it is started on a
// temporary layout (a root folder "www", a sibling "www-secret" whose name starts like the root's,
// symlinks that lead out) and must answer each request with the expected status, never send the
// secret, serve the normal files with their headers, and still answer after the barrage.
// Requests go through http.request with a raw `path` (Node does not normalise it), or through a
// bare socket for what http.request refuses to send (a raw null byte, CONNECT).
import { test, before, after } from 'node:test';
import assert from 'node:assert/strict';
import { spawn } from 'node:child_process';
import crypto from 'node:crypto';
import fs from 'node:fs';
import http from 'node:http';
import net from 'node:net';
import os from 'node:os';
import path from 'node:path';
import url from 'node:url';
import { CSP } from '../../scripts/serve-csp.mjs';

const SERVER = path.resolve(path.dirname(url.fileURLToPath(import.meta.url)), '..', '..', 'scripts', 'serve.mjs');
const SECRET = `SECRET-${crypto.randomUUID()}`;
const WASM = Buffer.from([0x00, 0x61, 0x73, 0x6d, 0x01, 0x00, 0x00, 0x00]);

// The files of the served root, relative path -> content.
const FILES = {
  'index.html': '<!doctype html><title>root index</title>',
  'app.js': 'console.log("app");\n',
  'app.css': 'body { margin: 0; }\n',
  'data.json': '{"ok":true}\n',
  'mod.wasm': WASM,
  'sub/index.html': '<!doctype html><title>sub index</title>',
  'sub/page.js': 'console.log("sub page");\n',
  '50%off.json': '{"percent":50}\n',
  '.hidden.json': '{"hidden":true}\n',
  'trapdir/other.js': 'console.log("trapdir");\n',
};

let tmp, root, secretDir, child, port, exited = null;
let stderr = '';

/** A port that was free a moment ago (the old server cannot be asked for port 0). */
function freePort() {
  return new Promise((resolve, reject) => {
    const s = net.createServer();
    s.on('error', reject);
    s.listen(0, '127.0.0.1', () => { const p = s.address().port; s.close(() => resolve(p)); });
  });
}

before(async () => {
  tmp = fs.realpathSync(fs.mkdtempSync(path.join(os.tmpdir(), 'kiln-serve-')));
  root = path.join(tmp, 'www');
  secretDir = path.join(tmp, 'www-secret');
  fs.mkdirSync(secretDir, { recursive: true });
  fs.writeFileSync(path.join(secretDir, 'key.txt'), SECRET);
  fs.writeFileSync(path.join(secretDir, 'index.html'), SECRET);
  for (const [rel, content] of Object.entries(FILES)) {
    fs.mkdirSync(path.dirname(path.join(root, rel)), { recursive: true });
    fs.writeFileSync(path.join(root, rel), content);
  }
  fs.mkdirSync(path.join(root, 'empty'));
  fs.symlinkSync('../www-secret/key.txt', path.join(root, 'link-key.txt')); // relative, leads out
  fs.symlinkSync(secretDir, path.join(root, 'link-out')); // absolute, a directory outside
  fs.symlinkSync('app.js', path.join(root, 'alias.js')); // stays inside: served
  fs.symlinkSync('../../www-secret/key.txt', path.join(root, 'trapdir', 'index.html')); // a directory's index leads out

  port = await freePort();
  child = spawn(process.execPath, [SERVER], {
    env: { ...process.env, KILN_WWW_ROOT: root, PORT: String(port) }, stdio: ['ignore', 'pipe', 'pipe'],
  });
  child.on('exit', (code, signal) => { exited = { code, signal }; });
  child.stderr.on('data', (d) => { stderr += d; });
  const line = await new Promise((resolve, reject) => {
    let out = '';
    const timer = setTimeout(() => reject(new Error('server did not start: ' + out + stderr)), 10000);
    child.stdout.on('data', (d) => {
      out += d;
      const m = out.match(/^Kiln is at .*$/m);
      if (m) { clearTimeout(timer); resolve(m[0]); }
    });
    child.on('exit', (code) => reject(new Error(`server exited with ${code}: ${stderr}`)));
  });
  assert.equal(line, `Kiln is at http://127.0.0.1:${port}/#demo=default-two-modes.json`);
});

after(() => {
  if (child && !exited) child.kill();
  if (tmp) fs.rmSync(tmp, { recursive: true, force: true });
});

/** One request through http.request; resolves to { status, headers, body } or { error }. */
function request(method, rawPath, headers = {}) {
  return new Promise((resolve) => {
    const req = http.request({ host: '127.0.0.1', port, method, path: rawPath, agent: false, headers: { Connection: 'close', ...headers } });
    req.setTimeout(5000, () => req.destroy(new Error('timeout')));
    req.on('response', (res) => {
      const chunks = [];
      res.on('data', (c) => chunks.push(c));
      res.on('end', () => resolve({ status: res.statusCode, headers: res.headers, body: Buffer.concat(chunks) }));
      res.on('error', (error) => resolve({ error }));
    });
    req.on('connect', (res, socket) => { socket.destroy(); resolve({ status: res.statusCode, headers: res.headers, body: Buffer.alloc(0) }); });
    req.on('error', (error) => resolve({ error }));
    req.end();
  });
}

/** One request written byte for byte on a socket; resolves to { status, body } or { error }. */
function rawRequest(requestLine) {
  return new Promise((resolve) => {
    const socket = net.connect(port, '127.0.0.1');
    const chunks = [];
    socket.setTimeout(5000, () => socket.destroy());
    socket.on('data', (c) => chunks.push(c));
    socket.on('error', (error) => resolve({ error }));
    socket.on('close', () => {
      const text = Buffer.concat(chunks).toString('latin1');
      const m = text.match(/^HTTP\/1\.[01] (\d{3})/);
      resolve(m ? { status: Number(m[1]), body: Buffer.from(text.slice(text.indexOf('\r\n\r\n') + 4), 'latin1') } : { error: new Error('no status line: ' + JSON.stringify(text)) });
    });
    socket.write(Buffer.from(`${requestLine}\r\nHost: 127.0.0.1\r\nConnection: close\r\n\r\n`, 'latin1'));
  });
}

const longSegment = (n) => '/' + 'a'.repeat(n);
const manySegments = (total) => '/a'.repeat(Math.ceil(total / 2));

// [group, method, path, expected status, expected body of a 200 (optional)]. A path given as
// { raw } goes over a bare socket; everything else through http.request with that exact path.
const HOSTILE = [
  // Plain traversal (dot segments are refused before any file is looked at).
  ['dots', 'GET', '/../www-secret/key.txt', 400],
  ['dots', 'GET', '/sub/../../www-secret/key.txt', 400],
  ['dots', 'GET', '/sub/../index.html', 400],
  ['dots', 'GET', '/./index.html', 400],
  ['dots', 'GET', '/sub/..', 400],
  ['dots', 'GET', '/...', 404],
  ['dots', 'GET', '/....//....//www-secret/key.txt', 404],
  // Encoded dots and slashes, lower and upper case.
  ['encoded', 'GET', '/%2e%2e/www-secret/key.txt', 400],
  ['encoded', 'GET', '/%2E%2E/www-secret/key.txt', 400],
  ['encoded', 'GET', '/%2e./www-secret/key.txt', 400],
  ['encoded', 'GET', '/.%2E/www-secret/key.txt', 400],
  ['encoded', 'GET', '/%2e', 400],
  ['encoded', 'GET', '/..%2fwww-secret/key.txt', 400],
  ['encoded', 'GET', '/..%2Fwww-secret%2Fkey.txt', 400],
  ['encoded', 'GET', '/sub%2fpage.js', 400],
  ['encoded', 'GET', '/index.html%2f', 400],
  ['encoded', 'GET', '/sub%2f..%2f..%2fwww-secret%2fkey.txt', 400],
  ['encoded', 'GET', '/%2F%2Fetc%2Fpasswd', 400],
  // The sibling whose name starts like the root's.
  ['sibling', 'GET', '/%2e%2e%2fwww-secret/key.txt', 400],
  ['sibling', 'GET', '/%2E%2E%2Fwww-secret%2Fkey.txt', 400],
  ['sibling', 'GET', '/%2e%2e%2fwww-secret/', 400],
  ['sibling', 'GET', '/%2e%2e%2fwww-secret', 400],
  ['sibling', 'HEAD', '/%2e%2e%2fwww-secret/key.txt', 400],
  // Malformed escapes.
  ['malformed', 'GET', '/%E0%A4%A', 400],
  ['malformed', 'GET', '/%', 400],
  ['malformed', 'GET', '/%%', 400],
  ['malformed', 'GET', '/%zz', 400],
  ['malformed', 'GET', '/%2', 400],
  ['malformed', 'GET', '/%G0', 400],
  ['malformed', 'GET', '/index.html%', 400],
  ['malformed', 'GET', '/%ff', 400],
  ['malformed', 'GET', '/%ed%a0%80', 400],
  ['malformed', 'GET', '/%C3', 400],
  ['malformed', 'GET', '/sub/%E0%A4%A/page.js', 400],
  ['malformed', 'GET', '/%u002e%u002e/www-secret/key.txt', 400],
  ['malformed', 'GET', '/50%off.json', 400],
  ['malformed', 'HEAD', '/%E0%A4%A', 400],
  // Double (and triple) encoding: decoded once, these are names with "%" that do not exist.
  ['double', 'GET', '/%252e%252e%252fwww-secret/key.txt', 404],
  ['double', 'GET', '/%252E%252E%252Fwww-secret%252Fkey.txt', 404],
  ['double', 'GET', '/..%252f..%252fwww-secret%252fkey.txt', 404],
  ['double', 'GET', '/%25252e%25252e%25252fwww-secret%25252fkey.txt', 404],
  ['double', 'GET', '/50%2525off.json', 404],
  // Backslashes, raw and encoded.
  ['backslash', 'GET', '/..\\www-secret\\key.txt', 400],
  ['backslash', 'GET', '/sub\\..\\..\\www-secret\\key.txt', 400],
  ['backslash', 'GET', '/index.html\\', 400],
  ['backslash', 'GET', '/..%5cwww-secret%5ckey.txt', 400],
  ['backslash', 'GET', '/..%5Cwww-secret%5Ckey.txt', 400],
  ['backslash', 'GET', '/%5c', 400],
  ['backslash', 'GET', '/..%255cwww-secret%255ckey.txt', 404],
  // Null bytes, encoded and raw.
  ['null', 'GET', '/index.html%00', 400],
  ['null', 'GET', '/index.html%00.js', 400],
  ['null', 'GET', '/%00', 400],
  ['null', 'GET', '/sub/%00index.html', 400],
  ['null', 'GET', '/%2500', 404],
  ['null', 'GET', { raw: 'GET /index.html\0.js HTTP/1.1' }, 400],
  // Overlong UTF-8 forms of "." "/" "\" (invalid UTF-8), overlong segments and paths.
  ['overlong', 'GET', '/%c0%ae%c0%ae/www-secret/key.txt', 400],
  ['overlong', 'GET', '/%c0%af', 400],
  ['overlong', 'GET', '/%e0%80%ae%e0%80%ae/www-secret/key.txt', 400],
  ['overlong', 'GET', '/%c1%9c', 400],
  ['overlong', 'GET', longSegment(255), 404],
  ['overlong', 'GET', longSegment(256), 400],
  ['overlong', 'GET', longSegment(4000), 400],
  ['overlong', 'GET', manySegments(3000), 400],
  ['overlong', 'GET', manySegments(12000), 400],
  ['overlong', 'GET', longSegment(20000), 431], // Node's own limit on the request head (16 KiB)
  // Absolute-looking paths and targets that are not a path.
  ['absolute', 'GET', '//etc/passwd', 404],
  ['absolute', 'GET', '/etc/passwd', 404],
  ['absolute', 'GET', '//www-secret/key.txt', 404],
  ['absolute', 'GET', () => '/' + path.join(secretDir, 'key.txt'), 404],
  ['absolute', 'GET', '/C:/Windows/win.ini', 404],
  ['absolute', 'GET', '/C:%5cWindows%5cwin.ini', 400],
  ['absolute', 'GET', '/file:///etc/passwd', 404],
  ['absolute', 'GET', 'C:\\Windows\\win.ini', 400],
  ['absolute', 'GET', 'http://127.0.0.1/../www-secret/key.txt', 400],
  ['absolute', 'GET', '*', 400],
  // Symlinks that lead out, and a directory whose index.html leads out.
  ['symlink', 'GET', '/link-key.txt', 404],
  ['symlink', 'GET', '/link-out', 404],
  ['symlink', 'GET', '/link-out/', 404],
  ['symlink', 'GET', '/link-out/key.txt', 404],
  ['symlink', 'GET', '/trapdir', 404],
  ['symlink', 'GET', '/trapdir/', 404],
  ['symlink', 'GET', '/trapdir/index.html', 404],
  // Query strings and fragments: ignored, never decoded, never part of the file name.
  ['query', 'GET', '/index.html?../../www-secret/key.txt', 200, FILES['index.html']],
  ['query', 'GET', '/?%E0%A4%A', 200, FILES['index.html']],
  ['query', 'GET', '/app.js?x=%00&y=..%2f', 200, FILES['app.js']],
  ['query', 'GET', '/index.html#../../www-secret/key.txt', 200, FILES['index.html']],
  ['query', 'GET', '/%2e%2e%2fwww-secret/key.txt?x=1', 400],
  ['query', 'GET', '/..%2fwww-secret/key.txt#frag', 400],
  ['query', 'GET', '/link-key.txt?download', 404],
  ['query', 'GET', '/%E0%A4%A?ok', 400],
  // Hidden names, a directory without index.html, a missing file.
  ['missing', 'GET', '/.hidden.json', 404],
  ['missing', 'GET', '/empty/', 404],
  ['missing', 'GET', '/nope.js', 404],
  ['missing', 'GET', '/%C3%A9.js', 404],
  // Methods other than GET and HEAD.
  ['method', 'POST', '/', 405],
  ['method', 'PUT', '/index.html', 405],
  ['method', 'DELETE', '/index.html', 405],
  ['method', 'PATCH', '/', 405],
  ['method', 'OPTIONS', '/', 405],
  ['method', 'OPTIONS', '*', 405],
  ['method', 'TRACE', '/', 405],
  ['method', 'PROPFIND', '/', 405],
  ['method', 'POST', '/%E0%A4%A', 405],
  ['method', 'CONNECT', '127.0.0.1:22', 405],
  ['method', 'GET', { raw: 'get /index.html HTTP/1.1' }, 400], // not a method token Node accepts
];

/** Checks that the server process is still alive and answering. */
async function assertAlive() {
  assert.equal(exited, null, `the server exited (${JSON.stringify(exited)}): ${stderr}`);
  const r = await request('GET', '/');
  assert.ifError(r.error);
  assert.equal(r.status, 200);
  assert.equal(r.body.toString(), FILES['index.html']);
}

test('normal files are served with their content type and headers', async () => {
  const cases = [
    ['/', 'index.html', 'text/html; charset=utf-8'],
    ['/index.html', 'index.html', 'text/html; charset=utf-8'],
    ['/app.js', 'app.js', 'text/javascript; charset=utf-8'],
    ['/app.css', 'app.css', 'text/css; charset=utf-8'],
    ['/data.json', 'data.json', 'application/json'],
    ['/mod.wasm', 'mod.wasm', 'application/wasm'],
    ['/sub', 'sub/index.html', 'text/html; charset=utf-8'],
    ['/sub/', 'sub/index.html', 'text/html; charset=utf-8'],
    ['/sub/page.js', 'sub/page.js', 'text/javascript; charset=utf-8'],
    ['/sub//page.js', 'sub/page.js', 'text/javascript; charset=utf-8'],
    ['/50%25off.json', '50%off.json', 'application/json'],
    ['/%61pp.js', 'app.js', 'text/javascript; charset=utf-8'],
    ['/alias.js', 'app.js', 'text/javascript; charset=utf-8'],
    ['/trapdir/other.js', 'trapdir/other.js', 'text/javascript; charset=utf-8'],
  ];
  for (const [p, file, type] of cases) {
    const r = await request('GET', p);
    assert.ifError(r.error);
    assert.equal(r.status, 200, p);
    assert.deepEqual(r.body, Buffer.from(FILES[file]), p);
    assert.equal(r.headers['content-type'], type, p);
    assert.equal(r.headers['content-security-policy'], CSP, p);
    assert.equal(r.headers['cache-control'], 'no-store', p);
    assert.equal(r.headers['x-content-type-options'], 'nosniff', p);
  }
});

test('HEAD answers the headers without a body', async () => {
  const r = await request('HEAD', '/app.js');
  assert.ifError(r.error);
  assert.equal(r.status, 200);
  assert.equal(r.body.length, 0);
  assert.equal(r.headers['content-type'], 'text/javascript; charset=utf-8');
  assert.equal(Number(r.headers['content-length']), Buffer.byteLength(FILES['app.js']));
  assert.equal(r.headers['content-security-policy'], CSP);
});

test('hostile requests get the expected status and never the secret', async (t) => {
  assert.ok(HOSTILE.length >= 50, `only ${HOSTILE.length} hostile cases`);
  for (const [group, method, target, expected, body] of HOSTILE) {
    const p = typeof target === 'function' ? target() : target;
    const label = `${group}: ${method} ${JSON.stringify(typeof p === 'string' ? p : p.raw).slice(0, 70)} -> ${expected}`;
    await t.test(label, async () => {
      const r = typeof p === 'string' ? await request(method, p) : await rawRequest(p.raw);
      assert.ifError(r.error);
      assert.ok(!r.body.toString('latin1').includes(SECRET), `the secret was sent (status ${r.status})`);
      assert.equal(r.status, expected);
      if (body !== undefined) assert.equal(r.body.toString(), body);
      if (expected === 405) assert.equal(r.headers.allow, 'GET, HEAD');
      if (method === 'HEAD') assert.equal(r.body.length, 0);
      await assertAlive(); // so that a crash is pinned on the request that caused it
    });
  }
});

test('the server still answers after the barrage', async () => {
  await assertAlive();
  const r = await request('GET', '/mod.wasm');
  assert.equal(r.status, 200);
  assert.deepEqual(r.body, WASM);
});
