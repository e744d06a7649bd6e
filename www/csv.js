// Data columns written as CSV text (the page's data table). The page reads no CSV itself: the
// data table goes to the engine as CSV text inside the spec, and the engine's `csv` crate reads
// it (RFC 4180, the same reader as the command line's); `read_data_csv` gives the summary.
//
// Owns: columnsToCsv (a spec's columns shown as CSV text in the data table).
// Must not touch: the DOM, the page state or the engine (pure; unit-tested under Node).

function csvField(s) {
  s = String(s);
  return /[",;\n\r\t]/.test(s) ? '"' + s.replace(/"/g, '""') + '"' : s;
}

/** {name: values[]} -> CSV text with a header row (shorter columns leave empty fields). */
export function columnsToCsv(data) {
  const names = Object.keys(data);
  if (!names.length) return '';
  let n = 0;
  for (const k of names) n = Math.max(n, Array.isArray(data[k]) ? data[k].length : 0);
  const lines = [names.map(csvField).join(',')];
  for (let i = 0; i < n; i++) {
    lines.push(names.map(function (k) { const c = data[k]; return Array.isArray(c) && i < c.length ? csvField(c[i]) : ''; }).join(','));
  }
  return lines.join('\n') + '\n';
}
