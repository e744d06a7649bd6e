// Unit tests of www/csv.js: data columns as CSV text and back, and the errors it names.
import { test } from 'node:test';
import assert from 'node:assert/strict';
import { parseCsv, columnsToCsv } from '../../www/csv.js';

test('comma, semicolon and tab files with a header row', () => {
  assert.deepEqual(parseCsv('a,b\n1,2\n3,4\n'), { columns: { a: [1, 3], b: [2, 4] }, names: ['a', 'b'], rows: 2, errors: [] });
  assert.deepEqual(parseCsv('x;y\n1.5;2\n').columns, { x: [1.5], y: [2] });
  assert.deepEqual(parseCsv('x\ty\n-1\t2e3\n').columns, { x: [-1], y: [2000] });
  // A header with both ',' and ';' is comma separated.
  assert.deepEqual(parseCsv('a,b;c\n1,2\n').names, ['a', 'b;c']);
  assert.deepEqual(parseCsv('a,b\r\n1,2\r\n').columns, { a: [1], b: [2] });
  // Quoted fields, names trimmed, blank lines skipped.
  assert.deepEqual(parseCsv(' a , "b"\n"1", 2\n\n3,4').columns, { a: [1, 3], b: [2, 4] });
  assert.deepEqual(parseCsv(''), { columns: null, names: [], rows: 0, errors: [] });
});

test('errors name the line and the column', () => {
  assert.deepEqual(parseCsv('a,b\n1,x\n').errors, ['error: `x` is not a number\n --> data, line 2, column 2 (b)\n']);
  assert.deepEqual(parseCsv('a,b\n1\n').errors, ['error: this row has 1 value, the header has 2\n --> data, line 2\n']);
  assert.deepEqual(parseCsv('a,a\n1,2\n').errors, ['error: the column name `a` appears twice\n --> data, line 1\n']);
  assert.deepEqual(parseCsv('a,\n1,2\n').errors, ['error: column 2 of the header row has no name\n --> data, line 1\n']);
  assert.match(parseCsv('1a\n1\n').errors[0], /^error: the column name `1a` is not a valid name .*\n --> data, line 1, column 1\n$/);
  // Line numbers count the skipped blank line and the lines inside a quoted field.
  assert.match(parseCsv('a\n1\n\nzz\n').errors[0], /--> data, line 4,/);
  assert.match(parseCsv('a,b\n"x\ny",1\n2,q\n').errors[1], /--> data, line 4, column 2 \(b\)/);
  // At most six errors.
  assert.equal(parseCsv('a\n' + 'x\n'.repeat(20)).errors.length, 6);
});

test('columnsToCsv writes a header, pads short columns and quotes where needed', () => {
  assert.equal(columnsToCsv({ a: [1, 2], 'b c': [3] }), 'a,b c\n1,3\n2,\n');
  assert.equal(columnsToCsv({ 'x,y': [1] }), '"x,y"\n1\n');
  assert.equal(columnsToCsv({}), '');
  const data = { t: [0.1, -2e-7, 1e21, 123456789.125], n: [1, 2, 3, 4] };
  assert.deepEqual(parseCsv(columnsToCsv(data)).columns, data);
});
