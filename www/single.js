// "Save as single page": one self-contained HTML file with the engine (WebAssembly, base64),
// the page's modules bundled into one inline classic script (bundle.js), the style inlined,
// the demos and the current models inside. It opens from file:// with no network: its
// Content-Security-Policy allows only its own inline script and style (by hash), workers from
// blob: URLs, and nothing that connects anywhere.
//
// Owns: the embedded bundle of a single page (embedded, engineOptions) and the making of one
// (buildSinglePage). Must not touch: the page state or the form (the caller hands in the
// models), nor the DOM beyond reading the embedded bundle.
//
//   embedded()        -> the embedded bundle when this page is a single file, or null
//   buildSinglePage({spec, settings, title, b})
//                     -> Promise(html text); b: {spec, settings} of model B, or absent
//   engineOptions()   -> options for createEngine when this page is a single file, or null
import { bytesToBase64, base64ToBytes } from './base64.js';
import { bundleModules } from './bundle.js';

// The page's entry module, the files the worker is made of, and the other files a single page holds.
const ENTRY = 'main.js';
const WORKER = ['pkg/kiln.js', 'worker.js'];
const PAGE_FILES = ['index.html', 'app.css', ...WORKER];

let embeddedCache;

export function embedded() {
  if (embeddedCache === undefined) {
    const node = document.getElementById('kiln-embed');
    embeddedCache = null;
    if (node) {
      try {
        embeddedCache = JSON.parse(node.textContent);
      } catch (e) {
        embeddedCache = null;
      }
    }
  }
  return embeddedCache;
}

async function sha256(text) {
  const digest = await crypto.subtle.digest('SHA-256', new TextEncoder().encode(text));
  return "'sha256-" + bytesToBase64(new Uint8Array(digest)) + "'";
}

// Where the bundle's parts come from: the embedded copy, or the page's own origin. The modules
// are found by following the imports from main.js, and bundled.
async function gather() {
  const own = embedded();
  const sources = own ? Object.assign({}, own.sources) : {};
  async function read(f) {
    if (!(f in sources)) {
      if (own) throw new Error(f + ' is missing from this page');
      const r = await fetch(f, { cache: 'no-store' });
      if (!r.ok) throw new Error('could not read ' + f + ' from this page');
      sources[f] = await r.text();
    }
    return sources[f];
  }
  for (const f of PAGE_FILES) await read(f);
  const script = (await bundleModules(ENTRY, read)).text;
  if (own) return { sources: sources, script: script, wasm: own.wasm, demos: own.demos };
  const wasm = await fetch('pkg/kiln_bg.wasm', { cache: 'no-store' });
  if (!wasm.ok) throw new Error('could not read the engine from this page');
  const demos = await fetch('pkg/demos.json', { cache: 'no-store' });
  return {
    sources: sources,
    script: script,
    wasm: bytesToBase64(new Uint8Array(await wasm.arrayBuffer())),
    demos: demos.ok ? await demos.json() : [],
  };
}

// Text safe inside a script element: JSON with every '<' escaped.
function jsonForScript(value) {
  return JSON.stringify(value).replace(/</g, '\\u003c');
}

export async function buildSinglePage(options) {
  const bundle = await gather();
  const sources = bundle.sources;
  const script = bundle.script;
  if (/<\/script/i.test(script)) throw new Error('the page\'s modules cannot be inlined');
  const embed = {
    sources: sources,
    wasm: bundle.wasm,
    demos: bundle.demos,
    spec: options.spec || null,
    settings: options.settings || null,
    b: options.b || null,
  };
  const embedText = jsonForScript(embed);
  const css = sources['app.css'];
  const scriptHash = await sha256(script);
  const styleHash = await sha256(css);
  const csp = "default-src 'none'; script-src " + scriptHash + " 'wasm-unsafe-eval'; " +
    "worker-src blob:; style-src " + styleHash + "; img-src data: blob:; connect-src 'none'; " +
    "base-uri 'none'; form-action 'none'";
  let html = sources['index.html'];
  // Drop the served page's policy, stylesheet link and script tags; put the inlined ones in
  // (replacement functions, so that `$` in the sources is never read as a pattern).
  html = html.replace(/<meta[^>]+http-equiv=["']Content-Security-Policy["'][^>]*>/i, '');
  html = html.replace(/<link[^>]+rel=["']stylesheet["'][^>]*>/gi, '');
  html = html.replace(/<script[^>]+src=["'][^"']+["'][^>]*>\s*<\/script>/gi, '');
  const head = '<meta http-equiv="Content-Security-Policy" content="' + csp + '">\n<style>' + css + '</style>\n';
  html = html.replace(/<head>/i, () => '<head>\n' + head);
  const body = '<script type="application/json" id="kiln-embed">' + embedText + '<\/script>\n' +
    '<script>' + script + '<\/script>\n';
  html = html.replace(/<\/body>/i, () => body + '</body>');
  if (options.title) {
    const t = String(options.title).replace(/[<>&]/g, ' ');
    html = html.replace(/<title>[^<]*<\/title>/i, () => '<title>' + t + ' · Kiln</title>');
  }
  return html;
}

export function engineOptions() {
  const own = embedded();
  if (!own) return null;
  return {
    workerSource: WORKER.map((f) => own.sources[f]).join('\n'),
    wasmBytes: base64ToBytes(own.wasm).buffer,
  };
}
