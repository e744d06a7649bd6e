// The page's workers share one run: the first worker searches for the modes and the others take
// them ('follow'), records cross between workers as Float64Arrays, and the result is the same
// bits with 1, 2 or 4 workers (the number the page starts is min(cores, chains); the test sets
// navigator.hardwareConcurrency before the page loads). It also checks that the page's numbers
// equal `kiln run`'s for the same settings.
import { test, before, after } from 'node:test';
import assert from 'node:assert/strict';
import fs from 'node:fs';
import path from 'node:path';
import { startServer, launch, openPage, kilnJson, ROOT, ARTIFACTS } from './harness.mjs';

let server;
let browser;
before(async () => { server = await startServer(); browser = await launch(); });
after(async () => { await browser?.close(); server?.stop(); });

const id = (name) => `[data-testid="${name}"]`;

async function runWith(workers) {
  const { page, context } = await openPage(browser);
  await page.addInitScript((n) => {
    Object.defineProperty(navigator, 'hardwareConcurrency', { get: () => n });
    // Record what the page asks of its workers (message types, and the kind of the records).
    window.__sent = [];
    const post = Worker.prototype.postMessage;
    Worker.prototype.postMessage = function (msg, transfer) {
      if (msg && msg.type) {
        window.__sent.push({ type: msg.type, all: msg.all ? Object.prototype.toString.call(msg.all) : null });
      }
      return post.call(this, msg, transfer);
    };
  }, workers);
  await page.goto(server.origin + '/#demo=default-two-modes.json');
  await page.waitForSelector('body[data-ready="true"]', { timeout: 30000 });
  await page.fill(id('seed-input'), '3');
  await page.fill(id('chains-input'), '4');
  await page.fill(id('draws-input'), '300');
  await page.fill(id('warmup-input'), '200');
  await page.click(id('run-button'));
  await page.waitForSelector('body[data-run-state="done"]', { timeout: 120000 });
  const [dl] = await Promise.all([page.waitForEvent('download'), page.click(id('download-json'))]);
  const file = path.join(ARTIFACTS, `workers-${workers}.json`);
  await dl.saveAs(file);
  const sent = await page.evaluate(() => window.__sent);
  const progress = await page.textContent(id('progress-text')).catch(() => '');
  await context.close();
  return { result: JSON.parse(fs.readFileSync(file, 'utf8')), sent, progress };
}

test('1, 2 and 4 workers give the same bits, with one mode search', async () => {
  const runs = {};
  for (const w of [1, 2, 4]) runs[w] = await runWith(w);
  for (const w of [1, 2, 4]) {
    const types = runs[w].sent.map((m) => m.type);
    assert.equal(types.filter((t) => t === 'session').length, 1, `${w} workers: one mode search`);
    assert.equal(types.filter((t) => t === 'follow').length, w - 1, `${w} workers: ${w - 1} followers`);
    assert.match(runs[w].progress, new RegExp(`· ${w} workers?$`), 'the page says how many workers ran');
    const absorbs = runs[w].sent.filter((m) => m.type === 'absorb');
    assert.ok(absorbs.length > 0 && absorbs.every((m) => m.all === '[object Float64Array]'),
      'records travel as typed arrays');
  }
  assert.deepEqual(runs[2].result, runs[1].result, '2 workers = 1 worker');
  assert.deepEqual(runs[4].result, runs[1].result, '4 workers = 1 worker');
  // And the same as the command line (an independent driver of the same session steps).
  const cli = await kilnJson(['run', path.join(ROOT, 'demo-targets', 'default-two-modes.json'), '--json',
    '--seed', '3', '--chains', '4', '--draws', '300', '--warmup', '200']);
  assert.equal(runs[4].result.log_z, cli.log_z);
  assert.equal(runs[4].result.log_z_se, cli.log_z_se);
  assert.deepEqual(runs[4].result.modes, cli.modes);
});
