// Unit tests of www/bundle.js: the single page's script holds every module of the page, in
// an order where nothing is used before it is defined, compiles as one classic script, and
// the bundler refuses (loudly, naming file and line) any module syntax it does not handle.
import { test } from 'node:test';
import assert from 'node:assert/strict';
import fs from 'node:fs';
import path from 'node:path';
import vm from 'node:vm';
import { bundleModules } from '../../www/bundle.js';
import { ROOT } from './demos.mjs';

const www = path.join(ROOT, 'www');
const readWww = (p) => fs.readFileSync(path.join(www, p), 'utf8');
// Every script in www/ is a module of the page except the worker, which stays a classic script.
const CLASSIC = ['worker.js'];
const pageModules = fs.readdirSync(www).filter((f) => f.endsWith('.js') && !CLASSIC.includes(f)).sort();

// A module's imports read with a plain pattern of its own (not the bundler's parser).
function importsOf(source) {
  return [...source.matchAll(/^import\s*\{[^}]*\}\s*from\s*'\.\/([^']+)';/gm)].map((m) => m[1]);
}

test('the bundle of main.js holds every module of the page, and every import is in it', async () => {
  const { text, modules } = await bundleModules('main.js', readWww);
  assert.deepEqual([...modules].sort(), pageModules, 'modules in the bundle vs. modules in www/');
  assert.equal(modules[modules.length - 1], 'main.js');
  for (const m of pageModules) {
    for (const dep of importsOf(readWww(m))) {
      assert.ok(modules.includes(dep), `${m} imports ${dep}, which is not in the bundle`);
      assert.ok(modules.indexOf(dep) < modules.indexOf(m), `${dep} must run before ${m}`);
    }
  }
  // In the output: each module defined once, and each one used only after it is defined.
  const defined = [...text.matchAll(/^kilnModules\["([^"]+)"\] = \(function \(\) \{$/gm)].map((m) => m[1]);
  assert.deepEqual(defined, modules);
  const lines = text.split('\n');
  const seen = new Set();
  for (const line of lines) {
    const def = /^kilnModules\["([^"]+)"\] = /.exec(line);
    if (def) seen.add(def[1]);
    for (const use of line.matchAll(/\} = kilnModules\["([^"]+)"\];/g)) {
      assert.ok(seen.has(use[1]) && use[1] !== [...seen].pop(), `${use[1]} used before it is defined`);
    }
  }
  assert.doesNotMatch(text, /^[ \t]*(import|export)\b/m, 'no module syntax left');
  assert.doesNotMatch(text, /<\/script/i);
  assert.doesNotThrow(() => new vm.Script(text, { filename: 'bundle.js' }), 'the bundle compiles as a classic script');
});

// Bundles in-memory modules.
function bundleOf(files, entry = 'main.js') {
  return bundleModules(entry, (p) => {
    if (!(p in files)) throw new Error('no such file');
    return files[p];
  });
}

test('modules run in the order a browser runs them, and their exports work', async () => {
  const files = {
    'main.js': "import { a } from './a.js';\nimport {\n  b,\n  B,\n} from './b.js';\nlog.push('main ' + a() + ' ' + b() + ' ' + new B().k);\n",
    'a.js': "import { c } from './c.js';\nlog.push('a');\nexport function a() { return 'a' + c; }\n",
    'b.js': "import { c } from './c.js';\nlog.push('b');\nexport async function later() {}\nexport function b() { return 'b' + c; }\nexport class B { constructor() { this.k = c; } }\n",
    'c.js': "log.push('c');\nexport const c = 3;\n",
  };
  const { text, modules } = await bundleOf(files);
  assert.deepEqual(modules, ['c.js', 'a.js', 'b.js', 'main.js']);
  const log = [];
  vm.runInNewContext(text, { log });
  assert.deepEqual(log, ['c', 'a', 'b', 'main a3 b3 3']);
});

test('module-level names stay private to their module', async () => {
  const files = {
    'main.js': "import { get } from './a.js';\nconst secret = 'main';\nlog.push(secret + ' ' + get());\n",
    'a.js': "const secret = 'a';\nexport function get() { return secret; }\n",
  };
  const log = [];
  vm.runInNewContext((await bundleOf(files)).text, { log });
  assert.deepEqual(log, ['main a']);
});

test('anything outside the allowed module syntax fails loudly, naming file and line', async () => {
  const refused = [
    ['export default 1;\n', /main\.js, line 1: only `export function\|async function\|const\|class name` is allowed/],
    ["const a = 1;\nexport { a };\n", /main\.js, line 2: only `export function/],
    ['export let a = 1;\n', /only `export function/],
    ['export var a = 1;\n', /only `export function/],
    ['export * from \'./a.js\';\n', /only `export function/],
    ['export function* gen() {}\n', /only `export function/],
    ["import * as a from './a.js';\n", /main\.js, line 1: only `import \{ a, b \} from '\.\/name\.js';` is allowed/],
    ["import a from './a.js';\n", /only `import \{ a, b \}/],
    ["import './a.js';\n", /only `import \{ a, b \}/],
    ['import { a } from "./a.js";\n', /only `import \{ a, b \}/],
    ["import { a } from './sub/a.js';\n", /only `import \{ a, b \}/],
    ["import { a } from './a.js'; // why\n", /only `import \{ a, b \}/],
    ["import { a as b } from './a.js';\n", /`a as b`: only plain names may be imported/],
    ["import { } from './a.js';\n", /an import must name what it takes/],
    ["\nconst m = import('./a.js');\n", /main\.js, line 2: dynamic imports/],
    ['const u = import.meta.url;\n', /dynamic imports/],
  ];
  for (const [source, why] of refused) {
    await assert.rejects(bundleOf({ 'main.js': source, 'a.js': 'export const a = 1;\n' }), why, source);
  }
  // Comment lines may mention what code may not do.
  await bundleOf({ 'main.js': "// never import('./x.js') here\n/*\n * nor import.meta\n */\n" });
});

test('missing modules, missing exports and cycles are refused by name', async () => {
  await assert.rejects(bundleOf({ 'main.js': "import { a } from './gone.js';\n" }), /cannot read gone\.js \(imported by main\.js\): no such file/);
  await assert.rejects(bundleOf({ 'main.js': "import { b } from './a.js';\n", 'a.js': 'export const a = 1;\n' }), /main\.js, line 1: a\.js does not export `b`/);
  await assert.rejects(bundleOf({
    'main.js': "import { a } from './a.js';\n",
    'a.js': "import { b } from './b.js';\nexport const a = 1;\n",
    'b.js': "import { a } from './a.js';\nexport const b = 1;\n",
  }), /import cycle a\.js -> b\.js -> a\.js/);
  await assert.rejects(bundleOf({ 'main.js': 'export const a = 1;\nexport function a() {}\n' }), /`a` is exported twice/);
});
