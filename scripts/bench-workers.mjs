// Browser benchmark (not a test): what sharing a run between workers buys. For the default demo
// (2 unknowns) and a 10-unknown model (bench/targets/ten-unknowns-gauges.json), at default
// settings, with 1 worker and with every core: the time from pressing Run to the first streamed
// estimate (the running log Z appears) and to the final result. The number of workers is set
// through navigator.hardwareConcurrency before the page loads (the page starts min(cores,
// chains) workers). Writes the figures into the workers section of BENCHMARKS.md.
//   node scripts/bench-workers.mjs          (after scripts/build-web.sh and npm ci)
import fs from 'node:fs';
import os from 'node:os';
import path from 'node:path';
import { startServer, launch, openPage, ROOT } from '../tests/e2e/harness.mjs';

const REPS = 3;
const models = [
  { name: 'default demo (2 unknowns)', demo: 'default-two-modes.json' },
  { name: '10 unknowns (ten-unknowns-gauges.json)', file: path.join(ROOT, 'bench', 'targets', 'ten-unknowns-gauges.json') },
];
const all = os.cpus().length;
const counts = all > 1 ? [1, all] : [1];

async function once(browser, server, model, workers) {
  const { page, context } = await openPage(browser);
  await page.addInitScript((n) => {
    Object.defineProperty(navigator, 'hardwareConcurrency', { get: () => n });
  }, workers);
  await page.goto(server.origin + (model.demo ? '/#demo=' + model.demo : '/'));
  await page.waitForSelector('body[data-ready="true"]', { timeout: 30000 });
  if (model.file) {
    await page.setInputFiles('[data-testid="open-spec-file"]', model.file);
    await page.waitForFunction((t) => document.querySelector('[data-testid="title-input"]').value === t,
      JSON.parse(fs.readFileSync(model.file, 'utf8')).title, { timeout: 10000 });
  }
  const t0 = Date.now();
  await page.click('[data-testid="run-button"]');
  let first = null;
  for (;;) {
    const st = await page.evaluate(() => ({ se: document.body.dataset.runningSe, state: document.body.dataset.runState }));
    if (first === null && st.se !== undefined) first = Date.now() - t0;
    if (st.state === 'done') break;
    if (st.state === 'error') throw new Error('the run failed');
    if (Date.now() - t0 > 300000) throw new Error('run did not finish');
    await new Promise((r) => setTimeout(r, 10));
  }
  const total = Date.now() - t0;
  const timings = JSON.parse(await page.evaluate(() => document.body.dataset.runTimings || '{}'));
  await context.close();
  return { first, total, timings };
}

const server = await startServer();
const browser = await launch();
const rows = [];
try {
  for (const model of models) {
    for (const w of counts) {
      const reps = [];
      for (let r = 0; r < REPS; r++) reps.push(await once(browser, server, model, w));
      const med = (k) => reps.map((x) => x[k]).sort((a, b) => a - b)[Math.floor(reps.length / 2)];
      // The breakdown of the run whose total is the median.
      const mid = reps.slice().sort((a, b) => a.total - b.total)[Math.floor(reps.length / 2)];
      rows.push({ model: model.name, workers: w, first: med('first'), total: med('total'), timings: mid.timings });
      console.log(rows[rows.length - 1]);
    }
  }
} finally {
  await browser.close();
  server.stop();
}
const date = new Date().toISOString().slice(0, 10);
const s = (ms) => (ms / 1000).toFixed(2) + ' s';
const lines = [
  '<!-- workers:start -->',
  '### Workers sharing a run',
  '',
  `Measured ${date} on ${all} cores (${os.cpus()[0]?.model || 'unknown CPU'}), headless Chromium, default settings `
    + `(8 chains), median of ${REPS} runs. The first worker searches for the modes once; the others take `
    + 'its modes and run their share of the chains; records cross as Float64Arrays. '
    + 'Rerun: `bash scripts/build-web.sh && npm ci && node scripts/bench-workers.mjs`.',
  '',
  '| model | workers | Run → first streamed estimate | Run → final result |',
  '|---|---|---|---|',
  ...rows.map((r) => `| ${r.model} | ${r.workers} | ${s(r.first)} | ${s(r.total)} |`),
  '',
  'Where the time went (the median run; the engine driver\'s own clock, `timings` in www/engine.js): starting the workers '
    + '(loading the WebAssembly module in each), the leader\'s mode search, the followers taking its modes, waiting for '
    + 'every worker\'s share of each step (the chains), waiting for every worker to absorb all records (what warm-up '
    + 'learns, repeated in each worker so that they stay identical), the estimates and independent checks after the last '
    + 'step (leader only), and fetching the result and draws.',
  '',
  '| model | workers | start | mode search | followers | steps (chains) | absorbs | estimates and checks | result | steps |',
  '|---|---|---|---|---|---|---|---|---|---|',
  ...rows.map((r) => {
    const t = r.timings || {};
    return `| ${r.model} | ${r.workers} | ${s(t.start || 0)} | ${s(t.search || 0)} | ${s(t.follow || 0)} | `
      + `${s(t.steps || 0)} | ${s(t.absorbs || 0)} | ${s(t.estimates || 0)} | ${s(t.finish || 0)} | ${t.stepCount || 0} |`;
  }),
  '<!-- workers:end -->',
];
const file = path.join(ROOT, 'BENCHMARKS.md');
let text = fs.readFileSync(file, 'utf8');
const block = lines.join('\n');
if (/<!-- workers:start -->[\s\S]*<!-- workers:end -->/.test(text)) {
  text = text.replace(/<!-- workers:start -->[\s\S]*<!-- workers:end -->/, block);
} else {
  text = text.replace('<!-- browser:end -->', '<!-- browser:end -->\n\n' + block);
}
fs.writeFileSync(file, text);
console.log(block);
