// End-to-end tests of models as practitioners write them, in headless Chromium: a three-group
// model entered by hand (a vector unknown with a prior, an index column in pasted CSV, a
// built-in density), run and compared with `kiln run` on the same spec; the engine's CSV errors
// with row and column, the text kept; and the formula editor's function suggestions, used with
// the keyboard only.
import { test, before, after } from 'node:test';
import assert from 'node:assert/strict';
import fs from 'node:fs';
import path from 'node:path';
import { startServer, launch, openPage, shot, kilnJson, ARTIFACTS } from './harness.mjs';

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

async function ready(page) {
  await page.waitForSelector('body[data-ready="true"]', { timeout: 30000 });
}

/** Removes every unknown of the form, then adds `n` fresh rows. */
async function freshUnknowns(page, n) {
  while (await page.locator(id('unknown-remove')).count()) await page.locator(id('unknown-remove')).first().click();
  for (let i = 0; i < n; i++) await page.click(id('add-unknown'));
}

const CSV = 'yield,plot\n4.1,1\n3.8,1\n4.6,1\n5.9,2\n6.3,2\n5.5,2\n2.2,3\n2.9,3\n2.4,3\n';

test('a three-group model typed by hand runs, shows its elements and matches kiln run', async () => {
  const { page, errors } = await openPage(browser);
  await page.goto(server.origin + '/');
  await ready(page);
  await page.fill(id('title-input'), 'Three plots');
  await page.check('input[name=kind][value=log_density]');
  // The vector of plot means with its prior, and the noise sd with a bound and a prior.
  await freshUnknowns(page, 2);
  const names = page.locator(id('unknown-name'));
  await names.nth(0).fill('mu');
  await page.locator(id('unknown-size')).nth(0).fill('3');
  await page.locator(id('unknown-prior')).nth(0).fill('normal(4, 3)');
  await names.nth(1).fill('s');
  await page.locator(id('unknown-lower')).nth(1).fill('0');
  await page.locator(id('unknown-prior')).nth(1).fill('gamma(2, 2)');
  await page.fill(id('data-csv'), CSV);
  await page.fill(id('formula-editor'), 'sum(logd_normal(yield, mu[plot], s))');
  await page.fill(id('draws-input'), '500');
  await page.fill(id('warmup-input'), '400');
  // The data summary comes from the engine's reading of the CSV.
  await page.waitForFunction((sel) => /9 rows × 2 columns: yield, plot/.test(document.querySelector(sel)?.textContent || ''), id('data-summary'), { timeout: 20000 });
  // Check as you type names the elements.
  await page.waitForFunction((sel) => /mu\[3\]/.test(document.querySelector(sel)?.textContent || ''), id('check-modes'), { timeout: 30000 });
  await page.click(id('run-button'));
  await page.waitForSelector('body[data-run-state="done"]', { timeout: 120000 });
  await shot(page, '20-three-groups');
  const head = await page.textContent(id('mode-table'));
  for (const n of ['mu[1]', 'mu[2]', 'mu[3]', 's']) assert.ok(head.includes(n), `mode table shows ${n}`);
  const unknowns = await page.textContent(id('unknowns-summary'));
  assert.ok(unknowns.includes('mu[2]'), 'unknowns summary shows mu[2]');
  const picker = await page.$$eval(id('pair-x') + ' option', (os) => os.map((o) => o.textContent));
  assert.deepEqual(picker, ['mu[1]', 'mu[2]', 'mu[3]', 's']);
  // The spec the page runs, run by kiln on the command line: the same numbers.
  const [dl] = await Promise.all([page.waitForEvent('download'), page.click(id('download-spec-results'))]);
  const specFile = path.join(ARTIFACTS, 'three-plots.json');
  await dl.saveAs(specFile);
  const spec = JSON.parse(fs.readFileSync(specFile, 'utf8'));
  assert.equal(typeof spec.data, 'string', 'the data travels as CSV text');
  assert.deepEqual(spec.variables[0], { name: 'mu', size: 3, prior: 'normal(4, 3)' });
  const [dj] = await Promise.all([page.waitForEvent('download'), page.click(id('download-json'))]);
  const summaryFile = path.join(ARTIFACTS, 'three-plots-summary.json');
  await dj.saveAs(summaryFile);
  const summary = JSON.parse(fs.readFileSync(summaryFile, 'utf8'));
  const cli = await kilnJson(['run', specFile, '--json']);
  assert.equal(summary.log_z, cli.log_z);
  assert.deepEqual(summary.unknowns.map((u) => u.name), ['mu[1]', 'mu[2]', 'mu[3]', 's']);
  assert.equal(summary.unknowns[1].prior, 'normal(4, 3)');
  // The posterior means follow the plots' data (an ordering the data imply).
  const m = summary.mean;
  assert.ok(m[1] > m[0] && m[0] > m[2], `plot means ${m}`);
  assert.deepEqual(errors, []);
});

test('a bad cell and a bad index are reported with row and column, and the text stays', async () => {
  const { page } = await openPage(browser);
  await page.goto(server.origin + '/');
  await ready(page);
  await page.check('input[name=kind][value=log_density]');
  await freshUnknowns(page, 1);
  await page.fill(id('unknown-name'), 'mu');
  await page.fill(id('unknown-size'), '3');
  await page.fill(id('formula-editor'), 'sum(logd_normal(yield, mu[plot], 1)) + sum(k = 1..3, logd_normal(mu[k], 0, 5))');
  const bad = 'yield,plot\n4.1,1\n3.8,one\n';
  await page.fill(id('data-csv'), bad);
  await page.waitForFunction((sel) => /data row 2 \(line 3\), column `plot`: `one` is not a number/.test(document.querySelector(sel)?.textContent || ''), id('error-box'), { timeout: 20000 });
  const box = await page.textContent(id('error-box'));
  // The labelled record: where (part, line, column), the line itself and a marker under the fault.
  assert.match(box, /^where\s+data, line 3, column 5$/m);
  const lines = box.split('\n');
  const src = lines.findIndex((l) => l.trim() === '3.8,one');
  assert.ok(src > 0, box);
  assert.equal(lines[src + 1].indexOf('‾‾‾'), lines[src].indexOf('one'), 'the marker sits under `one`');
  assert.match(box, /^try\s+write numbers as in/m);
  assert.equal(await page.inputValue(id('data-csv')), bad, 'the text is kept');
  await page.fill(id('data-csv'), 'yield,plot\n4.1,1\n3.8,4\n');
  await page.waitForFunction((sel) => /data row 2, column `plot`: 4 is not an element of `mu`/.test(document.querySelector(sel)?.textContent || ''), id('error-box'), { timeout: 20000 });
  await shot(page, '21-bad-index');
});

test('function suggestions: typed, chosen with the arrow keys, inserted with Enter, closed with Escape', async () => {
  const { page } = await openPage(browser);
  await page.goto(server.origin + '/');
  await ready(page);
  const area = page.locator(id('formula-editor'));
  await area.fill('');
  await area.focus();
  await page.keyboard.type('logd_po');
  await page.waitForSelector(id('fn-suggest') + ':not([hidden])', { timeout: 10000 });
  const options = await page.$$eval(id('fn-list') + ' [role=option]', (os) => os.map((o) => o.dataset.name));
  assert.deepEqual(options, ['logd_poisson']);
  assert.match(await page.textContent(id('fn-detail')), /logd_poisson\(k, rate\)/);
  assert.equal(await area.getAttribute('aria-activedescendant'), 'fn-opt-0');
  await page.keyboard.press('Enter');
  assert.equal(await area.inputValue(), 'logd_poisson(');
  assert.equal(await page.isHidden(id('fn-suggest')), true);
  // Searching by description: "student" finds the Student-t density; ArrowDown moves on.
  await area.fill('');
  await page.keyboard.type('exp');
  await page.waitForSelector(id('fn-suggest') + ':not([hidden])');
  const exps = await page.$$eval(id('fn-list') + ' [role=option]', (os) => os.map((o) => o.dataset.name));
  assert.deepEqual(exps.slice(0, 2), ['exp', 'expm1']);
  assert.ok(exps.includes('logd_exponential'));
  await page.keyboard.press('ArrowDown');
  assert.equal(await page.getAttribute('#fn-opt-1', 'aria-selected'), 'true');
  assert.match(await page.textContent(id('fn-detail')), /expm1\(x\)/);
  await page.keyboard.press('Tab');
  assert.equal(await area.inputValue(), 'expm1(');
  await page.keyboard.type('1) + logd_nor');
  await page.waitForSelector(id('fn-suggest') + ':not([hidden])');
  await page.keyboard.press('Escape');
  assert.equal(await page.isHidden(id('fn-suggest')), true);
  assert.equal(await area.inputValue(), 'expm1(1) + logd_nor', 'Escape keeps the text');
  // Hovering a name shows it.
  await page.keyboard.press('Control+Space');
  await page.waitForSelector(id('fn-suggest') + ':not([hidden])');
  await page.hover('[data-name="logd_normal"]');
  assert.match(await page.textContent(id('fn-detail')), /logd_normal\(x, mean, sd\)/);
  await shot(page, '22-suggestions');
});
