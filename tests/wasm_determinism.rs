//! The same spec and seed give the same numbers and the same draws natively and in
//! WebAssembly: `scripts/test.sh` runs the native command line first and writes its JSON report
//! and draws CSV to target/determinism/; this test, compiled to wasm32 and run under Node by
//! wasm-bindgen-test-runner, repeats the run in WebAssembly and compares byte for byte.
#![cfg(target_arch = "wasm32")]

use kiln::run::{run, Overrides};
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
        kiln::report::run_draws_csv(&r),
        NATIVE_CSV,
        "the draws differ from the native ones"
    );
}

/// The page's path: a leading `RunSession` that searches and a follower that takes its modes,
/// owning one chain each and exchanging their records as Float64Arrays as workers do, give the
/// native draws too.
#[wasm_bindgen_test]
fn sessions_split_over_workers_give_the_native_draws() {
    use kiln::wasm::RunSession;
    let overrides = r#"{"seed": 3, "chains": 2, "draws": 300, "warmup": 200}"#;
    let mut a = RunSession::new(SPEC, overrides, vec![0])
        .ok()
        .expect("session A");
    let modes = a.modes().expect("the leading session has modes");
    let mut b = RunSession::follow(SPEC, overrides, vec![1], &modes)
        .ok()
        .expect("session B");
    assert!(b.modes().is_none(), "a follower does not search");
    assert_eq!(a.step_count(), b.step_count());
    while a.step_kind() != "done" {
        let mut all = a.run_step();
        all.extend(b.run_step());
        a.absorb(&all).ok().expect("absorb A");
        b.absorb(&all).ok().expect("absorb B");
    }
    assert_eq!(b.step_kind(), "done");
    assert_eq!(a.draws_csv().ok().expect("csv A"), NATIVE_CSV);
    // A follower does not summarise: its draws are the leader's to report.
    assert!(b.draws_csv().is_err());
}

const BAD_SPECS: &str = include_str!("bad_input_specs.json");
const NATIVE_ERRORS: &str = include_str!("../target/determinism/errors.json");

/// Every case of the bad-input catalogue gives, through the WebAssembly API, the same error
/// object (kind, message, location, hint) as natively.
#[wasm_bindgen_test]
fn bad_inputs_give_the_same_error_objects_as_native() {
    let cases: Vec<serde_json::Value> = serde_json::from_str(BAD_SPECS).unwrap();
    let native: Vec<serde_json::Value> = serde_json::from_str(NATIVE_ERRORS).unwrap();
    assert_eq!(cases.len(), native.len());
    for (c, n) in cases.iter().zip(&native) {
        let name = c["name"].as_str().unwrap();
        let err = match kiln::wasm::check_spec(c["spec"].as_str().unwrap()) {
            Ok(_) => panic!("case `{name}` was accepted in WebAssembly"),
            Err(e) => e,
        };
        let text: String = js_sys::JSON::stringify(&err)
            .map(String::from)
            .unwrap_or_default();
        let got: serde_json::Value = serde_json::from_str(&text)
            .unwrap_or_else(|_| panic!("`{name}`: not an object: {text}"));
        for field in ["kind", "message", "location", "hint"] {
            assert_eq!(
                got[field], n["error"][field],
                "case `{name}`, field `{field}`"
            );
        }
        assert!(
            got["rendered"]
                .as_str()
                .is_some_and(|r| r.starts_with("problem  ")),
            "{name}"
        );
    }
}
