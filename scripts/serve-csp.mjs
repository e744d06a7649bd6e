// The Content-Security-Policy of the served page (also in www/index.html's meta tag; a test
// checks that the two are equal). Nothing loads from or connects to anywhere but the page.
export const CSP = "default-src 'none'; script-src 'self' 'wasm-unsafe-eval'; worker-src 'self' blob:; " +
  "connect-src 'self'; style-src 'self'; img-src 'self' data: blob:; base-uri 'none'; form-action 'none'";
