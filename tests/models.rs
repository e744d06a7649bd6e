//! Models as practitioners write them, end to end: the two demo targets that use vector
//! unknowns, an index column, priors and the built-in densities, against their exact log Z
//! computed outside Kiln (tests/reference/demo_references.py, with scipy); index columns,
//! priors and CSV data through the real binary; element names everywhere a name is shown.

// Reference values use the platform maths library on purpose.
#![allow(clippy::disallowed_methods)]

use serde_json::Value;
use std::process::Command;

fn root() -> &'static str {
    env!("CARGO_MANIFEST_DIR")
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

fn temp(name: &str, text: &str) -> String {
    let d = std::env::temp_dir().join(format!("kiln-models-{}", std::process::id()));
    std::fs::create_dir_all(&d).unwrap();
    let p = d.join(name);
    std::fs::write(&p, text).unwrap();
    p.to_string_lossy().into_owned()
}

fn exact(demo: &str) -> f64 {
    let path = format!("{}/tests/reference/demo_values.json", root());
    let v: Value = serde_json::from_str(&std::fs::read_to_string(path).unwrap()).unwrap();
    assert!(v["scipy_version"].is_string());
    let d = &v["demos"][demo];
    let (z, cross) = (
        d["log_z"].as_f64().unwrap(),
        d["cross_check"].as_f64().unwrap(),
    );
    // The script's two methods agree (the second one is a coarse quadrature for the mixture).
    assert!((z - cross).abs() < 1e-3, "{demo}: {z} vs {cross}");
    z
}

fn run_demo(demo: &str) -> Value {
    let spec = format!("{}/demo-targets/{demo}", root());
    let (code, out, err) = kiln(&["run", &spec, "--json"]);
    assert_eq!(code, 0, "{err}");
    serde_json::from_str(&out).unwrap()
}

#[test]
fn the_hierarchical_gauge_demo_gives_the_multivariate_normal_evidence() {
    let demo = "rain-gauge-offsets-hierarchical.json";
    let want = exact(demo);
    let r = run_demo(demo);
    let (z, se) = (
        r["log_z"].as_f64().unwrap(),
        r["log_z_se"].as_f64().unwrap(),
    );
    assert!(se > 0.0 && se < 0.05, "SE {se}");
    assert!(
        (z - want).abs() <= 3.0 * se,
        "log Z {z} ± {se}, exact {want}"
    );
    // Elements by name, and the priors stated.
    let names: Vec<&str> = r["unknowns"]
        .as_array()
        .unwrap()
        .iter()
        .map(|u| u["name"].as_str().unwrap())
        .collect();
    assert_eq!(
        names,
        ["mu", "theta[1]", "theta[2]", "theta[3]", "theta[4]", "theta[5]", "theta[6]"]
    );
    assert_eq!(r["unknowns"][3]["prior"], "normal(mu, 0.6)");
    assert_eq!(r["notes"][0]["code"], "priors_used");
    assert!(r["notes"][0]["sentence"]
        .as_str()
        .unwrap()
        .contains("`theta[1]`…`theta[6]` normal(mu, 0.6)"));
}

#[test]
fn the_three_cultivar_mixture_demo_gives_the_exact_evidence() {
    let demo = "seed-lengths-three-cultivars.json";
    let want = exact(demo);
    let r = run_demo(demo);
    let (z, se) = (
        r["log_z"].as_f64().unwrap(),
        r["log_z_se"].as_f64().unwrap(),
    );
    assert!(se > 0.0 && se < 0.05, "SE {se}");
    assert!(
        (z - want).abs() <= 3.0 * se,
        "log Z {z} ± {se}, exact {want}"
    );
    // Label switching: every ordering of a solution is a mode.
    assert!(r["modes"].as_array().unwrap().len() >= 6);
}

/// Three groups with an index column, written as in the README, against the same model with
/// the elements written out by hand: the same density everywhere.
#[test]
fn an_index_column_means_what_writing_each_group_out_means() {
    let data = r#"{"y": [1.2, 0.4, 2.9, 3.3, -0.5, 1.1, 2.5], "g": [1, 1, 2, 2, 3, 3, 2]}"#;
    let indexed = format!(
        r#"{{"variables": [{{"name": "mu", "size": 3, "prior": "normal(0, 5)"}}], "data": {data},
            "log_density": "sum(logd_normal(y, mu[g], 0.7))", "settings": {{"draws": 300, "warmup": 300}}}}"#
    );
    // Written out: each row's own term, and the priors as terms of the formula.
    let rows = [
        (1.2, 1),
        (0.4, 1),
        (2.9, 2),
        (3.3, 2),
        (-0.5, 3),
        (1.1, 3),
        (2.5, 2),
    ];
    let names = ["a", "b", "c"];
    let mut terms: Vec<String> = rows
        .iter()
        .map(|(y, g)| format!("logd_normal({y}, {}, 0.7)", names[g - 1]))
        .collect();
    terms.extend(names.iter().map(|n| format!("logd_normal({n}, 0, 5)")));
    let written = format!(
        r#"{{"variables": [{{"name": "a"}}, {{"name": "b"}}, {{"name": "c"}}],
            "log_density": "{}", "settings": {{"draws": 300, "warmup": 300}}}}"#,
        terms.join(" + ")
    );
    let (c1, o1, e1) = kiln(&["check", &temp("indexed.json", &indexed), "--json"]);
    let (c2, o2, e2) = kiln(&["check", &temp("written.json", &written), "--json"]);
    assert_eq!((c1, c2), (0, 0), "{e1}{e2}");
    let (v1, v2): (Value, Value) = (
        serde_json::from_str(&o1).unwrap(),
        serde_json::from_str(&o2).unwrap(),
    );
    let l1 = v1["laplace_log_z"].as_f64().unwrap();
    let l2 = v2["laplace_log_z"].as_f64().unwrap();
    assert!((l1 - l2).abs() < 1e-9, "{l1} vs {l2}");
    let m1: Vec<f64> = v1["modes"][0]["location"]
        .as_array()
        .unwrap()
        .iter()
        .map(|x| x.as_f64().unwrap())
        .collect();
    let m2: Vec<f64> = v2["modes"][0]["location"]
        .as_array()
        .unwrap()
        .iter()
        .map(|x| x.as_f64().unwrap())
        .collect();
    for (a, b) in m1.iter().zip(&m2) {
        assert!((a - b).abs() < 1e-6, "{m1:?} vs {m2:?}");
    }
    // The draws file names the elements.
    let csv = std::env::temp_dir().join(format!("kiln-models-{}/draws.csv", std::process::id()));
    let csv = csv.to_string_lossy().into_owned();
    let (code, _, err) = kiln(&["run", &temp("indexed.json", &indexed), "--draws-csv", &csv]);
    assert_eq!(code, 0, "{err}");
    let text = std::fs::read_to_string(&csv).unwrap();
    assert!(
        text.starts_with("mu[1],mu[2],mu[3],beta,weight,chain,iteration,mode\r\n"),
        "{}",
        &text[..80]
    );
}

#[test]
fn bad_index_columns_and_data_are_reported_with_the_row_and_column() {
    let spec = |data: &str| {
        format!(
            r#"{{"variables": [{{"name": "mu", "size": 3}}], "data": {data},
                "log_density": "sum(logd_normal(y, mu[g], 1)) + sum(k = 1..3, logd_normal(mu[k], 0, 3))"}}"#
        )
    };
    let (code, _, err) = kiln(&[
        "check",
        &temp("bad1.json", &spec(r#"{"y": [1, 2, 3], "g": [1, 4, 2]}"#)),
    ]);
    assert_eq!(code, 2);
    assert!(
        err.contains("data row 2, column `g`: 4 is not an element of `mu`"),
        "{err}"
    );
    let (code, _, err) = kiln(&[
        "check",
        &temp("bad2.json", &spec(r#"{"y": [1, 2, 3], "g": [1, 2, 2.5]}"#)),
    ]);
    assert_eq!(code, 2);
    assert!(
        err.contains("data row 3, column `g`: 2.5 is not a whole number"),
        "{err}"
    );
    // CSV data given as text, and through --data: a non-numeric cell names row, line, column.
    let (code, _, err) = kiln(&[
        "check",
        &temp("bad3.json", &spec(r#""y,g\r\n1,1\r\n2,x\r\n""#)),
    ]);
    assert_eq!(code, 2);
    assert!(
        err.contains("data row 2 (line 3), column `g`: `x` is not a number"),
        "{err}"
    );
    assert!(err.contains("where    data, line 3, column 3"), "{err}");
    let good = temp("good.json", &spec(r#"{"y": [1], "g": [1]}"#));
    let csv = temp("obs.csv", "\u{feff}y;g\r\n1.5;1\r\n2.5;\"3\"\r\n0.5;2\r\n");
    let (code, out, err) = kiln(&["check", &good, "--data", &csv, "--json"]);
    assert_eq!(code, 0, "{err}");
    let v: Value = serde_json::from_str(&out).unwrap();
    assert_eq!(v["data_rows"], 3);
    assert_eq!(v["data_columns"], serde_json::json!(["y", "g"]));
    let csv = temp("bad.csv", "y,g\n1,1\n,2\n");
    let (code, _, err) = kiln(&["check", &good, "--data", &csv]);
    assert_eq!(code, 2);
    assert!(
        err.contains("data row 2 (line 3), column `y`: the cell is empty"),
        "{err}"
    );
}

#[test]
fn a_prior_with_a_bad_constant_is_reported_before_any_run_at_its_place() {
    let spec =
        r#"{"variables": [{"name": "s", "lower": 0, "prior": "gamma(2, -1)"}], "energy": "s"}"#;
    let (code, _, err) = kiln(&["check", &temp("prior.json", spec)]);
    assert_eq!(code, 2);
    assert!(
        err.contains("the rate `rate` of logd_gamma must be positive; here it is -1"),
        "{err}"
    );
    assert!(
        err.contains("where    prior of `s`, line 1, column 10"),
        "{err}"
    );
}
