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

step "format"
cargo fmt --all -- --check

step "lint"
cargo clippy --all-targets -- -D warnings
cargo clippy --lib --target wasm32-unknown-unknown -- -D warnings

step "native tests"
cargo test

step "WebAssembly build"
cargo build --lib --release --target wasm32-unknown-unknown

step "demo targets pass kiln check"
cargo build --bin kiln
for f in demo-targets/*.json; do
  ./target/debug/kiln check "$f" --json > /dev/null || { echo "kiln check failed on $f"; exit 1; }
done
echo "all demo targets pass"
