#!/usr/bin/env bash
# Compares two builds of kiln on every demo target: `run --seed 1 --json`, `check --json`, the
# run and check reports, a comparison, and (with --bench) the accuracy columns of
# `bench --quick --json` (timing columns aside). Used when a change must not change any number,
# e.g. moving code between files.
#   bash scripts/same-output.sh OLD_KILN NEW_KILN [--bench]
set -euo pipefail
old="$1"; new="$2"; bench="${3:-}"
cd "$(dirname "$0")/.."
out="$(mktemp -d)"
status=0
same() { if cmp -s "$1" "$2"; then echo "same       $3"; else echo "DIFFERENT  $3"; diff <(head -c 4000 "$1") <(head -c 4000 "$2") | head -20; status=1; fi; }
for f in demo-targets/*.json; do
  b="$(basename "$f" .json)"
  for kind in old new; do
    bin="$old"; [ "$kind" = new ] && bin="$new"
    "$bin" run "$f" --seed 1 --json > "$out/$kind-$b-run.json"
    "$bin" check "$f" --json > "$out/$kind-$b-check.json"
    "$bin" run "$f" --seed 2 --draws 300 --warmup 200 > "$out/$kind-$b-run.txt"
    "$bin" check "$f" > "$out/$kind-$b-check.txt"
  done
  for x in run.json check.json run.txt check.txt; do same "$out/old-$b-$x" "$out/new-$b-$x" "$b $x"; done
done
first=demo-targets/default-two-modes.json; second=demo-targets/fish-cohorts-label-switching.json
"$old" compare "$first" "$second" --draws 300 --warmup 200 --json > "$out/old-compare.json"
"$new" compare "$first" "$second" --draws 300 --warmup 200 --json > "$out/new-compare.json"
same "$out/old-compare.json" "$out/new-compare.json" "compare json"
if [ "$bench" = --bench ]; then
  # Timing columns differ from run to run; the accuracy columns must not.
  strip='import json,sys; r=json.load(open(sys.argv[1])); print(json.dumps([{k:v for k,v in row.items() if k not in ("seconds",)} for row in r["rows"]], indent=1))'
  "$old" bench --quick --json --no-speed > "$out/old-bench.json"
  "$new" bench --quick --json --no-speed > "$out/new-bench.json"
  python3 -c "$strip" "$out/old-bench.json" > "$out/old-bench.rows"
  python3 -c "$strip" "$out/new-bench.json" > "$out/new-bench.rows"
  same "$out/old-bench.rows" "$out/new-bench.rows" "bench --quick accuracy rows"
fi
rm -rf "$out"
exit $status
