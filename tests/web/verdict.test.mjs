// Unit tests of the two rules the page still derives itself, each kept in one function until
// the engine reports them as typed values: the Bayes factor with its 2·SE rule
// (compare-view.js) and the reading of a disagreement from the verdict (report-view.js).
import { test } from 'node:test';
import assert from 'node:assert/strict';
import { bayesFactor } from '../../www/compare-view.js';
import { readVerdict, isDisagreement } from '../../www/report-view.js';

test('bayesFactor: log Z_A − log Z_B, SE combined in quadrature, equal within 2·SE', () => {
  // SEs 0.375 and 0.5 combine to √(0.140625 + 0.25) = 0.625 exactly; 2·SE = 1.25.
  assert.deepEqual(bayesFactor({ log_z: 1.25, log_z_se: 0.375 }, { log_z: 0, log_z_se: 0.5 }), { value: 1.25, se: 0.625, withinErrors: true });
  assert.equal(bayesFactor({ log_z: 1.2500001, log_z_se: 0.375 }, { log_z: 0, log_z_se: 0.5 }).withinErrors, false);
  assert.equal(bayesFactor({ log_z: -1.25, log_z_se: 0.5 }, { log_z: 0, log_z_se: 0.375 }).withinErrors, true);
  const bf = bayesFactor({ log_z: -3.2, log_z_se: 0.03 }, { log_z: -4, log_z_se: 0.04 });
  assert.ok(Math.abs(bf.value - 0.8) < 1e-12 && Math.abs(bf.se - 0.05) < 1e-12 && bf.withinErrors === false);
  // A missing SE counts as zero.
  assert.deepEqual(bayesFactor({ log_z: 2 }, { log_z: 1 }), { value: 1, se: 0, withinErrors: false });
  // No Bayes factor without two finite log Z values.
  assert.equal(bayesFactor(null, { log_z: 1 }), null);
  assert.equal(bayesFactor({ log_z: NaN }, { log_z: 1 }), null);
  assert.equal(bayesFactor({ log_z: 1 }, { log_z: '1' }), null);
});

test('readVerdict: a disagreement from the verdict text or a cross-check, and the sentence without its tag', () => {
  assert.deepEqual(readVerdict({ verdict: 'DISAGREEMENT: the grid check is 5 SE away' }), { disagreement: true, text: 'the grid check is 5 SE away' });
  assert.deepEqual(readVerdict({ verdict: 'the checks disagree with the sampler' }), { disagreement: true, text: 'the checks disagree with the sampler' });
  assert.deepEqual(readVerdict({ verdict: 'all three checks agree', cross_checks: [{ agrees: true }, null] }), { disagreement: false, text: 'all three checks agree' });
  assert.deepEqual(readVerdict({ verdict: 'see below', cross_checks: [{ agrees: true }, { agrees: false }] }), { disagreement: true, text: 'see below' });
  assert.deepEqual(readVerdict({ cross_checks: [{ agrees: false }] }), { disagreement: true, text: 'the cross-checks disagree' });
  assert.deepEqual(readVerdict({}), { disagreement: false, text: '' });
  assert.deepEqual(readVerdict(null), { disagreement: false, text: '' });
  assert.equal(isDisagreement({ verdict: 'DISAGREEMENT: x' }), true);
  assert.equal(isDisagreement({ verdict: 'agree', cross_checks: [{ agrees: null }] }), false);
  assert.equal(isDisagreement(null), false);
});
