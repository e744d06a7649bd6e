#!/usr/bin/env bash
# Builds the WebAssembly bundle into www/pkg (wasm-bindgen, no-modules target: a global
# `wasm_bindgen` usable from classic workers and from an inlined single-file page).
set -euo pipefail
cd "$(dirname "$0")/.."
WASM_BINDGEN_VERSION=0.2.130   # must equal the wasm-bindgen version pinned in Cargo.toml
if ! rustup target list --installed | grep -q '^wasm32-unknown-unknown$'; then
  rustup target add wasm32-unknown-unknown
fi
if ! wasm-bindgen --version 2>/dev/null | grep -q " $WASM_BINDGEN_VERSION\$"; then
  cargo install wasm-bindgen-cli --version "$WASM_BINDGEN_VERSION"
fi
cargo build --lib --release --target wasm32-unknown-unknown
rm -rf www/pkg
wasm-bindgen --target no-modules --no-typescript --out-dir www/pkg \
  target/wasm32-unknown-unknown/release/kiln.wasm
# The demos, as one JSON file the page can load without listing a directory.
node -e '
const fs = require("fs");
const dir = "demo-targets";
const out = fs.readdirSync(dir).filter(f => f.endsWith(".json")).sort()
  .map(f => ({ file: f, spec: JSON.parse(fs.readFileSync(dir + "/" + f, "utf8")) }));
fs.writeFileSync("www/pkg/demos.json", JSON.stringify(out));
'
# The page's ES modules are bundled into one classic script by the page itself when it is saved
# as a single file (www/bundle.js). Check here that they bundle: the bundler refuses, naming
# file and line, any module syntax it does not handle.
node --input-type=module -e '
import fs from "node:fs";
import { bundleModules } from "./www/bundle.js";
const b = await bundleModules("main.js", (p) => fs.readFileSync("www/" + p, "utf8"));
console.log("www: " + b.modules.length + " modules bundle for the single-file page");
'
echo "built www/pkg"
