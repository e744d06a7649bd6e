// Kiln worker orchestration. The main thread never runs WebAssembly: every engine call goes to
// a classic worker (worker.js). This file knows the step/absorb protocol of ENGINE-API.md.
//
// Owns: the workers (a helper for checks and grids, one per share of the chains during a run)
// and the messages to them. Must not touch: the DOM or the page state; it reports through the
// callbacks and promises below.
//
//   const engine = createEngine(options);
//     options.workerUrl     URL of the worker script (default 'worker.js'), or
//     options.workerSource  the worker's full script text (engine glue + worker.js) and
//     options.wasmBytes     the engine's .wasm as an ArrayBuffer: workers are then created from
//                           a Blob URL and never fetch anything (hook for a single-file page).
//   engine.check(specJson)              -> Promise(check result)        (helper worker)
//   engine.grid(specJson, g)            -> Promise(Float64Array)        (helper worker)
//   engine.readCsv(text)                -> Promise({names, rows})       (helper worker)
//   engine.functions()                  -> Promise([{name, args, summary, example, kind}])
//   engine.run(specJson, overrides, on) -> {cancel(), done: Promise({result, draws, csv})}
//     on.onPhase(text), on.onProgress(info)   info = {fraction, drawsDone, drawsTotal,
//                                         elapsed, remaining, stepKind, progress, settings}
// Failures reject with the engine's plain error object {kind, message, rendered, ...};
// a cancelled run rejects with {kind: 'cancelled'}.

function internalError(message) {
  return { kind: 'internal', message: message, location: null, hint: null,
    rendered: 'error: ' + message + '\n' };
}

// Numbers the workers' life locks.
let channelCount = 0;

// One worker and its pending calls, matched by id.
function Channel(factory, initMessage, initTransfer) {
  this.worker = factory();
  this.pending = new Map();
  this.nextId = 1;
  this.dead = false;
  const self = this;
  this.worker.onmessage = function (ev) {
    const msg = ev.data || {};
    const p = self.pending.get(msg.id);
    if (!p) return;
    self.pending.delete(msg.id);
    if (msg.type === 'error') p.reject(msg.error);
    else p.resolve(msg);
  };
  this.worker.onerror = function (ev) {
    ev.preventDefault();
    self.failAll(internalError('the engine worker failed to start or crashed' +
      (ev.message ? ': ' + ev.message : '') + '. Was www/pkg built (scripts/build-web.sh)?'));
  };
  this.worker.onmessageerror = function () {
    self.failAll(internalError('a message from the engine worker could not be read'));
  };
  // A worker that dies without a word (out of memory, shut down by the browser) sends no error
  // event: it holds a Web Lock for its life, and this request for the same lock is granted
  // when it ends. A worker this page terminated is `dead` by then and is not reported.
  const lifeLock = typeof navigator !== 'undefined' && navigator.locks ? 'kiln-worker-' + Math.random().toString(36).slice(2) + '-' + (++channelCount) : null;
  this.ready = this.call(Object.assign({}, initMessage, { lifeLock: lifeLock }), initTransfer);
  this.ready.then(function (msg) {
    if (!msg || !msg.lifeLock) return;
    navigator.locks.request(lifeLock, function () {
      if (self.dead) return;
      self.dead = true;
      self.failAll(internalError('the engine worker stopped without a word (it may have run out of memory, or the browser shut it down)'));
    }).catch(function () { /* no lock: only error events report a crash */ });
  }, function () { /* reported by the calls that follow */ });
}
Channel.prototype.call = function (msg, transfer) {
  if (this.dead) return Promise.reject({ kind: 'cancelled', message: 'stopped', rendered: '' });
  const id = this.nextId++;
  const self = this;
  return new Promise(function (resolve, reject) {
    self.pending.set(id, { resolve: resolve, reject: reject });
    self.worker.postMessage(Object.assign({}, msg, { id: id }), transfer || []);
  });
};
Channel.prototype.failAll = function (err) {
  const pend = Array.from(this.pending.values());
  this.pending.clear();
  for (const p of pend) p.reject(err);
};
Channel.prototype.terminate = function () {
  if (this.dead) return;
  this.dead = true;
  this.worker.terminate();
  this.failAll({ kind: 'cancelled', message: 'stopped', rendered: '' });
};

export function createEngine(options) {
  options = options || {};
  let blobUrl = null;
  function factory() {
    if (options.workerSource) {
      if (!blobUrl) {
        blobUrl = URL.createObjectURL(new Blob([options.workerSource], { type: 'text/javascript' }));
      }
      return new Worker(blobUrl);
    }
    return new Worker(options.workerUrl || 'worker.js');
  }
  function newChannel() {
    if (options.wasmBytes) {
      const copy = options.wasmBytes.slice(0);
      return new Channel(factory, { type: 'init', wasm: copy }, [copy]);
    }
    return new Channel(factory, { type: 'init' });
  }

  // The helper answers check_spec and log_density_grid. If it is stuck on an old request when
  // a new one arrives, it is replaced (a new worker starts in milliseconds).
  let helper = null;
  let helperBusy = 0;
  let helperBusySince = 0;
  function helperCall(msg, preempt) {
    const now = performance.now();
    if (helper && preempt && helperBusy > 0 && now - helperBusySince > 1500) {
      helper.terminate();
      helper = null;
    }
    if (!helper) { helper = newChannel(); helperBusy = 0; }
    const ch = helper;
    if (helperBusy === 0) helperBusySince = now;
    helperBusy++;
    return ch.call(msg).finally(function () {
      if (ch === helper) { helperBusy--; }
    });
  }

  function check(specJson) {
    return helperCall({ type: 'check', spec: specJson }, true).then(function (r) { return r.result; });
  }

  /** The log Bayes factor of two finished runs (their results), as the engine computes it. */
  function compare(resultA, resultB) {
    return helperCall({ type: 'compare', a: JSON.stringify(resultA), b: JSON.stringify(resultB) }, false)
      .then(function (r) { return r.result; });
  }

  function grid(specJson, g) {
    return helperCall(Object.assign({ type: 'grid', spec: specJson }, g), false)
      .then(function (r) { return r.values; });
  }

  function readCsv(text) {
    return helperCall({ type: 'readCsv', text: text }, false).then(function (r) { return r.result; });
  }

  function functions() {
    return helperCall({ type: 'functions' }, false).then(function (r) { return r.result; });
  }

  function run(specJson, overrides, on) {
    on = on || {};
    let chains = overrides && overrides.chains;
    if (!(chains >= 1)) {
      try { chains = JSON.parse(specJson).settings.chains; } catch (e) { chains = undefined; }
    }
    if (!(chains >= 1)) chains = 4;
    chains = Math.floor(chains);
    const cores = Math.max(1, navigator.hardwareConcurrency || 1);
    const W = Math.max(1, Math.min(cores, chains));
    const channels = [];
    let cancelled = false;

    function stopAll() {
      for (const ch of channels) ch.terminate();
    }

    async function drive() {
      const t0 = performance.now();
      if (on.onPhase) on.onPhase('Starting ' + W + (W === 1 ? ' worker' : ' workers') + '…');
      // Where the time goes (ms), for the workers benchmark: starting the workers, the
      // leader's mode search, the followers taking its modes, waiting for every worker's step,
      // waiting for every worker's absorb, the estimates and checks, and fetching the result.
      const timings = { start: 0, search: 0, follow: 0, steps: 0, absorbs: 0, estimates: 0, finish: 0, stepCount: 0 };
      let mark = performance.now();
      const lap = function (key) { const now = performance.now(); timings[key] += now - mark; mark = now; };
      for (let w = 0; w < W; w++) channels.push(newChannel());
      await Promise.all(channels.map(function (ch) { return ch.ready; }));
      lap('start');
      if (on.onPhase) on.onPhase('Searching for modes…');
      const overridesJson = JSON.stringify(overrides || {});
      const ownedBy = function (w) {
        const owned = [];
        for (let c = w; c < chains; c += W) owned.push(c);
        return owned;
      };
      // The first worker searches for the modes once; the others take its modes and only
      // run their chains (the same plan, so the same bits as one worker).
      const lead = await channels[0].call({ type: 'session', spec: specJson,
        overrides: overridesJson, owned: ownedBy(0) });
      lap('search');
      const follows = await Promise.all(channels.slice(1).map(function (ch, i) {
        return ch.call({ type: 'follow', spec: specJson, overrides: overridesJson,
          owned: ownedBy(i + 1), modes: lead.modes });
      }));
      lap('follow');
      const readies = [lead].concat(follows);
      let state = readies[0];
      if (state.chains !== chains) {
        throw internalError('the engine resolved ' + state.chains + ' chains, the page expected ' +
          chains + '; set the number of chains explicitly');
      }
      const settings = state.settings || {};
      const warmupTotal = Number(settings.warmup) || 0;
      const drawsPerChain = Number(settings.draws) || 0;
      const units = Math.max(1, warmupTotal + drawsPerChain);
      let warmDone = 0;
      const tLoop = performance.now();
      let lastProgress = null;
      while (state.stepKind !== 'done') {
        const recs = await Promise.all(channels.map(function (ch) { return ch.call({ type: 'step' }); }));
        lap('steps');
        timings.stepCount += 1;
        // Every worker's records, in worker order, as one Float64Array (copied to each).
        let length = 0;
        for (const r of recs) length += r.records.length;
        const all = new Float64Array(length);
        let at = 0;
        for (const r of recs) { all.set(r.records, at); at += r.records.length; }
        const absorbed = await Promise.all(channels.map(function (ch) {
          return ch.call({ type: 'absorb', all: all });
        }));
        // The last absorb also makes the estimates and the checks (the leader's `finish`).
        lap(absorbed[0].stepKind === 'done' ? 'estimates' : 'absorbs');
        if (state.stepKind === 'warmup') warmDone += Number(state.stepIterations) || 0;
        state = absorbed[0];
        const p = state.progress || {};
        lastProgress = p;
        const drawsTotal = Number(p.draws_total) || 0;
        const drawsDone = Number(p.draws_done) || 0;
        let done = Math.min(warmDone, warmupTotal) +
          (drawsTotal > 0 ? drawsDone / drawsTotal * drawsPerChain : 0);
        if (state.stepKind === 'done') done = units;
        const fraction = Math.min(1, done / units);
        const now = performance.now();
        const loopTime = now - tLoop;
        const remaining = fraction > 0 ? loopTime * (1 - fraction) / fraction : null;
        if (on.onProgress) {
          on.onProgress({
            fraction: fraction, drawsDone: drawsDone, drawsTotal: drawsTotal,
            elapsed: now - t0, remaining: remaining, stepKind: state.stepKind,
            stepIndex: state.stepIndex, stepCount: state.stepCount,
            progress: p, settings: settings,
          });
        }
      }
      if (on.onPhase) on.onPhase('Summarising…');
      const fin = await channels[0].call({ type: 'finish', maxPoints: 4000 });
      lap('finish');
      stopAll();
      return { result: fin.result, draws: fin.draws, csv: fin.csv, progress: lastProgress,
        elapsed: performance.now() - t0, workers: W, timings: timings };
    }

    const done = drive().catch(function (e) {
      stopAll();
      if (cancelled) throw { kind: 'cancelled', message: 'cancelled', rendered: '' };
      throw e;
    });
    return {
      workers: W,
      done: done,
      cancel: function () { cancelled = true; stopAll(); },
    };
  }

  return { check: check, grid: grid, readCsv: readCsv, functions: functions, run: run, compare: compare };
}
