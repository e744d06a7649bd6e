//! The same spec and seed give the same numbers and the same draws natively and in
//! WebAssembly: `scripts/test.sh` runs the native command line first and writes its JSON report
//! and draws CSV to target/determinism/; this test, compiled to wasm32 and run under Node by
//! wasm-bindgen-test-runner, repeats the run in WebAssembly and compares byte for byte.
#![cfg(target_arch = "wasm32")]

use kiln::pipeline::{run, Overrides};
use wasm_bindgen_test::wasm_bindgen_test;

const SPEC: &str = include_str!("../demo-targets/default-two-modes.json");
const NATIVE_JSON: &str = include_str!("../target/determinism/native.json");
const NATIVE_CSV: &str = include_str!("../target/determinism/native.csv");

#[wasm_bindgen_test]
fn same_report_and_draws_as_native() {
    let spec = kiln::parse_spec("default-two-modes.json", SPEC).expect("demo spec parses");
    // Must match the arguments in scripts/test.sh.
    let o = Overrides {
        seed: Some(3),
        chains: Some(2),
        draws: Some(300),
        warmup: Some(200),
        ..Overrides::default()
    };
    let r = run(&spec, &o).expect("run succeeds");
    let json = serde_json::to_string_pretty(&r.outcome).expect("serialises");
    assert_eq!(
        json.trim_end(),
        NATIVE_JSON.trim_end(),
        "the report differs from the native one"
    );
    assert_eq!(
        r.draws_csv(),
        NATIVE_CSV,
        "the draws differ from the native ones"
    );
}
