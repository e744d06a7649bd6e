// The page reads the engine's typed verdict and never derives one from text (the rule is the
// engine's, tested in src/estimate/crosscheck.rs; the Bayes factor's in src/run/outcome.rs).
import { test } from 'node:test';
import assert from 'node:assert/strict';
import fs from 'node:fs';
import path from 'node:path';
import url from 'node:url';
import { verdictOf } from '../../www/report-view.js';

const WWW = path.resolve(path.dirname(url.fileURLToPath(import.meta.url)), '..', '..', 'www');

test('verdictOf passes the typed verdict through and has a cautious default', () => {
  const v = { state: 'agree', search_limited: false, headline: 'h', sentence: 's', voted: ['grid'], abstained: [] };
  assert.equal(verdictOf({ verdict: v }), v);
  // A result without a typed verdict (an old file, or none) is never read as agreement.
  for (const r of [null, {}, { verdict: 'the checks agree' }]) {
    const d = verdictOf(r);
    assert.equal(d.state, 'not_enough_evidence');
    assert.equal(d.search_limited, true);
  }
});

test('no page module matches the verdict text or computes a Bayes factor', () => {
  for (const f of fs.readdirSync(WWW).filter((n) => n.endsWith('.js'))) {
    const src = fs.readFileSync(path.join(WWW, f), 'utf8');
    assert.ok(!/DISAGREE/.test(src), `${f} mentions DISAGREE`);
    assert.ok(!/\/disagree\//i.test(src), `${f} matches 'disagree' with a regular expression`);
    assert.ok(!/log_z\s*-\s*\w+\.log_z/.test(src), `${f} subtracts two log Z values`);
  }
});
