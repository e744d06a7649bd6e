// Kiln page: the entry module. It connects the page's controls to the modules that act on
// them, says what a full redraw is, and starts the page. All engine work happens in workers
// (engine.js); the main thread never runs WebAssembly.
//
// Owns: wire, start, the composition of renderAll (run bar, comparison, report, plots) and
// body[data-ready].
// Must not touch: any concern's own logic; each handler calls the module that owns it.
//
// Safety rule for the whole page: text that came from a spec, a share link, a file, a demo or
// the engine is only ever put into the page with textContent / createTextNode / input values,
// never as HTML. dom.js's el() has no way to set HTML.
//
// data-testid attributes for end-to-end tests:
//   demo-select      select: load a demo into the active model
//   open-spec        button: open a spec file        download-spec   button (top bar): save spec JSON
//   share-button     button: copy share link         share-link      input holding the last share link
//   notice           page-level message (status, share errors, undo)
//   slot-a, slot-b   model slot tabs                 b-copy, b-empty buttons to start model B
//   title-input      model title                     notes-input     description
//   model-kind       fieldset of radios (energy | log_density | mixture)
//   spec-editor      the whole model form            formula-editor  the formula textarea
//   error-box        <pre> with check / local errors (the engine's `rendered` text)
//   check-status     line under the editor           check-modes     table of modes found by the check
//   unknowns-table   unknowns editor (rows: unknown-name, unknown-lower, unknown-upper, unknown-remove)
//   add-unknown      button                          data-csv        CSV textarea
//   data-file-button button: load a CSV file        data-summary    rows/columns of the data
//   data-preview-note  note over a table too large to show whole (data-remove: its button)
//   mixture-table    mixture editor                  add-component   button
//   seed-input, chains-input, draws-input, warmup-input, method-select, integrator-select
//   run-button       run the active model            run-both-button run A then B
//   cancel-button    stop the run at once            progress        <progress>  progress-text
//   report-title, report-meta, stale-note, run-error, run-error-text
//   verdict          the verdict line                logz-value      log Z ± SE   logz-sub
//   cross-checks     table                           warnings        warnings and notes
//   mode-table       table of modes                  unknowns-summary table of unknowns
//   diagnostics      <dl>                            pair-x, pair-y  unknowns shown in the density map
//   plot-density, plot-marginals, plot-beta, plot-running      the canvases
//   save-png-density, save-png-marginals, save-png-beta, save-png-running
//   download-csv, download-json, download-spec-results, save-single, print-button
//   body[data-ready="true"]      set once the page has loaded everything it will load
//   body[data-run-state]         idle | running | done | cancelled | error (the latest run)
//   compare-card     Bayes factor card               bayes-factor    log(Z_A/Z_B) ± SE
//   how-to-read      the note on when not to trust the numbers
import { state, DEFAULT_DEMO } from './state.js';
import { $ } from './dom.js';
import { engine } from './engine-load.js';
import { embedded } from './single.js';
import { setRenderer, renderAll, scheduleRender } from './render-loop.js';
import { useSinglePageKey, restore, saveNow } from './storage.js';
import { hideNotice, notice } from './notice.js';
import { writeFormToDom, wireForm } from './editor.js';
import { scheduleCheck, firstCheckDone } from './checking.js';
import { switchSlot, startModelB } from './slots.js';
import { startRun, cancelRun, renderRunBar, setRunState } from './runs.js';
import { renderReport } from './report-view.js';
import { renderPlots, choosePair, savePlotPng } from './plots-view.js';
import { renderCompare } from './compare-view.js';
import {
  loadDemos, loadDemo, openSpecFile, saveSpec, copyShareLink, applyHash, saveSingle,
  openEmbeddedModel, downloadDrawsCsv, downloadSummaryJson,
} from './models-io.js';

setRenderer(function () {
  renderRunBar();
  renderCompare();
  renderReport();
  renderPlots();
});

// The engine starts loading at once, while the page sets itself up.
engine();

function wire() {
  wireForm();
  $('formula-input').addEventListener('keydown', function (ev) {
    if (ev.key === 'Enter' && (ev.ctrlKey || ev.metaKey)) { ev.preventDefault(); startRun(state.active); }
  });
  $('tab-a').addEventListener('click', function () { switchSlot('A'); });
  $('tab-b').addEventListener('click', function () { switchSlot('B'); });
  document.querySelector('.slot-tabs').addEventListener('keydown', function (ev) {
    if (ev.key === 'ArrowRight' || ev.key === 'ArrowLeft') { const id = state.active === 'A' ? 'B' : 'A'; switchSlot(id); $(id === 'A' ? 'tab-a' : 'tab-b').focus(); ev.preventDefault(); }
  });
  $('b-copy').addEventListener('click', function () { startModelB(true); });
  $('b-empty').addEventListener('click', function () { startModelB(false); });
  $('demo-select').addEventListener('change', function (ev) {
    const file = ev.target.value;
    if (!file) return;
    if (state.running && state.running.slotId === state.active) { notice(['Wait for the run to finish (or cancel it) before loading a demo into this model.'], { bad: true }); ev.target.value = ''; return; }
    loadDemo(file, state.active, false);
    ev.target.value = '';
  });
  $('open-spec').addEventListener('click', function () { $('open-spec-file').value = ''; $('open-spec-file').click(); });
  $('open-spec-file').addEventListener('change', function (ev) {
    const f = ev.target.files && ev.target.files[0];
    if (f) openSpecFile(f);
    ev.target.value = ''; // choosing the same file again is a new choice
  });
  $('save-spec').addEventListener('click', saveSpec);
  $('dl-spec').addEventListener('click', saveSpec);
  $('share').addEventListener('click', copyShareLink);
  $('notice-close').addEventListener('click', hideNotice);
  $('run').addEventListener('click', function () { startRun(state.active); });
  $('run-both').addEventListener('click', function () { startRun('A', ['B']); });
  $('cancel').addEventListener('click', cancelRun);
  $('print').addEventListener('click', function () { window.print(); });
  $('save-single').addEventListener('click', saveSingle);
  $('dl-csv').addEventListener('click', downloadDrawsCsv);
  $('dl-json').addEventListener('click', downloadSummaryJson);
  for (const b of document.querySelectorAll('[data-save]')) {
    b.addEventListener('click', function () { savePlotPng(b.dataset.save); });
  }
  $('pair-x').addEventListener('change', function (ev) { choosePair(0, Number(ev.target.value)); });
  $('pair-y').addEventListener('change', function (ev) { choosePair(1, Number(ev.target.value)); });
  window.addEventListener('hashchange', function () { applyHash(); });
  let lastW = 0;
  new ResizeObserver(function (entries) {
    const w = Math.round(entries[0].contentRect.width);
    if (w !== lastW) { lastW = w; scheduleRender(); }
  }).observe($('results'));
  window.addEventListener('beforeprint', function () { renderPlots(); });
  window.addEventListener('beforeunload', saveNow);
}

async function start() {
  document.body.dataset.ready = 'false';
  setRunState('idle');
  wire();
  const own = embedded();
  // A single-file page keeps its edits under its own key, so it opens first with its own model.
  if (own) useSinglePageKey(own);
  state.hadStorage = restore();
  const fromEmbed = !state.hadStorage && openEmbeddedModel(own);
  writeFormToDom();
  renderAll();
  await loadDemos();
  const fromHash = await applyHash();
  if (!fromHash && !fromEmbed && !state.hadStorage && state.demos.some(function (d) { return d.file === DEFAULT_DEMO; })) loadDemo(DEFAULT_DEMO, 'A', true);
  writeFormToDom();
  scheduleCheck(state.active, 0);
  renderAll();
  await engine();
  await firstCheckDone;
  document.body.dataset.ready = 'true';
  renderAll();
}

start();
