// Shared set-up of the end-to-end tests: the local server, headless Chromium (the system's, driven
// by playwright-core) and a record of every request a page makes.
import { spawn } from 'node:child_process';
import fs from 'node:fs';
import path from 'node:path';
import url from 'node:url';
import { chromium } from 'playwright-core';

export const ROOT = path.resolve(path.dirname(url.fileURLToPath(import.meta.url)), '..', '..');
export const ARTIFACTS = path.join(ROOT, 'test-artifacts');
fs.mkdirSync(ARTIFACTS, { recursive: true });

const CHROMIUM = process.env.CHROMIUM || '/usr/bin/chromium';
const FLAGS = ['--headless', '--no-sandbox', '--disable-gpu', '--disable-background-networking',
  '--no-first-run', '--disable-component-update', '--disable-sync', '--disable-quic'];

/** Starts scripts/serve.mjs on a free port; resolves to { origin, stop }. */
export async function startServer() {
  const port = 18000 + Math.floor(Math.random() * 2000);
  const child = spawn(process.execPath, [path.join(ROOT, 'scripts', 'serve.mjs')], {
    env: { ...process.env, PORT: String(port) }, stdio: ['ignore', 'pipe', 'inherit'],
  });
  await new Promise((resolve, reject) => {
    const timer = setTimeout(() => reject(new Error('server did not start')), 10000);
    child.stdout.on('data', (d) => { if (String(d).includes('Kiln is at')) { clearTimeout(timer); resolve(); } });
    child.on('exit', (code) => reject(new Error('server exited with ' + code)));
  });
  return { origin: `http://127.0.0.1:${port}`, stop: () => child.kill() };
}

/** Launches Chromium; resolves to the browser. */
export async function launch() {
  return chromium.launch({ executablePath: CHROMIUM, args: FLAGS, headless: true });
}

/**
 * A new page in a fresh context that records every request (including workers') and every
 * console error. `downloads` are accepted.
 */
export async function openPage(browser) {
  const context = await browser.newContext({ viewport: { width: 1280, height: 720 }, acceptDownloads: true });
  const requests = [];
  const errors = [];
  context.on('request', (r) => requests.push({ url: r.url(), time: Date.now() }));
  const page = await context.newPage();
  page.on('console', (m) => { if (m.type() === 'error') errors.push(m.text()); });
  page.on('pageerror', (e) => errors.push(String(e)));
  return { context, page, requests, errors };
}

export async function shot(page, name) {
  await page.screenshot({ path: path.join(ARTIFACTS, name + '.png'), fullPage: true });
}

/** Runs the kiln binary (debug profile, built by scripts/test.sh) and parses its JSON. */
export function kilnJson(args) {
  const bin = path.join(ROOT, 'target', 'debug', 'kiln');
  return new Promise((resolve, reject) => {
    const child = spawn(bin, args, { stdio: ['ignore', 'pipe', 'pipe'] });
    let out = '';
    let err = '';
    child.stdout.on('data', (d) => { out += d; });
    child.stderr.on('data', (d) => { err += d; });
    child.on('exit', (code) => (code === 0 ? resolve(JSON.parse(out)) : reject(new Error(err))));
  });
}
