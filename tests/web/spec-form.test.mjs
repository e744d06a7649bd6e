// Unit tests of www/spec-form.js: spec -> form -> spec keeps every demo and every key the
// form cannot show, and the form's own errors read like the engine's.
import { test } from 'node:test';
import assert from 'node:assert/strict';
import {
  SETTING_KEYS, DEFAULT_SETTINGS, emptyForm, newComponent, formToSpec, specToForm, sanitiseForm, sanitiseSettings,
} from '../../www/spec-form.js';
import { columnsToCsv } from '../../www/csv.js';
import { DEMOS } from './demos.mjs';

// The page shows these run settings when a spec leaves them out (the defaults in the form).
// The engine's defaults (src/run/settings.rs: 8 chains × (500 warm-up + 1000 kept draws)).
const SHOWN_DEFAULTS = { chains: 8, draws: 1000, warmup: 500, method: 'alternating', integrator: 'nuts' };

test('every demo survives spec -> form -> spec (the shown defaults filled in)', () => {
  for (const { file, spec } of DEMOS) {
    const loaded = specToForm(spec);
    const back = formToSpec(loaded.form, loaded.settings);
    assert.deepEqual(back.errors, [], file);
    // The data table goes to the engine as CSV text (the engine reads it, in the page as on the
    // command line), so a demo's columns come back as the text the table shows.
    const expected = { ...spec, settings: { ...SHOWN_DEFAULTS, ...spec.settings } };
    if (spec.data && !spec.mixture) expected.data = columnsToCsv(spec.data);
    assert.deepEqual(back.spec, expected, file);
    // And once more: the result is a fixed point.
    const again = specToForm(back.spec);
    assert.deepEqual(formToSpec(again.form, again.settings).spec, expected, file + ' (second pass)');
  }
});

test('a demo with data shows it as CSV text, a mixture demo as component rows', () => {
  const mix = DEMOS.find((d) => Array.isArray(d.spec.mixture));
  const f = specToForm(mix.spec).form;
  assert.equal(f.kind, 'mixture');
  assert.equal(f.mixture.length, mix.spec.mixture.length);
  const c0 = mix.spec.mixture[0];
  assert.equal(f.mixture[0].mean, c0.mean.join(', '));
  assert.equal(f.mixture[0].shape, 'cov');
  assert.equal(f.mixture[0].spread, c0.cov.map((row) => row.join(', ')).join('; '));
  const withData = DEMOS.find((d) => d.spec.data);
  const names = Object.keys(withData.spec.data);
  const text = specToForm(withData.spec).form.dataCsv;
  assert.equal(text.split('\n')[0], names.join(','));
  assert.equal(text.split('\n').length, withData.spec.data[names[0]].length + 2); // header, rows, final ''
});

test('keys the form cannot show are kept verbatim and come back', () => {
  const spec = {
    title: 42,
    variables: [{ name: 'x', lower: 0, prior: 'flat' }],
    energy: 'x',
    log_density: 'ignored by the form',
    data: { a: [1, '2'] },
    settings: { seed: '7', chains: 2, tune: true },
    extra_key: [1],
  };
  const { form, settings } = specToForm(spec);
  assert.equal(form.kind, 'energy');
  assert.equal(form.title, '');
  assert.equal(settings.seed, '7');
  assert.equal(settings.chains, '2');
  assert.deepEqual(form.extraSettings, { tune: true });
  assert.deepEqual(form.variables, [{ name: 'x', size: '', lower: '0', upper: '', prior: 'flat', extra: null }]);
  const back = formToSpec(form, settings);
  assert.deepEqual(back.errors, []);
  assert.deepEqual(back.spec, {
    title: 42,
    variables: [{ name: 'x', lower: 0, prior: 'flat' }],
    energy: 'x',
    log_density: 'ignored by the form',
    data: { a: [1, '2'] },
    settings: { tune: true, seed: 7, chains: 2, draws: 1000, warmup: 500, method: 'alternating', integrator: 'nuts' },
    extra_key: [1],
  });
});

test('a mixture component with both sd and cov keeps both', () => {
  const spec = { variables: [{ name: 'x' }], mixture: [{ weight: 1, mean: [0], cov: [[1]], sd: [2], tag: 'k' }] };
  const loaded = specToForm(spec);
  assert.equal(loaded.form.mixture[0].shape, 'cov');
  assert.deepEqual(formToSpec(loaded.form, loaded.settings).spec.mixture, [{ sd: [2], tag: 'k', weight: 1, mean: [0], cov: [[1]] }]);
});

test('the form reads covariance rows, sds and brackets', () => {
  const form = emptyForm();
  form.kind = 'mixture';
  form.variables = [{ name: 'a', lower: '', upper: '' }, { name: 'b', lower: '', upper: '' }];
  form.mixture = [
    { weight: '2', mean: '[1, -1]', shape: 'cov', spread: '1, 0.3; 0.3, 2', extra: null },
    { weight: '0.5', mean: '0 0', shape: 'cov', spread: '1 0\n0 1', extra: null },
    { weight: '1e-3', mean: '3,3', shape: 'sd', spread: '0.5, 0.25', extra: null },
  ];
  const { spec, errors } = formToSpec(form, DEFAULT_SETTINGS);
  assert.deepEqual(errors, []);
  assert.deepEqual(spec.mixture, [
    { weight: 2, mean: [1, -1], cov: [[1, 0.3], [0.3, 2]] },
    { weight: 0.5, mean: [0, 0], cov: [[1, 0], [0, 1]] },
    { weight: 0.001, mean: [3, 3], sd: [0.5, 0.25] },
  ]);
  assert.equal('data' in spec, false);
  assert.equal('energy' in spec, false);
});

test('local errors are rendered like the engine\'s, with where they are', () => {
  const form = emptyForm();
  form.variables = [{ name: ' x ', lower: 'abc', upper: '' }, { name: '', lower: '', upper: '1..2' }];
  form.formula = 'x^2';
  form.dataCsv = 'a\nq\n';
  const { errors, spec } = formToSpec(form, { ...DEFAULT_SETTINGS, seed: '-1', chains: '', draws: '2.5' });
  // The data is the engine's to read (and to report on): it goes into the spec as typed.
  assert.equal(spec.data, 'a\nq\n');
  assert.deepEqual(errors, [
    'error: the lower bound `abc` is not a number\n --> unknowns, row 1 (x)\n',
    'error: the upper bound `1..2` is not a number\n --> unknowns, row 2 (no name)\n',
    'error: the seed must be a whole number of at least 0, not `-1`\n --> run settings\n',
    'error: the number of chains is empty\n --> run settings\n',
    'error: the number of kept draws must be a whole number of at least 1, not `2.5`\n --> run settings\n',
  ]);
  assert.equal(spec.variables[0].name, 'x');
  const mix = emptyForm();
  mix.kind = 'mixture';
  mix.mixture = [{ weight: 'w', mean: '1, b', shape: 'sd', spread: '1, -', extra: null }];
  assert.deepEqual(formToSpec(mix, DEFAULT_SETTINGS).errors, [
    'error: the weight `w` is not a number\n --> mixture, component 1\n',
    'error: `b` in the mean is not a number\n --> mixture, component 1\n',
    'error: `-` in the standard deviations is not a number\n --> mixture, component 1\n',
  ]);
});

test('vectors and priors: a size, element names or a prior in the unknowns table', () => {
  const form = emptyForm();
  form.variables = [
    { name: 'mu', size: ' 3 ', lower: '', upper: '', prior: ' normal(0, 10) ' },
    { name: 'site', size: 'north, south', lower: '0', upper: '', prior: '' },
    { name: 's', size: '', lower: '0', upper: '', prior: '' },
  ];
  form.formula = 'sum(logd_normal(y, mu[g], s))';
  const { spec, errors } = formToSpec(form, DEFAULT_SETTINGS);
  assert.deepEqual(errors, []);
  assert.deepEqual(spec.variables, [
    { name: 'mu', size: 3, prior: 'normal(0, 10)' },
    { name: 'site', elements: ['north', 'south'], lower: 0 },
    { name: 's', lower: 0 },
  ]);
  const back = specToForm(spec).form.variables;
  assert.deepEqual(back.map((v) => [v.name, v.size, v.prior]), [['mu', '3', 'normal(0, 10)'], ['site', 'north, south', ''], ['s', '', '']]);
  // What the table cannot show exactly is kept as written.
  const odd = specToForm({ variables: [{ name: 'm', size: 2, elements: ['a', 'b'], prior: 7 }], energy: '0' }).form.variables[0];
  assert.deepEqual(odd.extra, { size: 2, elements: ['a', 'b'], prior: 7 });
  // CSV text in a spec stays text.
  assert.equal(specToForm({ variables: [], energy: '0', data: 'y\n1\n' }).form.dataCsv, 'y\n1\n');
});

test('settings: unknown method and integrator fall back to the defaults', () => {
  const s = formToSpec(emptyForm(), { ...DEFAULT_SETTINGS, method: 'other', integrator: 'hmc', seed: ' 12 ' }).settings;
  assert.deepEqual(s, { seed: 12, chains: 8, draws: 1000, warmup: 500, method: 'alternating', integrator: 'hmc' });
  assert.deepEqual(SETTING_KEYS, ['seed', 'chains', 'draws', 'warmup', 'method', 'integrator']);
});

test('specToForm refuses what is not a JSON object', () => {
  for (const bad of [null, [], 'x', 3]) assert.throws(() => specToForm(bad), /a spec must be a JSON object/);
});

test('newComponent has one mean and one sd per unknown', () => {
  const f = emptyForm();
  f.variables.push({ name: 'y', size: '', lower: '', upper: '', prior: '' });
  assert.deepEqual(newComponent(f), { weight: '1', mean: '0, 0', shape: 'sd', spread: '1, 1', extra: null });
  f.variables = [];
  assert.deepEqual(newComponent(f), { weight: '1', mean: '0', shape: 'sd', spread: '1', extra: null });
});

test('a stored form is sanitised without losing its texts', () => {
  assert.deepEqual(sanitiseForm(null), emptyForm());
  assert.deepEqual(sanitiseForm({ title: 5, notes: 'n', kind: 'bogus', formula: 'x', variables: [null, { name: 'a', lower: 1 }], mixture: 'x', extra: [], dataCsv: 'a\n1\n' }), {
    title: '5', notes: 'n', kind: 'energy', formula: 'x', dataCsv: 'a\n1\n',
    variables: [{ name: 'a', size: '', lower: '1', upper: '', prior: '', extra: null }], mixture: [], extra: {}, extraSettings: {},
  });
  assert.deepEqual(sanitiseSettings({ seed: 3, method: 'joint', bogus: 1 }), { ...DEFAULT_SETTINGS, seed: '3', method: 'joint' });
  assert.deepEqual(sanitiseSettings('x'), DEFAULT_SETTINGS);
});
