// Models in and out of the page: the demos, spec files, share links, the single-file page,
// and the results to take away (draws CSV, summary JSON).
//
// Owns: loadDemos, loadDemo, openSpecFile, saveSpec, copyShareLink, applyHash (#spec= and
// #demo= links), saveSingle, openEmbeddedModel, downloadDrawsCsv, downloadSummaryJson.
// Everything read from a file, a link or a demo goes through specToForm / readShared, and is
// shown as text only.
// Must not touch: the editor's fields (a loaded model goes through undo.js / slots.js).
import { state, newSlot, activeSlot, buildSpec } from './state.js';
import { specToForm } from './spec-form.js';
import { sharedModels, encodeShared, decodeShared, readShared, linkBase } from './share.js';
import { buildSinglePage, embedded } from './single.js';
import { readFileText, download, slug } from './files.js';
import { notice, noticeErrors } from './notice.js';
import { $, el } from './dom.js';
import { replaceModels, replaceSlotModel, pendingUndo } from './undo.js';
import { afterModelReplaced } from './slots.js';
import { fmtInt, messageOf } from './format.js';

export async function loadDemos() {
  const own = embedded();
  if (own && Array.isArray(own.demos)) { state.demos = own.demos; }
  else {
    try {
      const r = await fetch('pkg/demos.json', { cache: 'no-store' });
      if (!r.ok) throw new Error('HTTP ' + r.status);
      const j = await r.json();
      state.demos = Array.isArray(j) ? j.filter(function (d) { return d && typeof d.file === 'string' && d.spec && typeof d.spec === 'object'; }) : [];
    } catch (e) {
      state.demos = [];
      notice(['The demos could not be loaded (pkg/demos.json: ' + e.message + '). Build them with scripts/build-web.sh.'], { bad: true });
    }
  }
  const sel = $('demo-select');
  for (const d of state.demos) sel.appendChild(el('option', { value: d.file }, (typeof d.spec.title === 'string' && d.spec.title) || d.file));
}

/** Loads a demo into a slot; quiet = without a notice and an undo (at start). */
export function loadDemo(file, slotId, quiet) {
  const d = state.demos.find(function (x) { return x.file === file; });
  if (!d) {
    notice(['There is no demo called “' + file + '”. Available: ' + (state.demos.map(function (x) { return x.file; }).join(', ') || 'none') + '.'], { bad: true });
    return false;
  }
  let loaded;
  try { loaded = specToForm(d.spec); } catch (e) { notice(['The demo ' + file + ' could not be read: ' + e.message], { bad: true }); return false; }
  if (quiet) { state.slots[slotId] = newSlot(loaded.form, loaded.settings); afterModelReplaced(slotId); }
  else replaceSlotModel(slotId, loaded, 'Loaded the demo “' + (d.spec.title || file) + '”');
  return true;
}

export function openSpecFile(file) {
  readFileText(file, function (text) {
    let obj;
    try { obj = JSON.parse(text); } catch (e) { notice([file.name + ' is not valid JSON:', el('pre', null, 'error: ' + e.message)], { bad: true }); return; }
    let loaded;
    try { loaded = specToForm(obj); } catch (e) { notice([file.name + ': ' + e.message], { bad: true }); return; }
    if (!state.slots[state.active]) state.slots[state.active] = newSlot();
    replaceSlotModel(state.active, loaded, 'Opened ' + file.name);
  });
}

export function saveSpec() {
  const slot = activeSlot();
  if (!slot) return;
  const b = buildSpec(slot);
  if (b.errors.length) { noticeErrors('The spec cannot be saved until these are fixed:', b.errors); return; }
  download(slug(slot.form.title) + '.json', JSON.stringify(b.spec, null, 2) + '\n', 'application/json');
}

export function downloadDrawsCsv() {
  const slot = activeSlot();
  if (slot && slot.run && slot.run.csv) download(slug(slot.form.title) + '-draws.csv', slot.run.csv, 'text/csv');
}

export function downloadSummaryJson() {
  const slot = activeSlot();
  if (slot && slot.run && slot.run.result) download(slug(slot.form.title) + '-summary.json', JSON.stringify(slot.run.result, null, 2) + '\n', 'application/json');
}

// The link carries model A and, when there is one, model B, so a comparison travels whole.
export async function copyShareLink() {
  if (!state.slots.A) return;
  const shared = sharedModels(state.slots.A, state.slots.B);
  if (shared.errors.length) { noticeErrors('Fix these before sharing:', shared.errors); return; }
  const bb = shared.b;
  let link;
  try {
    link = linkBase(location) + '#spec=' + await encodeShared(shared);
  } catch (e) { notice(['This browser cannot compress the link (CompressionStream): ' + e.message], { bad: true }); return; }
  const input = $('share-link');
  input.value = link;
  $('share-fallback').hidden = false;
  let copied = false;
  try { await navigator.clipboard.writeText(link); copied = true; } catch (e) { copied = false; }
  notice([(copied ? 'Share link copied to the clipboard' : 'The share link is ready in “Take away” (copying was not allowed here)') +
    ' — ' + fmtInt(link.length) + ' characters. ' + (bb ? 'Both models (A and B) and their settings travel' : 'The model and its settings travel') +
    ' inside the link itself; nothing is stored anywhere else.' +
    (link.length > 60000 ? ' This link is long; some apps shorten or break links this size: a spec file is safer.' : '')]);
}

/** Opens what the address's fragment names (#spec=… or #demo=…); true when a model was loaded. */
export async function applyHash() {
  const h = location.hash.replace(/^#/, '');
  if (!h) return false;
  const params = new URLSearchParams(h);
  const clean = function () { history.replaceState(null, '', location.pathname + location.search); };
  if (params.has('spec')) {
    try {
      const loaded = await decodeShared(params.get('spec'));
      if (state.active !== 'A') state.active = 'A';
      if (loaded.b) replaceModels({ A: loaded.a, B: loaded.b }, 'Opened a shared comparison');
      else replaceSlotModel('A', loaded.a, 'Opened a shared model');
      clean();
      return true;
    } catch (e) {
      // The models in the page are untouched; an Undo offered before stays on offer.
      const undo = pendingUndo();
      notice(['This share link could not be opened; the models in the page are unchanged' + (undo ? ' (the last change can still be undone)' : '') + '.',
        el('pre', { 'data-testid': 'share-error' }, 'error: ' + messageOf(e))], { bad: true, action: undo || undefined });
      clean();
      return false;
    }
  }
  if (params.has('demo')) {
    const ok = loadDemo(params.get('demo'), state.active, !state.hadStorage);
    clean();
    return ok;
  }
  return false;
}

export async function saveSingle() {
  const A = state.slots.A;
  if (!A) return;
  const shared = sharedModels(A, state.slots.B);
  if (shared.errors.length) { noticeErrors('The page cannot be saved until these are fixed:', shared.errors); return; }
  const btn = $('save-single');
  btn.disabled = true;
  try {
    const html = await buildSinglePage({
      spec: shared.a.spec, settings: shared.a.settings, title: A.form.title.trim() || 'Kiln model',
      b: shared.b || undefined,
    });
    download(slug(A.form.title) + '.html', html, 'text/html');
    notice(['Saved a single page with the engine, the demos and ' + (shared.b ? 'both models (A and B)' : 'this model') + ' inside. It opens from a file and needs no network.']);
  } catch (e) {
    notice(['The single page could not be made: ' + messageOf(e)], { bad: true });
  } finally { btn.disabled = false; }
}

/** At start, in a single-file page: puts the models saved inside it into the slots; true when it did. */
export function openEmbeddedModel(bundle) {
  if (!bundle || !bundle.spec) return false;
  try {
    const loaded = readShared({ spec: bundle.spec, settings: bundle.settings || undefined, b: bundle.b || undefined });
    state.slots.A = newSlot(loaded.a.form, loaded.a.settings);
    if (loaded.b) state.slots.B = newSlot(loaded.b.form, loaded.b.settings);
    return true;
  } catch (e) {
    notice(['The model saved in this page could not be read: ' + e.message], { bad: true });
    return false;
  }
}
