// Files in and out of the browser: reading a chosen file, downloading a result.
//
// Owns: readFileText, download, slug (file names from titles).
// Must not touch: the page state or the form; what to read or save is the caller's business.
import { el } from './dom.js';
import { notice } from './notice.js';

/** Reads a chosen file as text and calls done(text); too large or unreadable files get a notice. */
export function readFileText(file, done) {
  if (file.size > 64 * 1024 * 1024) { notice(['The file ' + file.name + ' is larger than 64 MB; Kiln takes at most 10^6 data cells.'], { bad: true }); return; }
  const r = new FileReader();
  r.onload = function () { done(String(r.result)); };
  r.onerror = function () { notice(['The file ' + file.name + ' could not be read.'], { bad: true }); };
  r.readAsText(file);
}

/** Offers `text` (a string or a Blob) as a download called `name`. */
export function download(name, text, type) {
  const blob = text instanceof Blob ? text : new Blob([text], { type: type || 'application/octet-stream' });
  const url = URL.createObjectURL(blob);
  const a = el('a', { href: url, download: name });
  document.body.appendChild(a);
  a.click();
  a.remove();
  setTimeout(function () { URL.revokeObjectURL(url); }, 10000);
}

/** A file name stem from a title: lower case, ASCII letters, digits and dashes. */
export function slug(s) {
  const t = String(s || '').toLowerCase().replace(/[^a-z0-9]+/g, '-').replace(/^-+|-+$/g, '').slice(0, 60);
  return t || 'kiln-model';
}
