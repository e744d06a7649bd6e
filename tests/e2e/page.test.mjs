// End-to-end tests of the page in headless Chromium: the default demo, errors, sharing,
// downloads, the single-file page, privacy (no request leaves the page, none after load) and
// markup in user text. Screenshots of the main states go to test-artifacts/.
import { test, before, after } from 'node:test';
import assert from 'node:assert/strict';
import fs from 'node:fs';
import path from 'node:path';
import { startServer, launch, openPage, shot, kilnJson, ROOT, ARTIFACTS } from './harness.mjs';

let server;
let browser;

before(async () => {
  server = await startServer();
  browser = await launch();
});

after(async () => {
  await browser?.close();
  server?.stop();
});

const id = (name) => `[data-testid="${name}"]`;

/** Waits until the page says it has loaded everything it will ever load. */
async function ready(page) {
  await page.waitForSelector('body[data-ready="true"]', { timeout: 30000 });
}

/** Clicks Run and waits for the log Z card. */
async function runAndWait(page) {
  await page.click(id('run-button'));
  await page.waitForFunction(
    (sel) => { const el = document.querySelector(sel); return el && /-?\d+\.\d+/.test(el.textContent); },
    id('logz-value'), { timeout: 120000 });
  await page.waitForSelector('body[data-run-state="done"]', { timeout: 120000 });
}

/** Starts model B as a copy of A, titled 'Second opinion' with seed 9 (left on tab B). */
async function startSecondOpinion(page) {
  await page.click(id('slot-b'));
  await page.click(id('b-copy'));
  await page.fill(id('title-input'), 'Second opinion');
  await page.fill(id('seed-input'), '9');
}

async function download(page, testid) {
  const [dl] = await Promise.all([page.waitForEvent('download'), page.click(id(testid))]);
  const file = path.join(ARTIFACTS, dl.suggestedFilename());
  await dl.saveAs(file);
  return file;
}

test('the default demo runs and matches kiln run and the grid check', async () => {
  const { page, context, requests, errors } = await openPage(browser);
  await page.goto(server.origin + '/#demo=default-two-modes.json');
  await ready(page);
  await shot(page, '01-loaded');
  const loadedRequests = requests.length;
  await runAndWait(page);
  await shot(page, '02-results');
  const summary = JSON.parse(fs.readFileSync(await download(page, 'download-json'), 'utf8'));
  const s = summary.settings;
  const cli = await kilnJson(['run', path.join(ROOT, 'demo-targets', 'default-two-modes.json'), '--json',
    '--seed', String(s.seed), '--chains', String(s.chains), '--draws', String(s.draws),
    '--warmup', String(s.warmup), '--method', s.method, '--integrator', s.integrator]);
  assert.equal(summary.log_z, cli.log_z, 'the page and kiln run give the same log Z');
  assert.equal(summary.log_z_se, cli.log_z_se);
  assert.deepEqual(summary.modes, cli.modes);
  // Outside reference: scipy's log Z of this demo (tests/reference/beacon.py, accurate to 1e-6),
  // held to a fixed bound, not to the run's own SE (which is about 0.01 at the page's defaults).
  const ref = JSON.parse(fs.readFileSync(path.join(ROOT, 'tests', 'reference', 'beacon_values.json'), 'utf8'));
  console.log(`# page log Z ${summary.log_z} ± ${summary.log_z_se}, grid ${summary.grid_log_z}, scipy ${ref.log_z}`);
  assert.ok(Math.abs(summary.log_z - ref.log_z) < 0.05, `log Z ${summary.log_z} vs scipy ${ref.log_z}`);
  assert.ok(summary.log_z_se > 0 && summary.log_z_se < 0.05, `SE ${summary.log_z_se}`);
  assert.ok(Math.abs(summary.grid_log_z - ref.log_z) < 2e-3, `grid ${summary.grid_log_z} vs scipy ${ref.log_z}`);
  // The shown value is the summary's, as numbers: "v ± se", both rounded to the decimals that
  // give the SE two significant digits.
  const shown = await page.textContent(id('logz-value'));
  const m = /^(-?\d+\.(\d+)) ± (\d+\.\d+)$/.exec(shown.trim());
  assert.ok(m, `shown ${shown}`);
  const decimals = m[2].length;
  assert.equal(decimals, Math.max(0, 1 - Math.floor(Math.log10(summary.log_z_se))), `decimals of ${shown}`);
  assert.ok(Math.abs(Number(m[1]) - summary.log_z) <= 0.5 * 10 ** -decimals + 1e-12, `shown ${shown} vs ${summary.log_z}`);
  assert.ok(Math.abs(Number(m[3]) - summary.log_z_se) <= 0.5 * 10 ** -decimals + 1e-12, `shown ${shown} vs SE ${summary.log_z_se}`);
  // Nothing left the origin, and nothing at all was fetched after loading.
  for (const r of requests) {
    assert.ok(r.url.startsWith(server.origin) || r.url.startsWith('blob:') || r.url.startsWith('data:'), r.url);
  }
  const late = requests.slice(loadedRequests).filter((r) => !r.url.startsWith('blob:') && !r.url.startsWith('data:'));
  assert.deepEqual(late.map((r) => r.url), [], 'requests after load');
  assert.deepEqual(errors, []);
  await context.close();
});

test('a bad formula shows the caret error and keeps the text', async () => {
  const { page, context } = await openPage(browser);
  await page.goto(server.origin + '/#demo=default-two-modes.json');
  await ready(page);
  const bad = 'lgama(x) + y^2';
  await page.fill(id('formula-editor'), bad);
  await page.waitForFunction((sel) => /\^/.test(document.querySelector(sel)?.textContent || ''), id('error-box'), { timeout: 20000 });
  const text = await page.textContent(id('error-box'));
  assert.match(text, /unknown function `lgama`/);
  assert.match(text, /did you mean `lgamma`/);
  // The labelled record: the problem, where, the line with a marker under the fault, what to try.
  assert.match(text, /^problem\s+unknown function `lgama`$/m);
  assert.match(text, /^where\s+energy, line 1, column 1$/m);
  const lines = text.split('\n');
  const src = lines.findIndex((l) => l.trim() === bad);
  assert.ok(src > 0, text);
  assert.equal(lines[src + 1].trimEnd(), ' '.repeat(lines[src].indexOf('lgama')) + '‾'.repeat(5), 'the marker sits under `lgama`');
  assert.match(text, /^try\s+did you mean `lgamma`\?$/m);
  await shot(page, '03-formula-error');
  assert.equal(await page.inputValue(id('formula-editor')), bad);
  // The text survives a reload (kept in the page's local storage).
  await page.goto(server.origin + '/');
  await ready(page);
  assert.equal(await page.inputValue(id('formula-editor')), bad);
  await context.close();
});

test('a share link restores the spec and settings', async () => {
  const { page, context } = await openPage(browser);
  await page.goto(server.origin + '/#demo=crystal-sensor-two-temperatures.json');
  await ready(page);
  await page.fill(id('seed-input'), '7');
  await page.click(id('share-button'));
  await page.waitForFunction((sel) => { const el = document.querySelector(sel); return el && /#spec=/.test(el.value || el.textContent); }, id('share-link'));
  const link = await page.$eval(id('share-link'), (el) => el.value || el.textContent);
  const formula = await page.inputValue(id('formula-editor'));
  const title = await page.inputValue(id('title-input'));
  const other = await openPage(browser);
  await other.page.goto(link.trim());
  await ready(other.page);
  assert.equal(await other.page.inputValue(id('formula-editor')), formula);
  assert.equal(await other.page.inputValue(id('title-input')), title);
  assert.equal(await other.page.inputValue(id('seed-input')), '7');
  await other.context.close();
  await context.close();
});

test('a share link carries both models of a comparison, and names a bad model B', async () => {
  const { page, context } = await openPage(browser);
  await page.goto(server.origin + '/#demo=default-two-modes.json');
  await ready(page);
  const titleA = await page.inputValue(id('title-input'));
  await startSecondOpinion(page);
  await page.click(id('share-button'));
  await page.waitForFunction((sel) => { const el = document.querySelector(sel); return el && /#spec=/.test(el.value || el.textContent); }, id('share-link'));
  const link = (await page.$eval(id('share-link'), (el) => el.value || el.textContent)).trim();
  const other = await openPage(browser);
  await other.page.goto(link);
  await ready(other.page);
  assert.equal(await other.page.inputValue(id('title-input')), titleA);
  assert.equal(await other.page.isHidden(id('compare-card')), false, 'the comparison card shows');
  await other.page.click(id('slot-b'));
  assert.ok(await other.page.isVisible(id('title-input')), 'model B is there, not an empty slot');
  assert.equal(await other.page.inputValue(id('title-input')), 'Second opinion');
  assert.equal(await other.page.inputValue(id('seed-input')), '9');
  await other.context.close();
  // A link whose model B is malformed is refused with a message naming model B.
  const good = { variables: [{ name: 'x' }], energy: 'x^2/2' };
  const payload = JSON.stringify({ spec: good, b: { spec: good, settings: { seed: -1 } } });
  const zlib = await import('node:zlib');
  const bad = server.origin + '/#spec=' + zlib.deflateRawSync(Buffer.from(payload)).toString('base64url');
  const third = await openPage(browser);
  await third.page.goto(bad);
  await ready(third.page);
  const msg = await third.page.textContent(id('share-error'));
  assert.match(msg, /model B: `seed` must be a whole number/);
  await third.context.close();
  await context.close();
});

test('the draws CSV parses with the right header and row count', async () => {
  const { page, context } = await openPage(browser);
  await page.goto(server.origin + '/#demo=default-two-modes.json');
  await ready(page);
  await page.fill(id('draws-input'), '500');
  await page.fill(id('chains-input'), '2');
  await runAndWait(page);
  const csv = fs.readFileSync(await download(page, 'download-csv'), 'utf8');
  const lines = csv.split('\r\n').filter((l) => l.length > 0);
  assert.equal(lines[0], 'x,y,beta,weight,chain,iteration,mode');
  assert.equal(lines.length - 1, 2 * 500);
  for (const l of lines.slice(1, 20)) assert.equal(l.split(',').length, 7);
  await context.close();
});

test('the single-file page runs from file:// with no network', async () => {
  const { page, context } = await openPage(browser);
  await page.goto(server.origin + '/#demo=default-two-modes.json');
  await ready(page);
  await page.fill(id('draws-input'), '400');
  const file = await download(page, 'save-single');
  await context.close();
  const single = await openPage(browser);
  await single.page.goto('file://' + file);
  await ready(single.page);
  await runAndWait(single.page);
  await shot(single.page, '04-single-file');
  for (const r of single.requests) {
    assert.ok(/^(file|blob|data):/.test(r.url), 'the single page fetched ' + r.url);
  }
  assert.match(await single.page.textContent(id('logz-value')), /-?\d+\.\d+/);
  assert.equal(await single.page.inputValue(id('draws-input')), '400');
  await single.context.close();
});

test('the single-file page keeps both models of a comparison', async () => {
  const { page, context } = await openPage(browser);
  await page.goto(server.origin + '/#demo=default-two-modes.json');
  await ready(page);
  await page.fill(id('draws-input'), '400');
  const titleA = await page.inputValue(id('title-input'));
  await startSecondOpinion(page);
  const file = await download(page, 'save-single');
  await context.close();
  const single = await openPage(browser);
  await single.page.goto('file://' + file);
  await ready(single.page);
  assert.equal(await single.page.inputValue(id('draws-input')), '400');
  assert.equal(await single.page.inputValue(id('title-input')), titleA);
  await single.page.click(id('slot-b'));
  assert.ok(await single.page.isVisible(id('title-input')), 'model B is there, not an empty slot');
  assert.equal(await single.page.inputValue(id('title-input')), 'Second opinion');
  assert.equal(await single.page.inputValue(id('seed-input')), '9');
  await single.context.close();
});

test('markup in every string field renders as text', async () => {
  const payload = '<img src=x onerror="window.__pwned=1"><script>window.__pwned=2</script>';
  const spec = {
    title: 'Title ' + payload,
    notes: 'Notes ' + payload,
    variables: [{ name: 'x' }],
    energy: '0.5*x^2 # ' + payload,
  };
  const { page, context } = await openPage(browser);
  let dialogs = 0;
  page.on('dialog', (d) => { dialogs++; d.dismiss(); });
  // Through a spec file.
  const specFile = path.join(ARTIFACTS, 'payload-spec.json');
  fs.writeFileSync(specFile, JSON.stringify(spec));
  await page.goto(server.origin + '/');
  await ready(page);
  await page.setInputFiles(id('open-spec-file'), specFile);
  await page.waitForFunction((t) => document.body.textContent.includes(t), 'Title <img src=x');
  await runAndWait(page);
  await shot(page, '05-markup-as-text');
  assert.equal(await page.evaluate(() => window.__pwned), undefined);
  assert.equal(await page.$$eval('img[src="x"]', (els) => els.length), 0);
  assert.equal(dialogs, 0);
  // Through a name that is not allowed: the error names it as text.
  const badName = { variables: [{ name: '<b>x</b>' }], energy: 'x^2' };
  fs.writeFileSync(specFile, JSON.stringify(badName));
  await page.setInputFiles(id('open-spec-file'), specFile);
  await page.waitForFunction((sel) => (document.querySelector(sel)?.textContent || '').includes('<b>x</b>'), id('error-box'), { timeout: 20000 });
  assert.equal(await page.$$eval('b', (els) => els.filter((e) => e.textContent === 'x').length), 0);
  await context.close();
});

test('Cancel stops a run within 100 ms and the page stays usable', async () => {
  const { page, context } = await openPage(browser);
  await page.goto(server.origin + '/#demo=default-two-modes.json');
  await ready(page);
  await page.fill(id('draws-input'), '200000');
  await page.click(id('run-button'));
  await page.waitForFunction(() => document.body.dataset.runState === 'running' && document.body.dataset.runningSe !== undefined, null, { timeout: 60000 });
  const took = await page.evaluate(async () => {
    const t0 = performance.now();
    document.querySelector('[data-testid="cancel-button"]').click();
    while (document.body.dataset.runState === 'running') await new Promise((r) => setTimeout(r, 1));
    return { ms: performance.now() - t0, state: document.body.dataset.runState };
  });
  assert.equal(took.state, 'cancelled');
  assert.ok(took.ms < 100, `cancel took ${took.ms} ms`);
  await shot(page, '06-cancelled');
  // The page answers at once afterwards: a new run can start.
  await page.fill(id('draws-input'), '300');
  await runAndWait(page);
  await context.close();
});

test('a single-file page saves itself again as a single page that still works', async () => {
  const { page, context } = await openPage(browser);
  await page.goto(server.origin + '/#demo=default-two-modes.json');
  await ready(page);
  await page.fill(id('draws-input'), '300');
  const first = await download(page, 'save-single');
  await context.close();
  const single = await openPage(browser);
  await single.page.goto('file://' + first);
  await ready(single.page);
  await single.page.fill(id('title-input'), 'Saved twice');
  // The second save bundles the page's modules from the copies embedded in the first.
  const [dl] = await Promise.all([single.page.waitForEvent('download'), single.page.click(id('save-single'))]);
  const second = path.join(ARTIFACTS, 'saved-twice.html');
  await dl.saveAs(second);
  await single.context.close();
  const again = await openPage(browser);
  await again.page.goto('file://' + second);
  await ready(again.page);
  assert.equal(await again.page.inputValue(id('title-input')), 'Saved twice');
  assert.equal(await again.page.inputValue(id('draws-input')), '300');
  await runAndWait(again.page);
  for (const r of again.requests) assert.ok(/^(file|blob|data):/.test(r.url), 'the page saved twice fetched ' + r.url);
  assert.deepEqual(again.errors, []);
  await again.context.close();
});
