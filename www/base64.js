// Bytes as base64 text and back (standard alphabet for the single page's embedded engine,
// the URL-safe one without padding for share links).
//
// Owns: bytesToBase64, base64ToBytes, bytesToBase64url, base64urlToBytes.
// Must not touch: the DOM, the page state or the network (pure; unit-tested under Node).

/** Uint8Array -> base64 (in chunks, so that large inputs do not overflow the call stack). */
export function bytesToBase64(bytes) {
  let s = '';
  const chunk = 0x8000;
  for (let i = 0; i < bytes.length; i += chunk) {
    s += String.fromCharCode.apply(null, bytes.subarray(i, i + chunk));
  }
  return btoa(s);
}

/** base64 -> Uint8Array. */
export function base64ToBytes(text) {
  const bin = atob(text);
  const out = new Uint8Array(bin.length);
  for (let i = 0; i < bin.length; i++) out[i] = bin.charCodeAt(i);
  return out;
}

/** Uint8Array -> base64url without padding. */
export function bytesToBase64url(bytes) {
  return bytesToBase64(bytes).replace(/\+/g, '-').replace(/\//g, '_').replace(/=+$/, '');
}

/** base64url (padding optional) -> Uint8Array; other characters are refused with a message. */
export function base64urlToBytes(t) {
  if (!/^[A-Za-z0-9_-]*$/.test(t)) throw new Error('the link contains characters that are not base64url');
  let s = t.replace(/-/g, '+').replace(/_/g, '/');
  while (s.length % 4) s += '=';
  return base64ToBytes(s);
}
