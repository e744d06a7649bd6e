// "Save as single page": one self-contained HTML file with the engine (WebAssembly, base64),
// every script and style inlined, the demos and the current spec inside. It opens from file://
// with no network: its Content-Security-Policy allows only its own inline scripts and styles
// (by hash), workers from blob: URLs, and nothing that connects anywhere.
//
//   KilnSingle.embedded()            -> the embedded bundle when this page is a single file, or null
//   KilnSingle.build({spec, settings, title, b}) -> Promise(html text); b: {spec, settings} of model B, or absent
(function (global) {
  'use strict';

  // Files the page is made of, in the order the scripts run.
  const SCRIPTS = ['plots.js', 'engine.js', 'single.js', 'app.js'];
  const WORKER = ['pkg/kiln.js', 'worker.js'];
  const TEXT_FILES = ['index.html', 'app.css', ...SCRIPTS, ...WORKER];

  function embedded() {
    const node = document.getElementById('kiln-embed');
    if (!node) return null;
    try {
      return JSON.parse(node.textContent);
    } catch (e) {
      return null;
    }
  }

  function base64(bytes) {
    let s = '';
    const chunk = 0x8000;
    for (let i = 0; i < bytes.length; i += chunk) {
      s += String.fromCharCode.apply(null, bytes.subarray(i, i + chunk));
    }
    return btoa(s);
  }

  function unbase64(text) {
    const bin = atob(text);
    const out = new Uint8Array(bin.length);
    for (let i = 0; i < bin.length; i++) out[i] = bin.charCodeAt(i);
    return out.buffer;
  }

  async function sha256(text) {
    const digest = await crypto.subtle.digest('SHA-256', new TextEncoder().encode(text));
    return "'sha256-" + base64(new Uint8Array(digest)) + "'";
  }

  // Where the bundle's parts come from: the embedded copy, or the page's own origin.
  async function gather() {
    const own = embedded();
    if (own) return own;
    const sources = {};
    for (const f of TEXT_FILES) {
      const r = await fetch(f, { cache: 'no-store' });
      if (!r.ok) throw new Error('could not read ' + f + ' from this page');
      sources[f] = await r.text();
    }
    const wasm = await fetch('pkg/kiln_bg.wasm', { cache: 'no-store' });
    if (!wasm.ok) throw new Error('could not read the engine from this page');
    const demos = await fetch('pkg/demos.json', { cache: 'no-store' });
    return {
      sources: sources,
      wasm: base64(new Uint8Array(await wasm.arrayBuffer())),
      demos: demos.ok ? await demos.json() : [],
    };
  }

  // Text safe inside a script element: JSON with every '<' escaped.
  function jsonForScript(value) {
    return JSON.stringify(value).replace(/</g, '\\u003c');
  }

  async function build(options) {
    const bundle = await gather();
    const sources = bundle.sources;
    for (const f of SCRIPTS) {
      if (/<\/script/i.test(sources[f])) throw new Error(f + ' cannot be inlined');
    }
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
    const scripts = SCRIPTS.map((f) => sources[f]);
    const hashes = await Promise.all(scripts.map(sha256));
    const styleHash = await sha256(css);
    const csp = "default-src 'none'; script-src " + hashes.join(' ') + " 'wasm-unsafe-eval'; " +
      "worker-src blob:; style-src " + styleHash + "; img-src data: blob:; connect-src 'none'; " +
      "base-uri 'none'; form-action 'none'";
    let html = sources['index.html'];
    // Drop the served page's policy, stylesheet link and script tags; put the inlined ones in.
    html = html.replace(/<meta[^>]+http-equiv=["']Content-Security-Policy["'][^>]*>/i, '');
    html = html.replace(/<link[^>]+rel=["']stylesheet["'][^>]*>/gi, '');
    html = html.replace(/<script[^>]+src=["'][^"']+["'][^>]*>\s*<\/script>/gi, '');
    const head = '<meta http-equiv="Content-Security-Policy" content="' + csp + '">\n<style>' + css + '</style>\n';
    html = html.replace(/<head>/i, '<head>\n' + head);
    const body = '<script type="application/json" id="kiln-embed">' + embedText + '<\/script>\n' +
      scripts.map((s) => '<script>' + s + '<\/script>').join('\n') + '\n';
    html = html.replace(/<\/body>/i, body + '</body>');
    if (options.title) {
      const t = String(options.title).replace(/[<>&]/g, ' ');
      html = html.replace(/<title>[^<]*<\/title>/i, '<title>' + t + ' · Kiln</title>');
    }
    return html;
  }

  /** Options for KilnEngine.create when this page is a single file, else null. */
  function engineOptions() {
    const own = embedded();
    if (!own) return null;
    return {
      workerSource: WORKER.map((f) => own.sources[f]).join('\n'),
      wasmBytes: unbase64(own.wasm),
    };
  }

  global.KilnSingle = { embedded: embedded, build: build, engineOptions: engineOptions };
})(typeof self !== 'undefined' ? self : this);
