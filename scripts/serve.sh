#!/usr/bin/env bash
# Builds the WebAssembly bundle and serves the app on localhost with a demo loaded.
set -euo pipefail
cd "$(dirname "$0")/.."
bash scripts/build-web.sh
exec node scripts/serve.mjs
