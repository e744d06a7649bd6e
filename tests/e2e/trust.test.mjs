// The typed verdict and the mode search's evidence in the page: on a ring (where the Laplace
// value is far off and never votes), the headline agrees with the sentence under it and with
// the engine's verdict from `kiln run`; the mode-coverage figures are shown.
import { test, before, after } from 'node:test';
import assert from 'node:assert/strict';
import fs from 'node:fs';
import path from 'node:path';
import { startServer, launch, openPage, shot, kilnJson, ARTIFACTS } from './harness.mjs';

let server;
let browser;
before(async () => { server = await startServer(); browser = await launch(); });
after(async () => { await browser?.close(); server?.stop(); });

const id = (name) => `[data-testid="${name}"]`;

test('a ring: the verdict headline agrees with its sentence and with kiln run', async () => {
  const spec = {
    title: 'A ring of radius 3',
    variables: [{ name: 'x' }, { name: 'y' }],
    energy: '(sqrt(x^2 + y^2) - 3)^2 / (2 * 0.25^2)',
    settings: { seed: 2, draws: 600, warmup: 400 },
  };
  const file = path.join(ARTIFACTS, 'ring-spec.json');
  fs.writeFileSync(file, JSON.stringify(spec));
  const { page, context } = await openPage(browser);
  await page.goto(server.origin + '/');
  await page.waitForSelector('body[data-ready="true"]', { timeout: 30000 });
  await page.setInputFiles(id('open-spec-file'), file);
  await page.waitForFunction((t) => document.body.textContent.includes(t), 'A ring of radius 3');
  await page.click(id('run-button'));
  await page.waitForSelector('body[data-run-state="done"]', { timeout: 120000 });
  await shot(page, '07-ring-verdict');
  const state = await page.getAttribute(id('verdict'), 'data-state');
  const headline = await page.textContent(id('verdict-headline'));
  const sentence = await page.textContent(id('verdict-sentence'));
  const cli = await kilnJson(['run', file, '--json']);
  assert.equal(state, cli.verdict.state, 'the page shows the engine\'s verdict');
  assert.equal(headline.trim(), cli.verdict.headline);
  // The headline never contradicts the sentence: both agree, or both do not.
  if (state === 'agree') {
    assert.ok(/agree/i.test(headline) && !/disagree/i.test(headline), headline);
    assert.ok(/agree with the sampler/.test(sentence) && !/disagree/i.test(sentence), sentence);
  } else if (state === 'disagree') {
    assert.ok(/disagree/i.test(headline) && /wrong/.test(sentence), headline + ' / ' + sentence);
  }
  // Laplace is shown but does not vote.
  const laplace = cli.cross_checks.find((c) => c.name === 'laplace');
  assert.equal(laplace.votes, false);
  assert.ok((await page.textContent(id('cross-checks'))).includes('Does not vote'));
  // The mode search's evidence is on the page.
  const foot = await page.textContent(id('modes-caption'));
  assert.ok(/Mode search:/.test(foot) && /Good–Turing/.test(foot) && /Boender & Rinnooy Kan/.test(foot), foot);
  await context.close();
});
