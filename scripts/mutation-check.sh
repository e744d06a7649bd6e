#!/usr/bin/env bash
# Mutation check: breaks the code on purpose, one mutation at a time, and shows that the tests
# fail each time. A mutation that the tests do not catch "survives"; the script then exits 1.
#
#   bash scripts/mutation-check.sh            # every mutation
#   bash scripts/mutation-check.sh a b        # only these (ids below)
#
# Mutations (each a literal replacement in one file; the script stops with an error if the
# text to replace is no longer there, so a refactor cannot silently turn a mutation off):
#   a   the log Z estimator returns the base's value: the tempering correction
#       g(0) − g(1) + log mean p(1|x) − log mean p(0|x) is dropped (src/sample/series.rs)
#   a2  that correction scaled by 0.9
#   a3  the reported SE of log Z halved (src/estimate/summary.rs)
#   b   the gradient of exp scaled by 0.9 in the reverse sweep (src/formula/tape/eval.rs)
#   c   the verdict's agreement rule loosened from 4 to 40 standard errors
#       (src/estimate/crosscheck.rs)
#
# The real tree is never modified: HEAD is exported with `git archive` into
# /tmp/kiln-mutation/tree (afresh for each mutation, so uncommitted changes are not tested),
# and every build shares CARGO_TARGET_DIR=/tmp/kiln-mutation/target, so only the mutated crate
# is rebuilt. Tests are built with the `calibration` profile (release optimisation without the
# slow link-time optimisation). Each mutation runs all of its targeted test commands (the
# table gives each one's result). Before the mutations the same commands run on the unmutated
# copy, and every one must pass (otherwise a "caught" mutation would prove nothing).
# Prints a markdown table: mutation | tests run (each command's result) | suite failed? |
# first failing test (the first reported, in the order the tests finished).
set -euo pipefail
repo="$(cd "$(dirname "$0")/.." && pwd)"
work=/tmp/kiln-mutation
tree="$work/tree"
export CARGO_TARGET_DIR="$work/target"
mkdir -p "$work" "$CARGO_TARGET_DIR"

T="cargo test --profile calibration"
# id | file | text to replace | replacement | description | test commands (';'-separated)
MUTATIONS=(
  "a|src/sample/series.rs|log_zeta + g0 - g1 + self.lse1 - self.lse0|log_zeta + 0.0 * (g0 - g1 + self.lse1 - self.lse0)|log Z estimator: the tempering correction dropped (returns the base's value)|$T --test sampler;$T --test cli_run"
  "a2|src/sample/series.rs|log_zeta + g0 - g1 + self.lse1 - self.lse0|log_zeta + 0.9 * (g0 - g1 + self.lse1 - self.lse0)|log Z estimator: the tempering correction ×0.9|$T --test sampler;$T --test cli_run"
  "a3|src/estimate/summary.rs|} = log_z_with_controls(plan, records);|} = log_z_with_controls(plan, records); let log_z_se = 0.5 * log_z_se;|the reported SE of log Z halved|$T --test sampler;$T --test cli_run"
  "b|src/formula/tape/eval.rs|Op::Exp(a) => add!(a, g * vals[o]),|Op::Exp(a) => add!(a, g * vals[o] * 0.9),|gradient of exp ×0.9 (reverse sweep)|$T --test gradients;$T --lib formula"
  "c|src/estimate/crosscheck.rs|pub const AGREEMENT_SIGMAS: f64 = 4.0;|pub const AGREEMENT_SIGMAS: f64 = 40.0;|verdict rule: agreement within 40 SE instead of 4|$T --lib crosscheck;$T --test sampler"
)

want=("$@")
selected() {
  [ ${#want[@]} -eq 0 ] && return 0
  local w
  for w in "${want[@]}"; do [ "$w" = "$1" ] && return 0; done
  return 1
}

fresh_tree() {
  rm -rf "$tree"
  mkdir -p "$tree"
  git -C "$repo" archive HEAD | tar -x -m -C "$tree"   # -m: fresh mtimes, so cargo rebuilds
}

# apply FILE FROM TO: replaces exactly one occurrence; fails loudly otherwise.
apply() {
  python3 - "$tree/$1" "$2" "$3" <<'PY'
import sys
path, old, new = sys.argv[1], sys.argv[2], sys.argv[3]
text = open(path, encoding="utf-8").read()
n = text.count(old)
if n != 1:
    sys.exit(f"mutation-check: expected the text once in {path}, found it {n} times: {old!r}")
changed = text.replace(old, new)
if changed == text:
    sys.exit(f"mutation-check: the replacement did not change {path}")
open(path, "w", encoding="utf-8").write(changed)
PY
}

# run_tests "CMD1;CMD2" LOG: runs every command (each is one test binary or a filtered set).
# Sets FAILED (yes/no), FIRST (the first test reported as failing, with its command), RAN (the
# commands with their results: passed, or how many tests failed).
run_tests() {
  local cmds="$1" log="$2" c short one n
  FAILED=no FIRST="" RAN=""
  : >"$log"
  IFS=';' read -ra list <<<"$cmds"
  for c in "${list[@]}"; do
    short="${c#cargo test --profile calibration }"
    one="$log.part"
    echo "+ $c" >>"$log"
    if (cd "$tree" && $c) >"$one" 2>&1; then
      cat "$one" >>"$log"
      RAN="${RAN:+$RAN; }\`$short\`: passed"
      continue
    fi
    cat "$one" >>"$log"
    if grep -qE '^error\[E[0-9]+\]|could not compile' "$one"; then
      echo "mutation-check: the build failed, see $log" >&2
      tail -30 "$one" >&2
      exit 2
    fi
    FAILED=yes
    n=$(grep -cE '^test [^ ]+ \.\.\. FAILED' "$one" || true)
    RAN="${RAN:+$RAN; }\`$short\`: $n failed"
    if [ -z "$FIRST" ]; then
      FIRST=$(grep -m1 -oE '^test [^ ]+ \.\.\. FAILED' "$one" | sed -E 's/^test ([^ ]+) .*/\1/' || true)
      [ -n "$FIRST" ] || FIRST="(no test name: see log)"
      FIRST="$FIRST (\`$short\`)"
    fi
  done
  rm -f "$log.part"
}

rows=()
survived=0
echo "mutation-check: baseline (no mutation) first" >&2
fresh_tree
all_cmds=""
for m in "${MUTATIONS[@]}"; do
  IFS='|' read -r id file from to what cmds <<<"$m"
  selected "$id" || continue
  # The baseline runs each distinct command once.
  IFS=';' read -ra list <<<"$cmds"
  for c in "${list[@]}"; do
    case ";$all_cmds;" in *";$c;"*) ;; *) all_cmds="${all_cmds:+$all_cmds;}$c" ;; esac
  done
done
run_tests "$all_cmds" "$work/baseline.log"
if [ "$FAILED" = yes ]; then
  echo "mutation-check: the unmutated tree fails $FIRST; see $work/baseline.log" >&2
  exit 1
fi
rows+=("| none (baseline) | $RAN | no | — |")

for m in "${MUTATIONS[@]}"; do
  IFS='|' read -r id file from to what cmds <<<"$m"
  selected "$id" || continue
  echo "mutation-check: ($id) $what" >&2
  fresh_tree
  apply "$file" "$from" "$to"
  start=$(date +%s)
  run_tests "$cmds" "$work/$id.log"
  echo "mutation-check: ($id) suite failed: $FAILED ${FIRST:+, first: $FIRST} ($(($(date +%s) - start)) s)" >&2
  if [ "$FAILED" = no ]; then
    survived=$((survived + 1))
    FIRST="— (SURVIVED)"
  fi
  rows+=("| ($id) $what (\`$file\`) | $RAN | $FAILED | $FIRST |")
done
rm -rf "$tree"

echo
echo "| mutation | tests run | suite failed? | first failing test |"
echo "|---|---|---|---|"
printf '%s\n' "${rows[@]}"
if [ "$survived" -gt 0 ]; then
  echo
  echo "$survived mutation(s) survived"
  exit 1
fi
