//! `kiln run` and `kiln compare` through the real binary: the JSON contract, the draws CSV,
//! settings and overrides, and bad options.

// Reference values use the platform maths library on purpose.
#![allow(clippy::disallowed_methods)]

use serde_json::Value;
use std::path::PathBuf;
use std::process::Command;

fn dir(name: &str) -> PathBuf {
    let d = std::env::temp_dir().join(format!("kiln-cli-run-{}-{name}", std::process::id()));
    std::fs::create_dir_all(&d).unwrap();
    d
}

fn kiln(args: &[&str]) -> (i32, String, String) {
    let out = Command::new(env!("CARGO_BIN_EXE_kiln"))
        .args(args)
        .output()
        .unwrap();
    (
        out.status.code().unwrap_or(-1),
        String::from_utf8_lossy(&out.stdout).into_owned(),
        String::from_utf8_lossy(&out.stderr).into_owned(),
    )
}

fn write(d: &std::path::Path, name: &str, text: &str) -> String {
    let p = d.join(name);
    std::fs::write(&p, text).unwrap();
    p.to_string_lossy().into_owned()
}

/// Two clusters of total weight 2 and 1, each a narrow core and a wide skirt (equal weights, the
/// skirt twice as wide and shifted a little along x), so each mode is far from Gaussian and the
/// Laplace base misses about 0.3 nats: the sampler's tempering has work to do. Exact
/// identities: Z = 3 (the total weight), and the clusters' masses 2/3 and 1/3 (the widest skirt
/// is 3.3 of its sd from the half-way line: less than 1e-3 of a cluster's mass crosses it).
const MIXTURE_A: &str = r#"{"title": "A", "mixture": [
    {"weight": 1.0, "mean": [-6, 0], "sd": [0.6, 0.8]},
    {"weight": 1.0, "mean": [-5.7, 0], "sd": [1.2, 1.6]},
    {"weight": 0.5, "mean": [6, 1], "sd": [0.9, 0.5]},
    {"weight": 0.5, "mean": [6.45, 1], "sd": [1.8, 1.0]}],
    "settings": {"seed": 5, "draws": 600, "warmup": 400, "chains": 3}}"#;
const MIXTURE_B: &str = r#"{"title": "B", "mixture": [
    {"weight": 0.5, "mean": [0, 0], "cov": [[1, 0.3], [0.3, 1]]}],
    "settings": {"draws": 600, "warmup": 400, "chains": 3}}"#;

/// Grid quadrature against an exact value, in nats: the grid check refines until two levels
/// differ by less than 2e-4 (as tests/references.rs holds it against scipy).
const GRID_TOL: f64 = 2e-3;

#[test]
fn run_json_has_the_documented_fields_and_settings_apply() {
    let d = dir("json");
    let a = write(&d, "a.json", MIXTURE_A);
    let (code, out, err) = kiln(&["run", &a, "--json"]);
    assert_eq!(code, 0, "{err}");
    let v: Value = serde_json::from_str(&out).unwrap();
    for key in [
        "log_z",
        "log_z_se",
        "laplace_log_z",
        "is_log_z",
        "grid_log_z",
        "exact_log_z",
        "modes",
        "mean",
        "sd",
        "quantiles",
        "rhat",
        "ess",
        "diagnostics",
        "warnings",
        "seed",
        "energy_evaluations",
    ] {
        assert!(v.get(key).is_some(), "missing `{key}`");
    }
    for key in ["location", "mass", "mass_se", "laplace_mass"] {
        assert!(v["modes"][0].get(key).is_some(), "modes lack `{key}`");
    }
    // Spec settings are defaults: seed 5, 3 chains.
    assert_eq!(v["seed"], 5);
    assert_eq!(v["settings"]["chains"], 3);
    // Exact identity: log Z = log(total weight) = log 3. The Laplace value is off by more than
    // 0.1, and the sampler must get within 0.03 of the truth whatever its SE says (its SE at
    // 3 chains × 600 draws is about 0.01 here).
    let truth = 3f64.ln();
    let (lz, se) = (
        v["log_z"].as_f64().unwrap(),
        v["log_z_se"].as_f64().unwrap(),
    );
    let laplace = v["laplace_log_z"].as_f64().unwrap();
    eprintln!("log Z {lz} ± {se}; Laplace {laplace}; truth {truth}");
    assert!(
        (laplace - truth).abs() > 0.1,
        "the base is exact here ({laplace}): the test would not exercise tempering"
    );
    assert!(
        (lz - truth).abs() < 0.03,
        "log Z {lz} ± {se} vs exact {truth}"
    );
    assert!(se > 0.0 && se < 0.03, "SE {se}");
    assert!((v["exact_log_z"].as_f64().unwrap() - truth).abs() < 1e-12);
    // The grid check (independent of the sampler) against the same exact value, and its own
    // error estimate is honest about it.
    let grid = v["grid_log_z"].as_f64().expect("a grid value in 2-D");
    assert!(
        (grid - truth).abs() < GRID_TOL,
        "grid {grid} vs exact {truth}"
    );
    let checks = v["cross_checks"].as_array().unwrap();
    let g = checks
        .iter()
        .find(|c| c["name"] == "grid")
        .unwrap_or_else(|| panic!("no grid check in {checks:?}"));
    assert_eq!(g["log_z"].as_f64(), Some(grid));
    let g_err = g["error"].as_f64().expect("the grid states its error");
    assert!(
        (grid - truth).abs() <= g_err.max(1e-9),
        "grid {grid} ± {g_err} vs exact {truth}"
    );
    assert_eq!(
        v["verdict"]["state"], "agree",
        "{}",
        v["verdict"]["sentence"]
    );
    // Options override the spec.
    let (code, out, _) = kiln(&[
        "run", &a, "--json", "--seed", "9", "--chains", "2", "--method", "joint",
    ]);
    assert_eq!(code, 0);
    let v: Value = serde_json::from_str(&out).unwrap();
    assert_eq!(v["seed"], 9);
    assert_eq!(v["settings"]["chains"], 2);
    assert_eq!(v["settings"]["method"], "joint");
}

#[test]
fn draws_csv_has_the_header_and_one_row_per_kept_draw() {
    let d = dir("csv");
    let a = write(&d, "a.json", MIXTURE_A);
    let csv = d.join("draws.csv");
    let (code, _, err) = kiln(&["run", &a, "--draws-csv", csv.to_str().unwrap()]);
    assert_eq!(code, 0, "{err}");
    let text = std::fs::read_to_string(&csv).unwrap();
    let lines: Vec<&str> = text.split("\r\n").filter(|l| !l.is_empty()).collect();
    assert_eq!(lines[0], "x1,x2,beta,weight,chain,iteration,mode");
    assert_eq!(lines.len() - 1, 3 * 600);
    // Resampled target draws: about two thirds in the heavier mode (exact mass 2/3).
    let first_mode = lines[1..].iter().filter(|l| l.ends_with(",1")).count() as f64 / 1800.0;
    assert!((first_mode - 2.0 / 3.0).abs() < 0.06, "{first_mode}");
}

#[test]
fn compare_gives_the_log_bayes_factor() {
    let d = dir("compare");
    let a = write(&d, "a.json", MIXTURE_A);
    let b = write(&d, "b.json", MIXTURE_B);
    let (code, out, err) = kiln(&["compare", &a, &b, "--json"]);
    assert_eq!(code, 0, "{err}");
    let v: Value = serde_json::from_str(&out).unwrap();
    // Exact identity: log(Z_A / Z_B) = log(3 / 0.5).
    let (lbf, se) = (
        v["bayes_factor"]["log_bayes_factor"].as_f64().unwrap(),
        v["bayes_factor"]["log_bayes_factor_se"].as_f64().unwrap(),
    );
    // A fixed bound (A's SE is about 0.01, B is one Gaussian whose base is exact): 0.04 nats.
    assert!(
        (lbf - 6f64.ln()).abs() < 0.04,
        "{lbf} ± {se} vs exact {}",
        6f64.ln()
    );
    assert!(se > 0.0 && se < 0.04, "SE {se}");
    let (code, text, _) = kiln(&["compare", &a, &b]);
    assert_eq!(code, 0);
    assert!(text.contains("log Bayes factor"));
}

#[test]
fn bad_options_exit_with_code_two() {
    let d = dir("bad");
    let a = write(&d, "a.json", MIXTURE_A);
    for (args, fragment) in [
        (vec!["run", &a, "--chians", "2"], "did you mean `--chains`"),
        (vec!["run", &a, "--chains", "0"], "0 chains requested"),
        (
            vec!["run", &a, "--method", "sideways"],
            "unknown method `sideways`",
        ),
        (vec!["run", &a, "--draws", "many"], "expects a whole number"),
        (vec!["run"], "takes exactly one spec file"),
        (vec!["compare", &a], "takes exactly two spec files"),
        (
            vec!["run", &a, "--draws", "1000000", "--chains", "64"],
            "values in memory",
        ),
    ] {
        let (code, _, err) = kiln(&args);
        assert_eq!(code, 2, "{args:?}: {err}");
        assert!(err.contains(fragment), "{args:?}: {err}");
        assert!(!err.contains("panicked"));
    }
}

/// A run split over several sessions that each own some chains and exchange records after
/// every step (as the page's workers do) gives exactly the report of one session owning all.
#[test]
fn a_run_split_over_sessions_matches_the_whole_run() {
    use kiln::run::{run, Overrides, Session};
    let spec = kiln::parse_spec("t", MIXTURE_A).unwrap();
    let o = Overrides {
        seed: Some(2),
        chains: Some(3),
        ..Overrides::default()
    };
    let whole = run(&spec, &o).unwrap();
    let mut parts: Vec<Session> = [vec![0, 2], vec![1]]
        .iter()
        .map(|owned| Session::new(&spec, &o, Some(owned)).unwrap())
        .collect();
    while parts[0].step().is_some() {
        let mut all = Vec::new();
        for p in parts.iter_mut() {
            all.extend(p.run_step());
        }
        for p in parts.iter_mut() {
            p.absorb(all.clone()).unwrap();
        }
    }
    for p in &parts {
        let r = p.finish().unwrap();
        assert_eq!(
            serde_json::to_string(&r.outcome).unwrap(),
            serde_json::to_string(&whole.outcome).unwrap()
        );
        assert_eq!(
            kiln::report::run_draws_csv(&r),
            kiln::report::run_draws_csv(&whole)
        );
    }
}
