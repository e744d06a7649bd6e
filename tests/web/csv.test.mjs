// Unit tests of www/csv.js: data columns written as CSV text (the engine reads them; its reader
// is tested in src/model/table.rs and through the page in tests/e2e/).
import { test } from 'node:test';
import assert from 'node:assert/strict';
import { columnsToCsv } from '../../www/csv.js';

test('columnsToCsv writes a header, pads short columns and quotes where needed', () => {
  assert.equal(columnsToCsv({ a: [1, 2], 'b c': [3] }), 'a,b c\n1,3\n2,\n');
  assert.equal(columnsToCsv({ 'x,y': [1] }), '"x,y"\n1\n');
  assert.equal(columnsToCsv({}), '');
  // Numbers are written as JavaScript prints them: the shortest text that reads back exactly.
  assert.equal(columnsToCsv({ t: [0.1, -2e-7, 1e21, 123456789.125] }), 't\n0.1\n-2e-7\n1e+21\n123456789.125\n');
});
