// Engine speed as WebAssembly under Node: runs the same timing loops as `kiln bench` natively
// (src/bench/speed.rs, exported by src/wasm_bench.rs) and prints nanoseconds per energy +
// gradient for the compiled tape and the hand-written Rust function of each energy.
//
// Build the package first (from the repository root):
//   cargo build --release --target wasm32-unknown-unknown --lib
//   wasm-bindgen --target nodejs --out-dir target/wasm-bench-pkg target/wasm32-unknown-unknown/release/kiln.wasm
// Then:  node scripts/bench-wasm.mjs [--json] [MILLISECONDS_PER_LOOP]
// `kiln bench` runs this script itself when the package exists and merges its figures.
import { createRequire } from "node:module";
import { existsSync, writeFileSync } from "node:fs";
import { fileURLToPath } from "node:url";

const pkg = fileURLToPath(new URL("../target/wasm-bench-pkg/kiln.js", import.meta.url));
if (!existsSync(pkg)) {
  console.error(`no WebAssembly package at ${pkg}; build it first:\n` +
    "  cargo build --release --target wasm32-unknown-unknown --lib\n" +
    "  wasm-bindgen --target nodejs --out-dir target/wasm-bench-pkg target/wasm32-unknown-unknown/release/kiln.wasm");
  process.exit(2);
}
const args = process.argv.slice(2);
const json = args.includes("--json");
const ms = Number(args.find((a) => !a.startsWith("--")) ?? 250);
// wasm-bindgen's nodejs target is CommonJS, and the repository's package.json says "module".
const pkgJson = fileURLToPath(new URL("../target/wasm-bench-pkg/package.json", import.meta.url));
if (!existsSync(pkgJson)) writeFileSync(pkgJson, '{"type": "commonjs"}\n');
const kiln = createRequire(import.meta.url)(pkg);
const rows = JSON.parse(kiln.speed_benchmark(ms));
if (json) {
  console.log(JSON.stringify(rows));
} else {
  console.log(`WebAssembly under Node ${process.version}: ns per energy + gradient`);
  for (const r of rows) {
    console.log(`  ${r.energy.padEnd(40)} tape ${r.tape_ns.toFixed(1).padStart(9)}  hand ${r.hand_ns.toFixed(1).padStart(9)}  tape/hand ${r.ratio.toFixed(2)}`);
  }
}
