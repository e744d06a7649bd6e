// Building the page's markup from data, safely.
//
// Owns: $, el, append, clear, setChildren. Strings always become text nodes or attribute
// values: nothing here can set HTML, and event handlers must be functions.
// Must not touch: the page state, the engine, or any particular element's meaning.

/** The element with this id. */
export function $(id) {
  return document.getElementById(id);
}

/** el('td', {class: 'num', title: '…'}, 'text', childNode, […]): strings become text nodes. */
export function el(tag, props) {
  const e = document.createElement(tag);
  if (props) {
    for (const k of Object.keys(props)) {
      const v = props[k];
      if (v == null || v === false) continue;
      if (k === 'class') e.className = v;
      else if (k === 'text') e.textContent = String(v);
      else if (k === 'dataset') Object.assign(e.dataset, v);
      else if (k.slice(0, 2) === 'on') {
        if (typeof v !== 'function') throw new Error('event handlers must be functions');
        e.addEventListener(k.slice(2), v);
      } else if (k === 'value' || k === 'checked' || k === 'disabled' || k === 'selected' || k === 'hidden') e[k] = v;
      else e.setAttribute(k, v === true ? '' : String(v));
    }
  }
  for (let i = 2; i < arguments.length; i++) append(e, arguments[i]);
  return e;
}

/** Appends children: nodes as they are, arrays flattened, anything else as text; null and false skipped. */
export function append(parent) {
  for (let i = 1; i < arguments.length; i++) {
    const c = arguments[i];
    if (c == null || c === false) continue;
    if (Array.isArray(c)) { for (const x of c) append(parent, x); continue; }
    parent.appendChild(c instanceof Node ? c : document.createTextNode(String(c)));
  }
}

export function clear(node) {
  while (node.firstChild) node.removeChild(node.firstChild);
}

/** Replaces the children of `node` with the other arguments (as append takes them). */
export function setChildren(node) {
  clear(node);
  for (let i = 1; i < arguments.length; i++) append(node, arguments[i]);
}
