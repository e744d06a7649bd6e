// Function suggestions in the formula editor: while a name is typed, the functions of the
// language that match it (by name, or by a word of their description) are offered in a list
// under the formula, each with its arguments and a one-line description; the active one (moved
// with the arrow keys, or hovered) shows its example below the list.
//
// Keyboard: ArrowDown / ArrowUp move through the list, Enter or Tab insert the active function
// with its opening parenthesis, Escape closes the list, Ctrl+Space (or Alt+Down) opens it with
// every function. The textarea keeps the focus; the list is an ARIA listbox whose active option
// the textarea names with aria-activedescendant.
//
// Owns: wireSuggestions, the list and its detail line (#fn-suggest, #fn-list, #fn-detail), and
// the catalogue of functions, asked of the engine once (`functions()`).
// Must not touch: the form's fields other than by the textarea's own input event, the check,
// the results pane.
import { $, el, clear, setChildren } from './dom.js';
import { engine } from './engine-load.js';

let catalogue = [];
let matches = [];
let active = -1;
let wordStart = 0;

/** The identifier being typed just before the caret, and where it starts. */
function wordAtCaret(area) {
  const upto = area.value.slice(0, area.selectionStart);
  const m = /[A-Za-z_][A-Za-z0-9_]*$/.exec(upto);
  return m ? { word: m[0], start: upto.length - m[0].length } : { word: '', start: upto.length };
}

/** Functions matching `word`: names starting with it first, then names and descriptions holding it. */
function find(word) {
  if (!word) return catalogue.slice();
  const w = word.toLowerCase();
  const starts = [], holds = [], describes = [];
  for (const f of catalogue) {
    const n = f.name.toLowerCase();
    if (n.startsWith(w)) starts.push(f);
    else if (n.indexOf(w) >= 0) holds.push(f);
    else if (w.length >= 3 && f.summary.toLowerCase().indexOf(w) >= 0) describes.push(f);
  }
  return starts.concat(holds, describes);
}

function signature(f) {
  return f.name + '(' + f.args.join(', ') + ')';
}

function isOpen() {
  return !$('fn-suggest').hidden;
}

function close(area) {
  $('fn-suggest').hidden = true;
  matches = [];
  active = -1;
  area.removeAttribute('aria-activedescendant');
  area.setAttribute('aria-expanded', 'false');
}

function showDetail() {
  const f = matches[active];
  const d = $('fn-detail');
  if (!f) { clear(d); return; }
  setChildren(d, el('code', null, signature(f)), ' — ' + f.summary + '. Example: ', el('code', null, f.example));
}

function setActive(area, i) {
  const list = $('fn-list');
  const items = list.children;
  if (!items.length) return;
  active = (i + items.length) % items.length;
  for (let k = 0; k < items.length; k++) items[k].setAttribute('aria-selected', String(k === active));
  area.setAttribute('aria-activedescendant', items[active].id);
  items[active].scrollIntoView({ block: 'nearest' });
  showDetail();
}

function open(area, found, start) {
  matches = found;
  wordStart = start;
  const list = $('fn-list');
  clear(list);
  matches.forEach(function (f, i) {
    list.appendChild(el('li', {
      id: 'fn-opt-' + i, role: 'option', 'aria-selected': 'false', class: 'fn-option', 'data-name': f.name,
      onmousedown: function (ev) { ev.preventDefault(); accept(area, i); },
      onmouseenter: function () { setActive(area, i); },
    }, el('span', { class: 'fn-sig' }, signature(f)), el('span', { class: 'fn-sum' }, f.summary)));
  });
  $('fn-suggest').hidden = false;
  area.setAttribute('aria-expanded', 'true');
  setActive(area, 0);
}

/** Replaces the word being typed by function `i` and its opening parenthesis. */
function accept(area, i) {
  const f = matches[i];
  if (!f) return;
  const v = area.value;
  const end = area.selectionStart;
  const insert = v[end] === '(' ? f.name : f.name + '(';
  area.value = v.slice(0, wordStart) + insert + v.slice(end);
  const caret = wordStart + insert.length;
  area.setSelectionRange(caret, caret);
  close(area);
  area.focus();
  area.dispatchEvent(new Event('input', { bubbles: true }));
  area.dataset.suggestAccepted = f.name;
}

function update(area, force) {
  if (!catalogue.length) return;
  const w = wordAtCaret(area);
  if (!force && w.word.length < 2) { close(area); return; }
  const found = find(w.word);
  // Nothing to offer, or only the very name already typed out.
  if (!found.length || (!force && found.length === 1 && found[0].name === w.word && area.value[area.selectionStart] === '(')) { close(area); return; }
  open(area, found, w.start);
}

/** Attaches the suggestions to the formula textarea. */
export function wireSuggestions(area) {
  area.setAttribute('aria-autocomplete', 'list');
  area.setAttribute('aria-controls', 'fn-list');
  area.setAttribute('aria-expanded', 'false');
  engine().then(function (eng) { return eng.functions(); }).then(function (list) {
    catalogue = Array.isArray(list) ? list : [];
  }).catch(function () { catalogue = []; });
  area.addEventListener('input', function (ev) {
    if (ev.isTrusted === false && area.dataset.suggestAccepted) { delete area.dataset.suggestAccepted; return; }
    update(area, false);
  });
  area.addEventListener('keydown', function (ev) {
    if ((ev.key === ' ' && ev.ctrlKey) || (ev.key === 'ArrowDown' && ev.altKey)) {
      ev.preventDefault();
      update(area, true);
      return;
    }
    if (!isOpen()) return;
    if (ev.key === 'ArrowDown') { ev.preventDefault(); setActive(area, active + 1); }
    else if (ev.key === 'ArrowUp') { ev.preventDefault(); setActive(area, active - 1); }
    else if ((ev.key === 'Enter' && !ev.ctrlKey && !ev.metaKey && !ev.shiftKey) || (ev.key === 'Tab' && !ev.shiftKey)) { ev.preventDefault(); accept(area, active); }
    else if (ev.key === 'Escape') { ev.preventDefault(); close(area); }
  });
  area.addEventListener('blur', function () { close(area); });
  area.addEventListener('click', function () { if (isOpen()) update(area, false); });
}
