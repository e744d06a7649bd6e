// Loading the engine, once. The page fetches the worker script, the engine glue and the .wasm
// at load and starts every worker from a Blob URL with the bytes handed over: a run never
// fetches anything. A single-file page supplies the same parts from its embedded copy.
//
// Owns: engine() (the promise of the engine, started on the first call) and engineIsReady().
// Must not touch: the DOM or the page state.
import { createEngine } from './engine.js';
import { engineOptions } from './single.js';
import { scheduleRender } from './render-loop.js';

let engineP = null;
let ready = false;

async function fetchOk(path, how) {
  const r = await fetch(path, { cache: 'no-store' });
  if (!r.ok) throw new Error(path + ': HTTP ' + r.status);
  return how === 'bytes' ? r.arrayBuffer() : r.text();
}

async function makeEngine() {
  const opts = engineOptions();
  if (opts) return createEngine(opts);
  try {
    const parts = await Promise.all([fetchOk('pkg/kiln.js'), fetchOk('worker.js'), fetchOk('pkg/kiln_bg.wasm', 'bytes')]);
    return createEngine({ workerSource: parts[0] + '\n' + parts[1], wasmBytes: parts[2] });
  } catch (e) {
    // Let the workers load the files themselves; they report what is missing.
    return createEngine({ workerUrl: 'worker.js' });
  }
}

/** The engine (a promise); the first call starts loading it. */
export function engine() {
  if (!engineP) {
    engineP = makeEngine();
    engineP.then(function () { ready = true; scheduleRender(); });
  }
  return engineP;
}

export function engineIsReady() {
  return ready;
}
