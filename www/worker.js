// Kiln engine worker (classic worker). Loads the WebAssembly engine and answers messages
// from engine.js. It stays a classic script because it loads wasm-bindgen's no-modules glue
// (pkg/kiln.js) with importScripts, or gets it prepended in a Blob worker.
//
// Owns: the engine instance and the run session inside one worker.
// Must not touch: the page (it cannot); everything it sends back is plain data.
//
// Messages in (each may carry an `id` that is echoed back):
//   {type: 'init', wasm?: ArrayBuffer, lifeLock?} load the engine (from bytes, or pkg/kiln_bg.wasm);
//                                                with lifeLock, first hold that Web Lock for the
//                                                worker's whole life -> {type: 'inited', lifeLock: held}
//   {type: 'check', spec}                        check_spec(spec) -> {type: 'checked', result}
//   {type: 'compare', a, b}                      compare_runs(a, b) (run results as JSON) -> {type: 'compared', result}
//   {type: 'grid', spec, ix, iy, xmin, xmax, ymin, ymax, nx, ny} -> {type: 'grid', values}
//   {type: 'readCsv', text}                      read_data_csv(text) -> {type: 'csv', result}
//   {type: 'functions'}                          formula_functions() -> {type: 'functions', result}
//   {type: 'session', spec, overrides, owned}   new RunSession (the leader: searches for the modes)
//                                                -> {type: 'ready', modes (JSON text), ...state}
//   {type: 'follow', spec, overrides, owned, modes}  RunSession.follow (takes the leader's modes)
//                                                -> {type: 'ready', ...state}
//   {type: 'step'}                               run_step() -> {type: 'records', records: Float64Array}
//   {type: 'absorb', all: Float64Array}          absorb(all) -> {type: 'absorbed', progress, ...state}
//   {type: 'finish', maxPoints}                  -> {type: 'final', result, draws, csv}
// Any failure answers {type: 'error', error: {kind, message, rendered, ...}}.
'use strict';

// When this file is inlined after the engine's glue code (a Blob worker), the glue is already
// defined; otherwise load it from the page's own origin.
if (typeof wasm_bindgen === 'undefined') {
  importScripts('pkg/kiln.js');
}

let kilnReady = null;
let kilnSession = null;

function plainError(e) {
  if (e instanceof Map) e = Object.fromEntries(e);
  if (e && typeof e === 'object' && typeof e.message === 'string' && typeof e.kind === 'string') {
    return {
      kind: e.kind,
      message: e.message,
      location: e.location || null,
      hint: e.hint || null,
      rendered: typeof e.rendered === 'string' ? e.rendered : 'error: ' + e.message + '\n',
    };
  }
  // A JavaScript exception or a trap inside the engine: report it in the same shape.
  const message = e && e.message ? String(e.message) : String(e);
  return {
    kind: 'internal',
    message: message,
    location: null,
    hint: null,
    rendered: 'error: the engine stopped unexpectedly: ' + message + '\n',
  };
}

// Holds the Web Lock `name` until this worker ends (however it ends), so that the page learns of
// a worker that died without a word: its own request for the lock is granted then. Resolves to
// whether the lock is held (false where locks are not offered, e.g. a file:// page).
function holdLifeLock(name) {
  return new Promise(function (held) {
    try {
      if (!name || !self.navigator || !navigator.locks) { held(false); return; }
      navigator.locks.request(name, function () { held(true); return new Promise(function () {}); })
        .catch(function () { held(false); });
    } catch (e) { held(false); }
  });
}

function sessionState(s) {
  return {
    chains: s.chains(),
    settings: s.settings(),
    stepCount: s.step_count(),
    stepIndex: s.step_index(),
    stepKind: s.step_kind(),
    stepIterations: s.step_iterations(),
  };
}

async function handle(msg) {
  switch (msg.type) {
    case 'init': {
      const lifeLock = await holdLifeLock(msg.lifeLock);
      if (!kilnReady) {
        const source = msg.wasm ? msg.wasm : 'pkg/kiln_bg.wasm';
        kilnReady = wasm_bindgen({ module_or_path: source }).catch(function (e) {
          // The engine is built with WebAssembly SIMD; a browser without it cannot compile it.
          const m = e && e.message ? String(e.message) : String(e);
          throw new Error('the engine could not be loaded (' + m + '); it needs a browser with ' +
            'WebAssembly SIMD: Chrome or Edge 91+, Firefox 89+, Safari 16.4+');
        });
      }
      await kilnReady;
      return { type: 'inited', version: wasm_bindgen.version(), lifeLock: lifeLock };
    }
    case 'check': {
      await kilnReady;
      return { type: 'checked', result: wasm_bindgen.check_spec(msg.spec) };
    }
    case 'compare': {
      await kilnReady;
      return { type: 'compared', result: wasm_bindgen.compare_runs(msg.a, msg.b) };
    }
    case 'grid': {
      await kilnReady;
      const v = wasm_bindgen.log_density_grid(msg.spec, msg.ix, msg.iy, msg.xmin, msg.xmax,
        msg.ymin, msg.ymax, msg.nx, msg.ny);
      const values = v instanceof Float64Array ? v : Float64Array.from(v);
      return { type: 'grid', values: values, transfer: [values.buffer] };
    }
    case 'readCsv': {
      await kilnReady;
      return { type: 'csv', result: wasm_bindgen.read_data_csv(msg.text) };
    }
    case 'functions': {
      await kilnReady;
      return { type: 'functions', result: wasm_bindgen.formula_functions() };
    }
    case 'session': {
      await kilnReady;
      if (kilnSession && kilnSession.free) kilnSession.free();
      kilnSession = null;
      kilnSession = new wasm_bindgen.RunSession(msg.spec, msg.overrides, Uint32Array.from(msg.owned));
      return Object.assign({ type: 'ready', modes: kilnSession.modes() }, sessionState(kilnSession));
    }
    case 'follow': {
      await kilnReady;
      if (kilnSession && kilnSession.free) kilnSession.free();
      kilnSession = null;
      kilnSession = wasm_bindgen.RunSession.follow(msg.spec, msg.overrides,
        Uint32Array.from(msg.owned), msg.modes);
      return Object.assign({ type: 'ready' }, sessionState(kilnSession));
    }
    case 'step': {
      const records = kilnSession.run_step();
      return { type: 'records', records: records, transfer: [records.buffer] };
    }
    case 'absorb': {
      kilnSession.absorb(msg.all);
      return Object.assign({ type: 'absorbed', progress: kilnSession.progress() },
        sessionState(kilnSession));
    }
    case 'finish': {
      const result = kilnSession.result();
      const draws = kilnSession.plot_draws(msg.maxPoints || 4000);
      const csv = kilnSession.draws_csv();
      return { type: 'final', result: result, draws: draws, csv: csv };
    }
    default:
      throw { kind: 'usage', message: 'unknown message ' + String(msg.type), rendered: '' };
  }
}

// One message at a time, in order.
let kilnQueue = Promise.resolve();
self.onmessage = function (ev) {
  const msg = ev.data || {};
  kilnQueue = kilnQueue.then(async function () {
    let reply;
    try {
      reply = await handle(msg);
    } catch (e) {
      reply = { type: 'error', error: plainError(e) };
    }
    reply.id = msg.id;
    const transfer = reply.transfer || [];
    delete reply.transfer;
    self.postMessage(reply, transfer);
  });
};
