// Browser benchmark (not a test): on the default 2-D demo in headless Chromium, the time from
// pressing Run until the running log Z has SE ≤ 0.02, the total run time, and how long the main
// thread was ever blocked during the run (longest long task, and the longest gap between timer
// ticks). Writes the figures into the browser section of BENCHMARKS.md.
//   node scripts/bench-browser.mjs          (after scripts/build-web.sh and npm ci)
import fs from 'node:fs';
import os from 'node:os';
import path from 'node:path';
import { startServer, launch, openPage, ROOT } from '../tests/e2e/harness.mjs';

const server = await startServer();
const browser = await launch();
const rows = [];
try {
  for (let rep = 0; rep < 3; rep++) {
    const { page, context } = await openPage(browser);
    await page.addInitScript(() => {
      window.__longest = 0;
      window.__gap = 0;
      try {
        new PerformanceObserver((list) => {
          for (const e of list.getEntries()) window.__longest = Math.max(window.__longest, e.duration);
        }).observe({ type: 'longtask', buffered: true });
      } catch (e) { /* long tasks not supported */ }
    });
    await page.goto(server.origin + '/#demo=default-two-modes.json');
    await page.waitForSelector('body[data-ready="true"]', { timeout: 30000 });
    await page.evaluate(() => {
      window.__longest = 0;
      let last = performance.now();
      window.__tick = setInterval(() => { const t = performance.now(); window.__gap = Math.max(window.__gap, t - last); last = t; }, 10);
    });
    const t0 = Date.now();
    await page.click('[data-testid="run-button"]');
    let tSe = null;
    for (;;) {
      const st = await page.evaluate(() => ({ se: document.body.dataset.runningSe, state: document.body.dataset.runState }));
      if (tSe === null && st.se !== undefined && Number(st.se) <= 0.02) tSe = Date.now() - t0;
      if (st.state === 'done') break;
      if (Date.now() - t0 > 120000) throw new Error('run did not finish');
      await new Promise((r) => setTimeout(r, 20));
    }
    const total = Date.now() - t0;
    const m = await page.evaluate(() => ({ longest: window.__longest, gap: window.__gap, cores: navigator.hardwareConcurrency }));
    rows.push({ tSe, total, longest: m.longest, gap: m.gap, cores: m.cores });
    await context.close();
  }
} finally {
  await browser.close();
  server.stop();
}
const med = (k) => rows.map((r) => r[k]).sort((a, b) => a - b)[Math.floor(rows.length / 2)];
const date = new Date().toISOString().slice(0, 10);
const lines = [
  '<!-- browser:start -->',
  '## In the browser',
  '',
  `Measured ${date} on ${os.cpus().length} cores (${os.cpus()[0]?.model || 'unknown CPU'}), headless Chromium, `
    + `the default demo (default-two-modes.json) at default settings; median of ${rows.length} runs. `
    + 'Rerun: `bash scripts/build-web.sh && npm ci && node scripts/bench-browser.mjs`.',
  '',
  '| measure | value |',
  '|---|---|',
  `| time from Run until the running log Z has SE ≤ 0.02 | ${(med('tSe') / 1000).toFixed(2)} s |`,
  `| whole run (warm-up, sampling, estimates) | ${(med('total') / 1000).toFixed(2)} s |`,
  `| longest main-thread task during the run (long-task API; 0 = none over 50 ms) | ${med('longest').toFixed(0)} ms |`,
  `| longest gap between 10 ms timer ticks on the main thread | ${med('gap').toFixed(0)} ms |`,
  `| workers (navigator.hardwareConcurrency) | ${rows[0].cores} |`,
  '<!-- browser:end -->',
];
const file = path.join(ROOT, 'BENCHMARKS.md');
let text = fs.existsSync(file) ? fs.readFileSync(file, 'utf8') : '# Benchmarks\n';
const block = lines.join('\n');
if (/<!-- browser:start -->[\s\S]*<!-- browser:end -->/.test(text)) {
  text = text.replace(/<!-- browser:start -->[\s\S]*<!-- browser:end -->/, block);
} else {
  text = text.trimEnd() + '\n\n' + block + '\n';
}
fs.writeFileSync(file, text);
console.log(block);
