// The results as a reader meets them, in headless Chromium: the verdict's headline and text
// are the engine's (`kiln run`), the warnings stand right under it and the notes are folded;
// a many-mode demo folds its tail into one row that opens; the layout at 390, 768 and 1280 px
// (element order, no horizontal scrolling, 44 px touch targets on a phone), with screenshots;
// the text colours on the page against WCAG 2.1 contrast, light and dark; and the comparison
// of model A with model B, judged and refused.
import { test, before, after } from 'node:test';
import assert from 'node:assert/strict';
import fs from 'node:fs';
import path from 'node:path';
import { startServer, launch, openPage, shot, kilnJson, ROOT, ARTIFACTS } from './harness.mjs';
import { fmtPM, fmtShare } from '../../www/format.js';
import { spawnSync } from 'node:child_process';

let server;
let browser;
before(async () => { server = await startServer(); browser = await launch(); });
after(async () => { await browser?.close(); server?.stop(); });

const id = (name) => `[data-testid="${name}"]`;
const demo = (file) => path.join(ROOT, 'demo-targets', file);

/** The kiln binary's text report. */
async function kilnText(args) {
  const r = spawnSync(path.join(ROOT, 'target', 'debug', 'kiln'), args, { encoding: 'utf8' });
  assert.equal(r.status, 0, r.stderr);
  return r.stdout;
}

async function ready(page) {
  await page.waitForSelector('body[data-ready="true"]', { timeout: 30000 });
}

async function run(page) {
  await page.click(id('run-button'));
  await page.waitForSelector('body[data-run-state="done"]', { timeout: 120000 });
}

async function box(page, sel) {
  const b = await page.locator(sel).first().boundingBox();
  assert.ok(b, `${sel} is laid out`);
  return b;
}

test('the verdict is the engine\'s, warnings stand under it and the notes are folded', async () => {
  const cli = await kilnJson(['run', demo('default-two-modes.json'), '--json']);
  const { page, context, errors } = await openPage(browser);
  await page.goto(server.origin + '/#demo=default-two-modes.json');
  await ready(page);
  await run(page);
  // Headline and text: the engine's, word for word, and they do not contradict each other.
  assert.equal(await page.getAttribute(id('verdict'), 'data-state'), cli.verdict.state);
  assert.equal((await page.textContent(id('verdict-headline'))).trim(), cli.verdict.headline);
  const sentence = (await page.textContent(id('verdict-sentence'))).trim();
  assert.equal(sentence, cli.verdict.sentence.charAt(0).toUpperCase() + cli.verdict.sentence.slice(1));
  assert.equal(cli.verdict.state, 'agree');
  assert.ok(/agree/i.test(cli.verdict.headline) && !/disagree/i.test(sentence), sentence);
  // The card of what to act on comes right after the verdict, before the log Z card.
  const order = await page.$$eval('#results > *:not([hidden])', (els) => els.map((e) => e.id || e.className));
  const v = order.indexOf('verdict');
  assert.ok(v >= 0 && order[v + 1] === 'act-card', order.join(' | '));
  const vb = await box(page, id('verdict'));
  const ab = await box(page, id('act-card'));
  const lb = await box(page, '#logz-heading');
  assert.ok(vb.y + vb.height <= ab.y && ab.y < lb.y, 'verdict, then warnings, then log Z');
  // Warnings: as many as the engine's, or the sentence that there are none.
  const shownWarnings = await page.locator(id('warnings') + ' li.warning').count();
  assert.equal(shownWarnings, cli.warnings.length);
  if (!cli.warnings.length) assert.ok(await page.isVisible(id('no-warnings')));
  // Notes: all of them, each with its code, inside a closed fold.
  assert.ok(cli.notes.length > 0, 'the demo has notes to fold');
  assert.equal(await page.$eval(id('notes'), (d) => d.tagName + ':' + d.open), 'DETAILS:false');
  assert.equal(await page.isVisible(id('notes-list')), false, 'the notes are folded');
  assert.match(await page.textContent(id('notes-summary')), new RegExp(`\\(${cli.notes.length} notes?\\)`));
  const codes = await page.$$eval(id('notes-list') + ' li', (li) => li.map((l) => l.dataset.code));
  assert.deepEqual(codes, cli.notes.map((n) => n.code));
  await page.click(id('notes-summary'));
  assert.ok(await page.isVisible(id('notes-list')), 'the fold opens');
  // The unknowns summary: the engine's layout, the level stated.
  const heads = await page.$$eval(id('unknowns-summary') + ' thead th', (th) => th.map((t) => t.textContent));
  assert.deepEqual(heads, ['unknown', 'median', '90 % interval', 'mean ± sd', 'R-hat', 'effective draws']);
  assert.match(await page.textContent(id('unknowns-caption')), /central 90 % of the mass/);
  // The mode-coverage figures are the mode table's caption.
  assert.match(await page.textContent(id('modes-caption')), /Good–Turing/);
  // Plain words in the meta line, the new names.
  const meta = await page.textContent(id('report-meta'));
  assert.match(meta, /acceptance goal 0\.8/);
  assert.ok(meta.includes(cli.energy_evaluations.toLocaleString('en-US') + ' energy evaluations'), meta);
  assert.deepEqual(errors, []);
  // The README's picture of the results (docs/results-1280.png is a copy of it).
  await page.click(id('notes-summary'));
  await page.evaluate(() => { window.scrollTo(0, 0); });
  await page.screenshot({ path: path.join(ARTIFACTS, 'readme-results-1280.png') });
  await context.close();
});

test('a comb of many modes folds its tail into one row that opens', async () => {
  const cli = await kilnJson(['run', demo('ultrasonic-phase-range-comb.json'), '--json']);
  const t = cli.mode_table;
  assert.ok(t.folded.length >= 2, 'the demo has a tail to fold');
  const { page, context } = await openPage(browser);
  await page.goto(server.origin + '/#demo=ultrasonic-phase-range-comb.json');
  await ready(page);
  // Before a run, the check under the editor orders its modes by Laplace mass and folds the tail too.
  const check = await kilnJson(['check', demo('ultrasonic-phase-range-comb.json'), '--json']);
  assert.ok(check.mode_table.folded.length >= 2, 'the check folds a tail');
  await page.waitForSelector(id('check-folded'), { timeout: 30000 });
  assert.equal((await page.textContent(id('check-folded'))).trim(),
    `… ${check.mode_table.folded.length} more modes, ${fmtShare(check.mode_table.folded_mass)} of the Laplace mass together (listed in the results).`);
  const checkRows = await page.$$eval(id('check-modes') + ' tbody tr td:first-child', (td) => td.map((t) => Number(t.textContent.replace(/\D/g, ''))));
  assert.deepEqual(checkRows, check.mode_table.shown.slice(0, 30));
  await run(page);
  const rows = page.locator(id('mode-table') + ' tbody tr');
  // The rows shown, in the engine's order (largest mass first), then the folded row.
  const shown = await page.$$eval(id('mode-table') + ' tbody tr:not(.folded):not(.fold-row) th', (th) => th.map((h) => Number(h.textContent.replace(/\D/g, ''))));
  assert.deepEqual(shown, t.shown);
  const fold = page.locator(id('fold-row'));
  assert.equal(await fold.count(), 1);
  // The folded row's words are the command line's, word for word.
  const words = (await fold.textContent()).trim();
  assert.match(words, new RegExp(`^${t.folded.length} more modes, ${fmtShare(t.folded_mass).replace('.', '\\.')} together`));
  const text = await kilnText(['run', demo('ultrasonic-phase-range-comb.json')]);
  assert.ok(text.includes('… ' + words + ' (modes '), `${words} in\n${text}`);
  assert.equal(await page.locator(id('folded-mode') + ':visible').count(), 0, 'folded rows are hidden');
  await shot(page, '30-comb-folded');
  await page.click(id('fold-toggle'));
  assert.equal(await page.getAttribute(id('fold-toggle'), 'aria-expanded'), 'true');
  assert.equal(await page.locator(id('folded-mode') + ':visible').count(), t.folded.length);
  assert.equal(await rows.count(), t.shown.length + 1 + t.folded.length);
  await context.close();
});

// Every control a finger can press, at 390 px.
const CONTROLS = 'button, select, input:not([type=file]):not([type=radio]):not([type=checkbox]), summary, label.radio';

for (const width of [390, 768, 1280]) {
  test(`layout at ${width} px: order, no horizontal scrolling${width === 390 ? ', 44 px touch targets' : ''}`, async () => {
    const context = await browser.newContext({ viewport: { width, height: 900 }, deviceScaleFactor: 1 });
    const page = await context.newPage();
    await page.goto(server.origin + '/#demo=ultrasonic-phase-range-comb.json');
    await ready(page);
    await run(page);
    const bar = await box(page, '.topbar');
    const tools = [];
    for (const t of ['demo-select', 'open-spec', 'download-spec', 'share-button']) tools.push(await box(page, id(t)));
    const model = await box(page, '.model-pane');
    const results = await box(page, '#results');
    for (const t of tools) assert.ok(t.y >= bar.y && t.y + t.height <= bar.y + bar.height + 0.5, 'the tools are in the top bar');
    if (width < 980) {
      // One column: the tool bar, then the model, then the results.
      assert.ok(bar.y + bar.height <= model.y + 0.5, `tool bar (${bar.y}+${bar.height}) above the model (${model.y})`);
      assert.ok(model.y + model.height <= results.y + 0.5, `model (${model.y}+${model.height}) above the results (${results.y})`);
      for (const t of tools) assert.ok(t.y + t.height <= model.y, 'every tool above the model');
    } else {
      assert.ok(bar.y + bar.height <= model.y + 0.5 && bar.y + bar.height <= results.y + 0.5, 'tool bar on top');
      assert.ok(model.x + model.width <= results.x + 0.5, 'model to the left of the results');
      // Scrolled, the sticky top bar, model pane and run bar do not overlap: the bar is one row.
      await page.evaluate(() => window.scrollTo(0, 1500));
      const barNow = await box(page, '.topbar');
      const modelNow = await box(page, '.model-pane');
      const runBar = await box(page, '.run-bar');
      assert.ok(barNow.y + barNow.height <= modelNow.y + 0.5 && barNow.y + barNow.height <= runBar.y + 0.5,
        `top bar ${JSON.stringify(barNow)}, model ${JSON.stringify(modelNow)}, run bar ${JSON.stringify(runBar)}`);
      await page.evaluate(() => window.scrollTo(0, 0));
    }
    // No horizontal scrolling.
    const widths = await page.evaluate(() => ({ doc: document.documentElement.scrollWidth, body: document.body.scrollWidth, view: window.innerWidth }));
    assert.ok(widths.doc <= widths.view && widths.body <= widths.view, JSON.stringify(widths));
    if (width === 390) {
      const small = await page.$$eval(CONTROLS, (els) => els.filter((e) => {
        const r = e.getBoundingClientRect();
        const s = getComputedStyle(e);
        return r.width > 0 && r.height > 0 && s.visibility !== 'hidden' && !e.closest('.visually-hidden, [hidden], .print-only');
      }).map((e) => ({ what: e.tagName + (e.dataset.testid ? '#' + e.dataset.testid : e.id ? '#' + e.id : '') + ' "' + e.textContent.trim().slice(0, 20) + '"', h: e.getBoundingClientRect().height }))
        .filter((c) => c.h < 44));
      assert.deepEqual(small, [], 'controls under 44 px high at 390 px');
    }
    await page.screenshot({ path: path.join(ARTIFACTS, `layout-${width}.png`), fullPage: true });
    // The README's picture of a phone (docs/phone-390.png is a copy of it).
    if (width === 390) await page.screenshot({ path: path.join(ARTIFACTS, 'readme-phone-390.png') });
    await context.close();
  });
}

// The text of every element on the page against the background it is drawn on (the nearest
// ancestor with an opaque background), by WCAG 2.1's relative luminance and contrast ratio:
// at least 4.5:1, 3:1 for large text (24 px, or 18.66 px bold). Disabled controls are exempt
// (as the standard makes them).
function measureContrast() {
  function parse(c) {
    const m = /rgba?\(([^)]+)\)/.exec(c);
    if (!m) return null;
    const p = m[1].split(/[\s,/]+/).filter(Boolean).map(Number);
    return { r: p[0], g: p[1], b: p[2], a: p.length > 3 ? p[3] : 1 };
  }
  function lum(c) {
    const f = (v) => { v /= 255; return v <= 0.03928 ? v / 12.92 : ((v + 0.055) / 1.055) ** 2.4; };
    return 0.2126 * f(c.r) + 0.7152 * f(c.g) + 0.0722 * f(c.b);
  }
  function over(top, under) {
    const a = top.a;
    return { r: top.r * a + under.r * (1 - a), g: top.g * a + under.g * (1 - a), b: top.b * a + under.b * (1 - a), a: 1 };
  }
  function background(el) {
    const layers = [];
    for (let e = el; e; e = e.parentElement) {
      const c = parse(getComputedStyle(e).backgroundColor);
      if (c && c.a > 0) { layers.push(c); if (c.a >= 1) break; }
    }
    let bg = { r: 255, g: 255, b: 255, a: 1 };
    for (let i = layers.length - 1; i >= 0; i--) bg = over(layers[i], bg);
    return bg;
  }
  const out = [];
  let measured = 0;
  const walker = document.createTreeWalker(document.body, NodeFilter.SHOW_TEXT);
  const seen = new Set();
  for (let n = walker.nextNode(); n; n = walker.nextNode()) {
    const el = n.parentElement;
    if (!el || seen.has(el) || !n.textContent.trim()) continue;
    seen.add(el);
    const r = el.getBoundingClientRect();
    const s = getComputedStyle(el);
    if (r.width === 0 || r.height === 0 || s.visibility === 'hidden' || el.closest('[hidden], .visually-hidden, option, script, style, .print-only, canvas')) continue;
    if (el.closest(':disabled, [aria-disabled=true]')) continue;
    let fg = parse(s.color);
    let opacity = 1;
    for (let e = el; e; e = e.parentElement) opacity *= Number(getComputedStyle(e).opacity);
    const bg = background(el);
    fg = over({ ...fg, a: fg.a * opacity }, bg);
    const [l1, l2] = [lum(fg), lum(bg)].sort((a, b) => b - a);
    const ratio = (l1 + 0.05) / (l2 + 0.05);
    const size = parseFloat(s.fontSize);
    const large = size >= 24 || (size >= 18.66 && Number(s.fontWeight) >= 700);
    measured++;
    if (ratio < (large ? 3 : 4.5)) out.push(`${el.tagName}.${el.className} "${n.textContent.trim().slice(0, 30)}" ${s.color} on ${JSON.stringify(bg)}: ${ratio.toFixed(2)}`);
  }
  return { measured, failures: out };
}

for (const scheme of ['light', 'dark']) {
  test(`every text on the page has WCAG 2.1 AA contrast (${scheme} scheme)`, async () => {
    const context = await browser.newContext({ viewport: { width: 1280, height: 900 }, colorScheme: scheme });
    const page = await context.newPage();
    await page.goto(server.origin + '/#demo=ultrasonic-phase-range-comb.json');
    await ready(page);
    await run(page);
    // Open what folds, so that its text is measured too.
    await page.click(id('fold-toggle'));
    await page.click(id('notes-summary'));
    for (const d of await page.$$('details')) await d.evaluate((e) => { e.open = true; });
    const dark = await page.evaluate(() => matchMedia('(prefers-color-scheme: dark)').matches);
    assert.equal(dark, scheme === 'dark');
    const res = await page.evaluate(measureContrast);
    assert.ok(res.measured > 100, `measured ${res.measured} texts`);
    assert.deepEqual(res.failures, []);
    await page.screenshot({ path: path.join(ARTIFACTS, `scheme-${scheme}.png`), fullPage: false });
    await context.close();
  });
}

/** Model B as a copy of A with seed 9, then both run. */
async function runAandB(page) {
  await page.click(id('slot-b'));
  await page.click(id('b-copy'));
  await page.fill(id('seed-input'), '9');
  await page.click(id('run-both-button'));
  await page.waitForFunction(() => {
    const c = document.querySelector('[data-testid="compare-card"]');
    return c && (c.querySelector('[data-testid="bayes-factor-meaning"]') || c.querySelector('[data-testid="bayes-factor-refused"]'));
  }, null, { timeout: 240000 });
}

async function summaryOf(page, slot) {
  await page.click(id(slot));
  const [dl] = await Promise.all([page.waitForEvent('download'), page.click(id('download-json'))]);
  const file = path.join(ARTIFACTS, `compare-${slot}.json`);
  await dl.saveAs(file);
  return JSON.parse(fs.readFileSync(file, 'utf8'));
}

test('A versus B: the same model twice gives a log Bayes factor near 0, judged, with both verdicts', async () => {
  const { page, context } = await openPage(browser);
  await page.goto(server.origin + '/#demo=crystal-sensor-two-temperatures.json');
  await ready(page);
  await runAandB(page);
  const card = id('compare-card');
  await shot(page, '31-compare-judged');
  const a = await summaryOf(page, 'slot-a');
  const b = await summaryOf(page, 'slot-b');
  assert.equal(a.verdict.state, 'agree');
  assert.equal(b.verdict.state, 'agree');
  // log(Z_A / Z_B) ± √(SE_A² + SE_B²) from the two summaries.
  const lbf = a.log_z - b.log_z;
  const se = Math.hypot(a.log_z_se, b.log_z_se);
  assert.equal((await page.textContent(id('bayes-factor'))).trim(), fmtPM(lbf, se));
  // Exact identity: both are the same model, so the true log Bayes factor is 0.
  assert.ok(Math.abs(lbf) <= 4 * se, `log BF ${lbf} ± ${se} for one model against itself`);
  assert.match(await page.textContent(id('bayes-factor-meaning')), /about equally well/);
  // Both runs' verdicts and mode-search figures.
  for (const s of ['A', 'B']) {
    assert.equal(await page.getAttribute(id('compare-verdict-' + s), 'data-state'), 'agree');
    assert.match(await page.textContent(id('compare-coverage-' + s)), /starts ended in 2 distinct modes/);
  }
  assert.equal(await page.locator(card + ' ' + id('bayes-factor-refused')).count(), 0);
  await context.close();
});

test('A versus B: refused, with the reason, when a verdict is not "agree"', async () => {
  // A heavy-tailed bump in three unknowns, density (1 + r²)^-2, whose log Z is log π² exactly
  // (∫ 4π r² (1 + r²)^-2 dr = π²): no grid in 3-D, and the importance weights have an infinite
  // variance (Pareto k̂ above 0.5), so no independent check can vote and the verdict is "not
  // enough evidence". Every demo agrees, so the test brings its own model.
  const spec = {
    title: 'A heavy-tailed bump in three unknowns',
    variables: [{ name: 'x' }, { name: 'y' }, { name: 'z' }],
    energy: '2 * log(1 + x^2 + y^2 + z^2)',
    settings: { seed: 4, draws: 600, warmup: 400 },
  };
  const file = path.join(ARTIFACTS, 'heavy-bump-spec.json');
  fs.writeFileSync(file, JSON.stringify(spec));
  const cli = await kilnJson(['run', file, '--json']);
  assert.notEqual(cli.verdict.state, 'agree', 'a model whose verdict is not agree');
  const { page, context } = await openPage(browser);
  await page.goto(server.origin + '/');
  await ready(page);
  await page.setInputFiles(id('open-spec-file'), file);
  await page.waitForFunction((t) => document.body.textContent.includes(t), spec.title);
  await runAandB(page);
  await shot(page, '32-compare-refused');
  // The reason names every side whose verdict is not "agree", by what its verdict says.
  const states = {};
  for (const s of ['A', 'B']) states[s] = await page.getAttribute(id('compare-verdict-' + s), 'data-state');
  assert.equal(states.A, cli.verdict.state, 'model A is the spec with its own seed');
  const why = { not_enough_evidence: "log Z has no independent check", disagree: 'cross-checks disagree' };
  const reasons = ['A', 'B'].filter((s) => states[s] !== 'agree').map((s) => `${s}'s ${why[states[s]]}`);
  const refused = await page.textContent(id('bayes-factor-refused'));
  assert.equal(refused, `Not to be used: ${reasons.join(' and ')}: resolve that before comparing the models.`);
  assert.equal(await page.locator(id('bayes-factor-meaning')).count(), 0, 'no reading of a refused number');
  await context.close();
});
