// Data columns as CSV text, both ways.
//
// Owns: parseCsv (RFC 4180-style: quotes and doubled quotes; the delimiter , ; or tab is taken
// from the header row) and columnsToCsv. Errors are rendered like the engine's (`error: …` and
// a ` --> data, line …` location).
// Must not touch: the DOM, the page state or the engine (pure; unit-tested under Node).
import { parseNumber } from './numbers.js';

function splitCsv(text, delim) {
  const records = [];
  let row = [], field = '', inQ = false, line = 1, startLine = 1, i = 0;
  const n = text.length;
  while (i < n) {
    const c = text[i];
    if (inQ) {
      if (c === '"') { if (text[i + 1] === '"') { field += '"'; i += 2; continue; } inQ = false; i++; continue; }
      if (c === '\n') line++;
      field += c; i++; continue;
    }
    if (c === '"' && field.trim() === '') { field = ''; inQ = true; i++; continue; }
    if (c === delim) { row.push(field); field = ''; i++; continue; }
    if (c === '\r') { i++; continue; }
    if (c === '\n') { row.push(field); records.push({ line: startLine, fields: row }); row = []; field = ''; line++; startLine = line; i++; continue; }
    field += c; i++;
  }
  if (field.length || row.length) { row.push(field); records.push({ line: startLine, fields: row }); }
  return records.filter(function (r) { return !(r.fields.length === 1 && r.fields[0].trim() === ''); });
}

/**
 * CSV with a header row -> {columns: {name: numbers[]}, names, rows, errors}. At most six
 * errors are collected; `columns` is null for empty text.
 */
export function parseCsv(text) {
  const first = (text.split('\n').find(function (l) { return l.trim().length; }) || '');
  const delim = first.indexOf('\t') >= 0 ? '\t' : (first.indexOf(';') >= 0 && first.indexOf(',') < 0) ? ';' : ',';
  const recs = splitCsv(text, delim);
  const errors = [];
  if (!recs.length) return { columns: null, names: [], rows: 0, errors: errors };
  const names = recs[0].fields.map(function (s) { return s.trim(); });
  names.forEach(function (nm, j) {
    if (!nm) errors.push('error: column ' + (j + 1) + ' of the header row has no name\n --> data, line ' + recs[0].line + '\n');
    else if (!/^[A-Za-z_][A-Za-z0-9_]*$/.test(nm)) errors.push('error: the column name `' + nm + '` is not a valid name (letters, digits and _, not starting with a digit)\n --> data, line ' + recs[0].line + ', column ' + (j + 1) + '\n');
    else if (names.indexOf(nm) !== j) errors.push('error: the column name `' + nm + '` appears twice\n --> data, line ' + recs[0].line + '\n');
  });
  const cols = names.map(function () { return []; });
  for (let r = 1; r < recs.length && errors.length < 6; r++) {
    const f = recs[r].fields;
    if (f.length !== names.length) {
      errors.push('error: this row has ' + f.length + (f.length === 1 ? ' value' : ' values') + ', the header has ' + names.length + '\n --> data, line ' + recs[r].line + '\n');
      continue;
    }
    for (let j = 0; j < f.length; j++) {
      const v = parseNumber(f[j]);
      if (v === null) {
        errors.push('error: `' + f[j].trim().slice(0, 40) + '` is not a number\n --> data, line ' + recs[r].line + ', column ' + (j + 1) + ' (' + names[j] + ')\n');
        if (errors.length >= 6) break;
      } else cols[j].push(v);
    }
  }
  const columns = {};
  names.forEach(function (nm, j) { columns[nm] = cols[j]; });
  return { columns: columns, names: names, rows: recs.length - 1, errors: errors };
}

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
