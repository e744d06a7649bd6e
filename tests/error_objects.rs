//! The bad-input catalogue of tests/bad_input_specs.json: every case is an error (never a
//! panic) with a message, and for faults in one place a position and a caret. The error objects
//! are written to target/determinism/errors.json, and tests/wasm_determinism.rs checks that the
//! WebAssembly API returns the same objects (scripts/test.sh runs this test first).

use serde_json::Value;

#[test]
fn every_bad_input_is_a_clear_error_and_the_objects_are_recorded() {
    let text = std::fs::read_to_string(concat!(
        env!("CARGO_MANIFEST_DIR"),
        "/tests/bad_input_specs.json"
    ))
    .unwrap();
    let cases: Vec<Value> = serde_json::from_str(&text).unwrap();
    assert!(cases.len() >= 40, "the catalogue has {} cases", cases.len());
    let mut out = Vec::new();
    for c in &cases {
        let name = c["name"].as_str().unwrap();
        let spec = c["spec"].as_str().unwrap();
        let result = kiln::parse_spec("spec", spec).and_then(|s| kiln::run::check(&s).map(|_| ()));
        let err = match result {
            Err(e) => e,
            Ok(()) => panic!("case `{name}` was accepted"),
        };
        assert!(!err.message.is_empty(), "{name}");
        assert!(
            err.hint.is_some(),
            "case `{name}` has no hint: {}",
            err.render()
        );
        if let Some(loc) = &err.location {
            assert!(loc.line >= 1 && loc.column >= 1, "{name}");
            assert!(err.render().contains('‾'), "{name}");
        }
        // The command line: exit code 2 and the same message on standard error, never a panic.
        let file = std::env::temp_dir().join(format!(
            "kiln-error-objects-{}-{name}.json",
            std::process::id()
        ));
        std::fs::write(&file, spec).unwrap();
        let run = std::process::Command::new(env!("CARGO_BIN_EXE_kiln"))
            .arg("check")
            .arg(&file)
            .output()
            .unwrap();
        let _ = std::fs::remove_file(&file);
        let stderr = String::from_utf8_lossy(&run.stderr);
        assert_eq!(run.status.code(), Some(2), "case `{name}`: {stderr}");
        assert!(stderr.contains(&err.message), "case `{name}`: {stderr}");
        assert!(!stderr.contains("panicked"), "case `{name}`");
        out.push(serde_json::json!({ "name": name, "error": err }));
    }
    let dir = concat!(env!("CARGO_MANIFEST_DIR"), "/target/determinism");
    std::fs::create_dir_all(dir).unwrap();
    std::fs::write(
        format!("{dir}/errors.json"),
        serde_json::to_string_pretty(&out).unwrap(),
    )
    .unwrap();
}
