// The page's colours against WCAG 2.1 (success criteria 1.4.3 and 1.4.11): every pair of a text
// colour and a background it is used on in www/app.css, in the light and the dark scheme, has a
// contrast ratio of at least 4.5:1 (3:1 for large text and for the lines of controls and the
// focus ring). The formulas are the standard's own definitions of relative luminance and
// contrast ratio (https://www.w3.org/TR/WCAG21/#dfn-relative-luminance); the known values at the
// end check the implementation against them.
import { test } from 'node:test';
import assert from 'node:assert/strict';
import fs from 'node:fs';
import path from 'node:path';
import url from 'node:url';

const ROOT = path.resolve(path.dirname(url.fileURLToPath(import.meta.url)), '..', '..');
const CSS = fs.readFileSync(path.join(ROOT, 'www', 'app.css'), 'utf8');

/** The custom properties declared in a block of declarations. */
function props(block) {
  const out = {};
  for (const m of block.matchAll(/(--[a-z0-9-]+)\s*:\s*([^;]+);/gi)) out[m[1]] = m[2].trim();
  return out;
}

/** The text between the brace that follows `from` and the brace that closes it. */
function blockAfter(text, from) {
  const open = text.indexOf('{', from);
  let depth = 0;
  for (let i = open; i < text.length; i++) {
    if (text[i] === '{') depth++;
    else if (text[i] === '}' && --depth === 0) return text.slice(open + 1, i);
  }
  throw new Error('unbalanced braces after ' + from);
}

function schemes() {
  const css = CSS.replace(/\/\*[\s\S]*?\*\//g, '');
  const light = props(blockAfter(css, css.search(/(^|\n):root\s*\{/)));
  const at = css.search(/@media\s*\(prefers-color-scheme:\s*dark\)/);
  assert.ok(at >= 0, 'app.css has a dark scheme');
  const inner = blockAfter(css, at);
  const dark = { ...light, ...props(blockAfter(inner, inner.indexOf(':root'))) };
  return { light, dark };
}

function rgb(hex) {
  const m = /^#([0-9a-f]{6})$/i.exec(hex);
  if (!m) throw new Error('not a #rrggbb colour: ' + hex);
  return [0, 2, 4].map((i) => parseInt(m[1].slice(i, i + 2), 16) / 255);
}

/** WCAG 2.1 relative luminance of an sRGB colour. */
export function luminance(hex) {
  const [r, g, b] = rgb(hex).map((c) => (c <= 0.03928 ? c / 12.92 : ((c + 0.055) / 1.055) ** 2.4));
  return 0.2126 * r + 0.7152 * g + 0.0722 * b;
}

/** WCAG 2.1 contrast ratio (L1 + 0.05) / (L2 + 0.05), the lighter first. */
export function contrast(a, b) {
  const [l1, l2] = [luminance(a), luminance(b)].sort((x, y) => y - x);
  return (l1 + 0.05) / (l2 + 0.05);
}

// [text, background, least ratio, where]. 4.5 normal text, 3 large text or non-text.
const PAIRS = [
  ...['--bisque', '--slip', '--hover', '--ember-wash', '--celadon-wash', '--ochre-wash', '--oxblood-wash'].map((bg) => ['--soot', bg, 4.5, 'text']),
  ...['--bisque', '--slip', '--hover', '--ochre-wash', '--oxblood-wash', '--celadon-wash'].map((bg) => ['--ash', bg, 4.5, 'secondary text, hints, codes of messages']),
  ['--ember', '--bisque', 4.5, 'links and link buttons on cards'],
  ['--ember', '--slip', 4.5, 'link buttons on the page'],
  ['--ember-deep', '--bisque', 4.5, 'links on hover'],
  ['--ember-ink', '--ember', 4.5, 'primary buttons'],
  ['--ember-ink', '--ember-deep', 4.5, 'primary buttons on hover'],
  ['--celadon', '--bisque', 4.5, 'good figures, the check status'],
  ['--celadon', '--celadon-wash', 4.5, '"agrees" pills'],
  ['--celadon', '--slip', 4.5, 'a side\'s verdict in the comparison'],
  ['--ochre', '--ochre-wash', 4.5, 'the stale-run note'],
  ['--ochre', '--celadon-wash', 4.5, '"read the warnings below" in an agreeing verdict'],
  ['--ochre', '--bisque', 4.5, 'a side\'s verdict in the comparison'],
  ['--oxblood', '--oxblood-wash', 4.5, '"disagrees" pills, the run error title'],
  ['--oxblood', '--bisque', 4.5, 'flags, refused comparisons'],
  ['--tag-ink', '--celadon', 4.5, 'verdict tag, agree'],
  ['--tag-ink', '--ochre', 4.5, 'verdict tag, not enough evidence; warning marks'],
  ['--tag-ink', '--oxblood', 4.5, 'verdict tag, disagree'],
  ['--bisque', '--ash', 4.5, 'verdict tag while running'],
  ['--bisque', '--soot', 4.5, 'the selected model tab'],
  ['--focus', '--bisque', 3, 'the focus ring on cards (non-text)'],
  ['--focus', '--slip', 3, 'the focus ring on the page (non-text)'],
  ['--control-line', '--bisque', 3, 'the border of a control against its own fill (non-text)'],
  ['--control-line', '--slip', 3, 'the border of a control against the page (non-text)'],
];

test('every text colour has WCAG 2.1 AA contrast on its backgrounds, light and dark', () => {
  const all = schemes();
  const failures = [];
  const lines = [];
  for (const [name, s] of Object.entries(all)) {
    for (const [fg, bg, least, where] of PAIRS) {
      assert.ok(s[fg] && s[bg], `${name}: ${fg} and ${bg} are defined`);
      const r = contrast(s[fg], s[bg]);
      lines.push(`${name.padEnd(5)} ${fg.padEnd(15)} on ${bg.padEnd(15)} ${r.toFixed(2)}:1 (at least ${least})`);
      if (!(r >= least)) failures.push(`${name}: ${fg} ${s[fg]} on ${bg} ${s[bg]} is ${r.toFixed(2)}:1, under ${least}:1 (${where})`);
    }
  }
  if (process.env.KILN_CONTRAST_TABLE) console.log(lines.join('\n'));
  assert.deepEqual(failures, []);
});

test('the two schemes differ: the dark one is dark', () => {
  const { light, dark } = schemes();
  assert.ok(luminance(light['--slip']) > 0.7 && luminance(dark['--slip']) < 0.05);
  assert.ok(luminance(light['--soot']) < 0.05 && luminance(dark['--soot']) > 0.7);
});

test('the contrast formula gives the standard\'s known values', () => {
  // Black on white is 21:1 and a colour on itself 1:1, by the definition.
  assert.equal(contrast('#000000', '#ffffff'), 21);
  assert.equal(contrast('#777777', '#777777'), 1);
  // #767676 on white is the lightest grey that passes 4.5:1 (4.54:1), #777777 fails (4.48:1):
  // the commonly quoted boundary, recomputed from the definition here.
  assert.ok(contrast('#767676', '#ffffff') >= 4.5 && contrast('#777777', '#ffffff') < 4.5);
  // sRGB white has luminance 1, and mid grey #808080 has 0.2159 (from the piecewise formula).
  assert.equal(luminance('#ffffff'), 1);
  assert.ok(Math.abs(luminance('#808080') - 0.21586) < 1e-4);
});
