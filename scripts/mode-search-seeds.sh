#!/usr/bin/env bash
# The mode search over many seeds: how many modes `kiln check` finds, and how many limitations
# its coverage reports, counted over seeds 1..N.
#   bash scripts/mode-search-seeds.sh [N] [SPEC...]     (default: 200 seeds of the two
#   far-light-mode targets in bench/targets/)
set -euo pipefail
cd "$(dirname "$0")/.."
n="${1:-200}"; shift || true
specs=("$@"); [ ${#specs[@]} -eq 0 ] && specs=(bench/targets/far-light-mode-2d.json bench/targets/far-light-mode-3d.json)
cargo build --release --quiet --bin kiln
tmp="$(mktemp)"
for spec in "${specs[@]}"; do
  echo "$spec: (modes found, limitations) → seeds"
  for s in $(seq 1 "$n"); do
    python3 -c "import json,sys; d=json.load(open(sys.argv[1])); d.setdefault('settings',{})['seed']=int(sys.argv[2]); print(json.dumps(d))" "$spec" "$s" > "$tmp"
    ./target/release/kiln check "$tmp" --json | python3 -c "import json,sys; d=json.load(sys.stdin); print(len(d['modes']), len(d['mode_coverage']['limitations']))"
  done | sort | uniq -c | awk '{print "  (" $2 ", " $3 ") → " $1}'
done
rm -f "$tmp"
