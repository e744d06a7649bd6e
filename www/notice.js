// The page-level message bar (status, errors, an Undo button).
//
// Owns: the #notice element: notice, noticeErrors, hideNotice.
// Must not touch: the page state (an action is a callback the caller hands in).
import { $, el, append, setChildren } from './dom.js';

/** Shows `parts` (text and nodes); opt.bad marks an error, opt.action = {label, fn} adds a button. */
export function notice(parts, opt) {
  opt = opt || {};
  const box = $('notice');
  const body = $('notice-body');
  setChildren(body, parts);
  if (opt.action) {
    append(body, ' ');
    append(body, el('button', { type: 'button', class: 'small', 'data-testid': 'notice-action', onclick: function () { opt.action.fn(); hideNotice(); } }, opt.action.label));
  }
  box.classList.toggle('bad', !!opt.bad);
  box.hidden = false;
}

/** An error notice: `intro`, then the rendered errors as preformatted text. */
export function noticeErrors(intro, errors) {
  notice([intro, el('pre', null, errors.join('\n'))], { bad: true });
}

export function hideNotice() {
  $('notice').hidden = true;
}
