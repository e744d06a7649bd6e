// The demo specs in demo-targets/, read from disk (shared by the unit tests).
import fs from 'node:fs';
import path from 'node:path';
import url from 'node:url';

export const ROOT = path.resolve(path.dirname(url.fileURLToPath(import.meta.url)), '..', '..');
const dir = path.join(ROOT, 'demo-targets');
export const DEMOS = fs.readdirSync(dir).filter((f) => f.endsWith('.json')).sort()
  .map((file) => ({ file, spec: JSON.parse(fs.readFileSync(path.join(dir, file), 'utf8')) }));
if (DEMOS.length < 6) throw new Error('expected the six demos in demo-targets/, found ' + DEMOS.length);
