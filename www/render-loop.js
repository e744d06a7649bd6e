// When the page redraws: at once (renderAll) or once in the next animation frame (scheduleRender).
//
// Owns: the render queue. main.js hands in, with setRenderer, the function that draws
// everything; modules below the views call renderAll / scheduleRender without knowing the views.
// Must not touch: the DOM or the page state itself.

let renderer = null;
let queued = false;

export function setRenderer(fn) {
  renderer = fn;
}

export function renderAll() {
  if (renderer) renderer();
}

export function scheduleRender() {
  if (queued) return;
  queued = true;
  requestAnimationFrame(function () { queued = false; renderAll(); });
}
