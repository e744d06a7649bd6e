//! Every demo in demo-targets/ through the real binary with its own settings: its verdict, its
//! log Z against a value from outside Kiln where one exists (scipy quadrature in
//! tests/reference/demo_quadrature.py, the closed forms in tests/reference/demo_references.py,
//! or an exact identity the spec states), and its notes saying what to look at.
//!
//! A log Z matches when it is within four of its standard errors of the outside value, the
//! rule by which the verdict's cross-checks agree (estimate::crosscheck::AGREEMENT_SIGMAS)
//! plus the round-off allowance, because one run's error bar is what a user reads; whether
//! those error bars cover is the calibration suite's question (tests/calibration.rs), not this.

// Reference values use the platform maths library on purpose.
#![allow(clippy::disallowed_methods)]

use serde_json::Value;
use std::process::Command;

fn root() -> &'static str {
    env!("CARGO_MANIFEST_DIR")
}

fn run_demo(demo: &str) -> Value {
    let spec = format!("{}/demo-targets/{demo}", root());
    let out = Command::new(env!("CARGO_BIN_EXE_kiln"))
        .args(["run", &spec, "--json"])
        .output()
        .unwrap();
    assert!(
        out.status.success(),
        "{demo}: {}",
        String::from_utf8_lossy(&out.stderr)
    );
    serde_json::from_slice(&out.stdout).unwrap()
}

/// The outside value of a demo's log Z from one of the reference files, whose two methods must
/// agree with each other first.
fn outside(file: &str, demo: &str) -> f64 {
    let path = format!("{}/tests/reference/{file}", root());
    let v: Value = serde_json::from_str(&std::fs::read_to_string(path).unwrap()).unwrap();
    assert!(
        v["scipy_version"].is_string(),
        "{file} names its scipy version"
    );
    let d = &v["demos"][demo];
    let (z, cross) = (
        d["log_z"].as_f64().unwrap(),
        d["cross_check"].as_f64().unwrap(),
    );
    assert!((z - cross).abs() < 1e-3, "{demo}: {z} vs {cross}");
    z
}

fn log_z(r: &Value) -> (f64, f64) {
    (
        r["log_z"].as_f64().unwrap(),
        r["log_z_se"].as_f64().unwrap(),
    )
}

fn assert_matches(demo: &str, r: &Value, want: f64) {
    let (z, se) = log_z(r);
    assert!(se.is_finite() && se >= 0.0, "{demo}: SE {se}");
    assert!(
        (z - want).abs() <= 4.0 * se + 1e-9,
        "{demo}: log Z {z} ± {se}, outside value {want}"
    );
}

fn assert_agree(demo: &str, r: &Value) {
    assert_eq!(
        r["verdict"]["state"], "agree",
        "{demo}: verdict {}",
        r["verdict"]
    );
}

/// The notes end in "What to look at: " and two sentences.
fn assert_notes_say_what_to_look_at(demo: &str) {
    let path = format!("{}/demo-targets/{demo}", root());
    let spec: Value = serde_json::from_str(&std::fs::read_to_string(path).unwrap()).unwrap();
    let notes = spec["notes"].as_str().unwrap();
    let (_, look) = notes
        .split_once("What to look at: ")
        .unwrap_or_else(|| panic!("{demo}: the notes say what to look at"));
    let sentences = look
        .trim_end()
        .split(". ")
        .filter(|s| !s.trim().is_empty())
        .count();
    assert!(look.trim_end().ends_with('.'), "{demo}: {look}");
    assert_eq!(sentences, 2, "{demo}: two sentences in {look:?}");
}

#[test]
fn the_beacon_demo_agrees_and_matches_quadrature() {
    let demo = "default-two-modes.json";
    assert_notes_say_what_to_look_at(demo);
    let r = run_demo(demo);
    assert_agree(demo, &r);
    assert_matches(demo, &r, outside("demo_quadrature_values.json", demo));
}

#[test]
fn the_crystal_demo_agrees_and_matches_quadrature() {
    let demo = "crystal-sensor-two-temperatures.json";
    assert_notes_say_what_to_look_at(demo);
    let r = run_demo(demo);
    assert_agree(demo, &r);
    assert_matches(demo, &r, outside("demo_quadrature_values.json", demo));
}

#[test]
fn the_comb_demo_agrees_matches_quadrature_and_folds_its_tail() {
    let demo = "ultrasonic-phase-range-comb.json";
    assert_notes_say_what_to_look_at(demo);
    let r = run_demo(demo);
    assert_agree(demo, &r);
    assert_matches(demo, &r, outside("demo_quadrature_values.json", demo));
    // The many teeth far from the coarse reading fold into one row holding under 0.1 %.
    let t = &r["mode_table"];
    let folded = t["folded"].as_array().unwrap().len();
    assert!(folded >= 2, "{t}");
    assert!(t["folded_mass"].as_f64().unwrap() < 0.001, "{t}");
    let shown = t["shown"].as_array().unwrap().len();
    assert_eq!(shown + folded, r["modes"].as_array().unwrap().len());
}

/// The search-area demo: curved and heavy-tailed patches, so the sampler has something to
/// correct: the Laplace mixture of the modes is off by many standard errors, the sampler is not.
#[test]
fn the_search_area_demo_agrees_with_log_9_and_corrects_its_base() {
    let demo = "search-area-three-scenarios.json";
    assert_notes_say_what_to_look_at(demo);
    let r = run_demo(demo);
    assert_agree(demo, &r);
    // Exact identity: three normalised patches with odds 5, 3 and 1.
    let nine = 9f64.ln();
    assert!((outside("demo_quadrature_values.json", demo) - nine).abs() < 1e-7);
    assert_matches(demo, &r, nine);
    let (_, se) = log_z(&r);
    let laplace = r["laplace_log_z"].as_f64().unwrap();
    assert!(
        (laplace - nine).abs() > 0.02 && (laplace - nine).abs() > 4.0 * se,
        "the base differs from the target: Laplace {laplace} vs log 9 = {nine} (SE {se})"
    );
    // The modes' masses are the odds' shares, 5/9, 3/9 and 1/9.
    let modes = r["modes"].as_array().unwrap();
    assert_eq!(modes.len(), 3);
    for (share, east) in [(5.0 / 9.0, 3.2), (3.0 / 9.0, -1.5), (1.0 / 9.0, 1.0)] {
        let m = modes
            .iter()
            .find(|m| (m["location"][0].as_f64().unwrap() - east).abs() < 0.2)
            .unwrap_or_else(|| panic!("a mode near east = {east}: {modes:?}"));
        let (mass, mse) = (m["mass"].as_f64().unwrap(), m["mass_se"].as_f64().unwrap());
        assert!(
            (mass - share).abs() <= 4.0 * mse,
            "mass {mass} ± {mse} near east = {east}, want {share}"
        );
    }
}

#[test]
fn the_gauge_demo_agrees_and_matches_its_closed_form() {
    let demo = "rain-gauge-offsets-hierarchical.json";
    assert_notes_say_what_to_look_at(demo);
    let r = run_demo(demo);
    assert_agree(demo, &r);
    assert_matches(demo, &r, outside("demo_values.json", demo));
}

#[test]
fn the_cultivar_demo_agrees_and_matches_its_exact_value() {
    let demo = "seed-lengths-three-cultivars.json";
    assert_notes_say_what_to_look_at(demo);
    let r = run_demo(demo);
    assert_agree(demo, &r);
    assert_matches(demo, &r, outside("demo_values.json", demo));
}

/// No outside value exists for the fish demo's log Z (four unknowns, label switching); its
/// importance check must vote (its weights' tail bounded, Pareto k̂ ≤ 0.5) and agree.
#[test]
fn the_fish_demo_agrees() {
    let demo = "fish-cohorts-label-switching.json";
    assert_notes_say_what_to_look_at(demo);
    let r = run_demo(demo);
    assert_agree(demo, &r);
    let voted = r["verdict"]["voted"].as_array().unwrap();
    assert!(voted.iter().any(|c| c == "importance"), "{}", r["verdict"]);
}

/// The two-isotope demo (five unknowns, no grid check): its importance check votes and agrees,
/// its log Z matches importance sampling written from scratch in numpy/scipy
/// (tests/reference/isotopes_is.py, two proposals within 5e-4 of each other), the Laplace value
/// is off by more than four standard errors (skewed lifetimes: the sampler corrects it), and the
/// two mirror-image modes hold half the mass each (exact: the energy is symmetric under the swap).
#[test]
fn the_isotope_demo_agrees_and_matches_importance_sampling_from_outside() {
    let demo = "decay-two-isotopes-background.json";
    assert_notes_say_what_to_look_at(demo);
    let r = run_demo(demo);
    assert_agree(demo, &r);
    let voted = r["verdict"]["voted"].as_array().unwrap();
    assert!(voted.iter().any(|c| c == "importance"), "{}", r["verdict"]);
    let want = outside("isotopes_values.json", demo);
    assert_matches(demo, &r, want);
    let (_, se) = log_z(&r);
    let laplace = r["laplace_log_z"].as_f64().unwrap();
    assert!(
        (laplace - want).abs() > 4.0 * se,
        "Laplace {laplace} vs {want} (SE {se}): the sampler had nothing to correct"
    );
    let modes = r["modes"].as_array().unwrap();
    assert_eq!(modes.len(), 2, "{modes:?}");
    for m in modes {
        let (mass, mse) = (m["mass"].as_f64().unwrap(), m["mass_se"].as_f64().unwrap());
        assert!(
            (mass - 0.5).abs() <= 4.0 * mse,
            "mass {mass} ± {mse}, want 1/2"
        );
    }
}
