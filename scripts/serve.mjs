// Kiln's development server: serves the files of one folder over HTTP on 127.0.0.1, with no
// dependencies. The folder is the project's www/, or the one named by KILN_WWW_ROOT; the
// port is PORT (8080 by default, 0 for any free port). Every answer carries the page's strict
// Content-Security-Policy (serve-csp.mjs, so workers get the same policy as the page),
// Cache-Control: no-store and X-Content-Type-Options: nosniff. A directory is answered by its
// index.html. The query string and the fragment are ignored.
//
// What it refuses:
//   405  any method but GET and HEAD (CONNECT included);
//   400  a request target that is not a path starting with "/", a path longer than MAX_PATH,
//        a malformed percent-encoding, and a segment that decodes to "." or "..", contains "/",
//        "\" or a null byte, or is longer than MAX_SEGMENT bytes;
//   404  anything whose real path (every symlink resolved) is neither the folder nor inside it,
//        a hidden name (starting with "."), anything that is not a regular file;
//   500  an unexpected error while answering; the server logs it and lives on.
import http from 'node:http';
import fs from 'node:fs/promises';
import path from 'node:path';
import url from 'node:url';
import { CSP } from './serve-csp.mjs';

const here = path.dirname(url.fileURLToPath(import.meta.url));
const root = await fs.realpath(path.resolve(process.env.KILN_WWW_ROOT || path.join(here, '..', 'www')));
const rootPrefix = root.endsWith(path.sep) ? root : root + path.sep;
const port = Number(process.env.PORT || 8080);
const MAX_PATH = 2048;
const MAX_SEGMENT = 255;
const types = {
  '.html': 'text/html; charset=utf-8', '.js': 'text/javascript; charset=utf-8',
  '.mjs': 'text/javascript; charset=utf-8', '.css': 'text/css; charset=utf-8',
  '.json': 'application/json', '.wasm': 'application/wasm', '.png': 'image/png', '.svg': 'image/svg+xml',
};
const COMMON = { 'Content-Security-Policy': CSP, 'Cache-Control': 'no-store', 'X-Content-Type-Options': 'nosniff' };
// Errors of the file system that mean "there is no such file to serve".
const MISSING = new Set(['ENOENT', 'ENOTDIR', 'ELOOP', 'ENAMETOOLONG', 'EACCES', 'EPERM', 'EISDIR']);

/** The decoded segments of a request target's path, or 400 if the target is refused. */
function segmentsOf(target) {
  if (!target.startsWith('/')) return 400;
  const raw = target.split(/[?#]/, 1)[0];
  if (raw.length > MAX_PATH) return 400;
  const segments = [];
  for (const part of raw.split('/')) {
    if (part === '') continue;
    let s;
    try { s = decodeURIComponent(part); } catch { return 400; }
    if (s === '.' || s === '..' || /[/\\\0]/.test(s) || Buffer.byteLength(s) > MAX_SEGMENT) return 400;
    segments.push(s);
  }
  return segments;
}

const inside = (p) => p === root || p.startsWith(rootPrefix);

/**
 * The real path of the regular file inside the root that the segments name, or null. (A symlink
 * swapped in between this check and the read is not guarded against: this is a local server.)
 */
async function fileFor(segments) {
  if (segments.some((s) => s.startsWith('.'))) return null;
  let real = await fs.realpath(path.join(root, ...segments));
  if (!inside(real)) return null;
  if ((await fs.stat(real)).isDirectory()) {
    real = await fs.realpath(path.join(real, 'index.html'));
    if (!inside(real)) return null;
  }
  return (await fs.stat(real)).isFile() ? real : null;
}

function plain(res, status, extra = {}) {
  const body = `${status} ${http.STATUS_CODES[status]}\n`;
  res.writeHead(status, { ...COMMON, 'Content-Type': 'text/plain; charset=utf-8', 'Content-Length': Buffer.byteLength(body), ...extra });
  res.end(res.req.method === 'HEAD' ? undefined : body);
}

async function handle(req, res) {
  if (req.method !== 'GET' && req.method !== 'HEAD') return plain(res, 405, { Allow: 'GET, HEAD' });
  const segments = segmentsOf(req.url);
  if (typeof segments === 'number') return plain(res, segments);
  let file, data;
  try {
    file = await fileFor(segments);
    if (file) data = await fs.readFile(file);
  } catch (err) {
    if (!MISSING.has(err.code)) throw err;
    file = null;
  }
  if (!file) return plain(res, 404);
  res.writeHead(200, { ...COMMON, 'Content-Type': types[path.extname(file)] || 'application/octet-stream', 'Content-Length': data.length });
  res.end(req.method === 'HEAD' ? undefined : data);
}

const server = http.createServer((req, res) => {
  handle(req, res).catch((err) => {
    console.error(`serve.mjs: error answering ${req.method} ${JSON.stringify(req.url)}:`, err);
    try {
      if (res.headersSent) res.destroy(); else plain(res, 500);
    } catch {
      res.destroy();
    }
  });
});
// CONNECT never reaches the request handler: refuse it on the socket.
server.on('connect', (req, socket) => {
  socket.on('error', () => {});
  socket.end('HTTP/1.1 405 Method Not Allowed\r\nAllow: GET, HEAD\r\nContent-Length: 0\r\nConnection: close\r\n\r\n');
});
server.listen(port, '127.0.0.1', () => {
  console.log(`Kiln is at http://127.0.0.1:${server.address().port}/#demo=default-two-modes.json`);
});
