#!/usr/bin/env bash
# Runs every check of the project. Installs what is missing first. Used by .ci/run.
set -euo pipefail
cd "$(dirname "$0")/.."

step() { printf '\n== %s\n' "$*"; }

step "toolchain"
rustup component add rustfmt clippy >/dev/null 2>&1 || true
if ! rustup target list --installed | grep -q '^wasm32-unknown-unknown$'; then
  rustup target add wasm32-unknown-unknown
fi

WASM_BINDGEN_VERSION=0.2.130   # must equal the wasm-bindgen version pinned in Cargo.toml
if ! wasm-bindgen --version 2>/dev/null | grep -q " $WASM_BINDGEN_VERSION\$"; then
  cargo install wasm-bindgen-cli --version "$WASM_BINDGEN_VERSION"
fi
command -v node >/dev/null || { echo "Node.js is needed for the WebAssembly tests"; exit 1; }

step "format"
cargo fmt --all -- --check

step "lint"
cargo clippy --all-targets -- -D warnings
cargo clippy --lib --target wasm32-unknown-unknown -- -D warnings

step "native tests"
cargo test

step "calibration: error bars judged by their coverage over 100 seeds on 9 targets (release)"
cargo test --profile calibration --test calibration -- --nocapture 2>&1 | grep -E '^\| |test result|failures|: '
test "${PIPESTATUS[0]}" -eq 0 || { echo "the calibration suite failed"; exit 1; }

step "WebAssembly build"
cargo build --lib --release --target wasm32-unknown-unknown

step "native and WebAssembly give identical numbers and draws"
mkdir -p target/determinism
cargo test --quiet --test error_objects   # writes target/determinism/errors.json
cargo run --quiet --bin kiln -- run demo-targets/default-two-modes.json --seed 3 --chains 2 --draws 300 --warmup 200 \
  --json --draws-csv target/determinism/native.csv > target/determinism/native.json
cargo test --target wasm32-unknown-unknown --test wasm_determinism

step "browser: build the page and run the end-to-end tests in headless Chromium"
if [ ! -x /usr/bin/chromium ]; then
  (apt-get update -qq && apt-get install -y -qq chromium) || { echo "could not install Chromium"; exit 1; }
fi
npm ci --no-audit --no-fund
npm test
bash scripts/build-web.sh
cargo build --bin kiln
npm run e2e

step "fuzzing: a short run of each target over the kept corpus (nightly toolchain)"
if ! rustup toolchain list | grep -q '^nightly'; then
  rustup toolchain install nightly --profile minimal \
    || { echo "fuzzing needs the nightly toolchain, and installing it failed"; exit 1; }
fi
command -v cargo-fuzz >/dev/null || cargo install cargo-fuzz \
  || { echo "fuzzing needs cargo-fuzz, and installing it failed"; exit 1; }
# New inputs go to a scratch directory: the kept corpus (fuzz/corpus) is only read here.
(cd fuzz && for t in spec_parse formula; do
   scratch="$(mktemp -d)"
   cargo +nightly fuzz run "$t" "$scratch" "corpus/$t" -- -max_total_time=30 -max_len=4096 -timeout=60 -rss_limit_mb=4096 2>&1 | tail -n 2
   status="${PIPESTATUS[0]}"
   rm -rf "$scratch"
   test "$status" -eq 0 || { echo "fuzz target $t found a failure"; exit 1; }
   echo "fuzz target $t: no failure in 30 s"
 done)

step "demo targets pass kiln check"
cargo build --bin kiln
for f in demo-targets/*.json; do
  ./target/debug/kiln check "$f" --json > /dev/null || { echo "kiln check failed on $f"; exit 1; }
done
echo "all demo targets pass"

step "all steps passed"
