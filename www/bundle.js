// The page's ES modules as one classic script, for the single-file page.
//
// Owns: reading main.js and every module it imports (through a read(path) function the caller
// hands in), checking that they use only the module syntax below, and writing one classic
// script that runs them in the order a browser would.
// Must not touch: the DOM, the network, storage or the file system (pure; unit-tested under
// Node, where read() reads www/ from disk).
//
// Why the page bundles itself when "Save as single page" is pressed, and not a build step:
// ES modules cannot import each other from file://, so the saved page needs one classic
// script. Bundling the very files the page is running means the saved page can never
// disagree with the served one (a build step leaves a stale bundle behind whenever a module
// is edited and the build is not rerun), adds no generated file to www/pkg, and is the same
// code that the Node tests run. The page itself never runs the bundle; only the saved copy does.
//
// Allowed module syntax, and nothing else (anything else fails loudly, naming file and line):
//   import { a, b } from './name.js';    at the start of a line; the list may span lines
//   export function f(…)  export async function f(…)  export const x = …  export class C
// So: no default exports, no `export { … }`, no renaming with `as`, no namespace, side-effect
// or dynamic imports, no import.meta, no `export let` or `var` (a bundle could not keep a live
// binding), no modules outside the page's own folder, and no import cycles.

const NAME = /^[A-Za-z_$][\w$]*$/;
const IMPORT = /^import[ \t]*\{([^}]*)\}[ \t]*from[ \t]*'\.\/([a-z0-9-]+\.js)';[ \t]*$/gm;
const EXPORT_FORMS = [
  /^export (?:async )?function ([A-Za-z_$][\w$]*)\s*\(/,
  /^export const ([A-Za-z_$][\w$]*)\s*=/,
  /^export class ([A-Za-z_$][\w$]*)[\s{]/,
];

function fail(path, index, text, why) {
  const line = text.slice(0, index).split('\n').length;
  throw new Error('bundle: ' + path + ', line ' + line + ': ' + why);
}

/**
 * One module's source -> {imports: [{from, names}], exports: [names], body}: the body is the
 * source with its imports taken out and the `export ` keywords dropped.
 */
function parseModule(path, source) {
  const imports = [];
  let body = source.replace(IMPORT, function (whole, list, from, index) {
    const names = list.split(',').map(function (s) { return s.trim(); }).filter(function (s) { return s.length; });
    if (!names.length) fail(path, index, source, 'an import must name what it takes');
    for (const n of names) {
      if (!NAME.test(n)) fail(path, index, source, '`' + n + '`: only plain names may be imported (no `as`)');
    }
    imports.push({ from: from, names: names, index: index });
    // Keep the line count, so that errors in the bundle point near the source line.
    return whole.replace(/[^\n]/g, '');
  });
  // (Comment lines may mention them.)
  const dynamic = /^(?![ \t]*(?:\/\/|\/?\*)).*\bimport\s*(\(|\.\s*meta\b)/m.exec(body);
  if (dynamic) fail(path, dynamic.index, body, 'dynamic imports and the module meta object are not allowed');
  const stray = /^[ \t]*import\b.*$/m.exec(body);
  if (stray) fail(path, stray.index, body, 'only `import { a, b } from \'./name.js\';` is allowed, not `' + stray[0].trim() + '`');
  const exports = [];
  const exportRe = /^[ \t]*export\b.*$/gm;
  let m;
  while ((m = exportRe.exec(body)) !== null) {
    let name = null;
    for (const form of EXPORT_FORMS) {
      const hit = form.exec(m[0] + '\n');
      if (hit) { name = hit[1]; break; }
    }
    if (!name) fail(path, m.index, body, 'only `export function|async function|const|class name` is allowed, not `' + m[0].trim() + '`');
    if (exports.indexOf(name) >= 0) fail(path, m.index, body, '`' + name + '` is exported twice');
    exports.push(name);
  }
  body = body.replace(/^export (?=(?:async function|function|const|class)\b)/gm, '');
  return { imports: imports, exports: exports, body: body };
}

/**
 * Bundles `entry` (e.g. 'main.js') and everything it imports. read(path) returns the text of a
 * module (or a promise of it) and throws when there is none. Resolves to
 * {text: one classic script, modules: [paths, in the order they run]}.
 */
export async function bundleModules(entry, read) {
  const parsed = new Map();
  const order = [];
  const visiting = [];
  async function visit(path, from) {
    if (order.indexOf(path) >= 0) return;
    const at = visiting.indexOf(path);
    if (at >= 0) throw new Error('bundle: import cycle ' + visiting.slice(at).concat(path).join(' -> '));
    let source;
    try {
      source = await read(path);
    } catch (e) {
      throw new Error('bundle: cannot read ' + path + (from ? ' (imported by ' + from + ')' : '') + ': ' + (e && e.message ? e.message : String(e)));
    }
    if (typeof source !== 'string') throw new Error('bundle: cannot read ' + path + (from ? ' (imported by ' + from + ')' : ''));
    const mod = parseModule(path, source);
    parsed.set(path, mod);
    visiting.push(path);
    for (const imp of mod.imports) await visit(imp.from, path);
    visiting.pop();
    for (const imp of mod.imports) {
      const target = parsed.get(imp.from);
      for (const n of imp.names) {
        if (target.exports.indexOf(n) < 0) fail(path, imp.index, source, imp.from + ' does not export `' + n + '`');
      }
    }
    order.push(path);
  }
  await visit(entry, null);
  const parts = [
    '// Kiln page: ' + order.length + ' ES modules bundled into one classic script by bundle.js',
    '// (for the single-file page; modules cannot import each other from file://).',
    '(function () {',
    '\'use strict\';',
    'const kilnModules = {};',
  ];
  for (const path of order) {
    const mod = parsed.get(path);
    const head = mod.imports.map(function (imp) {
      return 'const { ' + imp.names.join(', ') + ' } = kilnModules[' + JSON.stringify(imp.from) + '];';
    });
    parts.push('// ---- module ' + path);
    parts.push('kilnModules[' + JSON.stringify(path) + '] = (function () {');
    parts.push('\'use strict\';');
    for (const h of head) parts.push(h);
    parts.push(mod.body.replace(/\s+$/, ''));
    parts.push('return { ' + mod.exports.join(', ') + ' };');
    parts.push('})();');
  }
  parts.push('})();');
  return { text: parts.join('\n') + '\n', modules: order };
}
