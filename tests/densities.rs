//! The built-in log densities (`logd_*`) against scipy.stats (values computed by
//! tests/reference/density_references.py, with scipy's version, in density_values.json), their
//! gradients in every argument against central differences, and −∞ (never NaN) outside the
//! support when the arguments are unknowns.

use kiln::formula::densities::DENSITIES;
use kiln::formula::resolve::{resolve, Inputs};
use kiln::formula::syntax::parse;
use kiln::formula::tape::{DataTable, Evaluator, Tape};
use std::sync::Arc;

fn compile(text: &str, vars: &[String], cols: &[(String, Vec<f64>)]) -> Evaluator {
    let names: Vec<String> = cols.iter().map(|c| c.0.clone()).collect();
    let columns: Vec<Vec<f64>> = cols.iter().map(|c| c.1.clone()).collect();
    let table = DataTable::of(&columns);
    let prog = parse("log_density", text).unwrap_or_else(|e| panic!("{}", e.render()));
    let inputs = Inputs::plain(vars, &names, &table);
    let graph = resolve("log_density", text, &prog, &inputs, &[])
        .unwrap_or_else(|e| panic!("{text}: {}", e.render()));
    Evaluator::new(Arc::new(Tape::compile(&graph, vars.len(), &table)))
}

struct Case {
    args: Vec<f64>,
    value: f64,
}

fn references() -> (String, Vec<(String, Vec<Case>)>) {
    let path = concat!(
        env!("CARGO_MANIFEST_DIR"),
        "/tests/reference/density_values.json"
    );
    let doc: serde_json::Value =
        serde_json::from_str(&std::fs::read_to_string(path).unwrap()).unwrap();
    let version = doc["scipy_version"].as_str().unwrap().to_string();
    let mut out = Vec::new();
    for (name, rows) in doc["densities"].as_object().unwrap() {
        let cases = rows
            .as_array()
            .unwrap()
            .iter()
            .map(|r| Case {
                args: r["args"]
                    .as_array()
                    .unwrap()
                    .iter()
                    .map(|a| a.as_f64().unwrap())
                    .collect(),
                value: match &r["value"] {
                    serde_json::Value::String(s) if s == "-inf" => f64::NEG_INFINITY,
                    v => v.as_f64().unwrap(),
                },
            })
            .collect();
        out.push((name.clone(), cases));
    }
    (version, out)
}

/// The call `logd_<name>(a1, …, an)` over unknowns a1 … an.
fn call_over_unknowns(name: &str, n: usize) -> (String, Vec<String>) {
    let vars: Vec<String> = (1..=n).map(|i| format!("a{i}")).collect();
    (format!("logd_{name}({})", vars.join(", ")), vars)
}

/// Kiln's value agrees with scipy's to 1e-12 of the value's size, or to 1e-12 of the largest
/// term the density adds up (its log normaliser, its kernel), whichever is larger: both sides
/// round each term to double precision before they cancel.
fn close(kiln: f64, scipy: f64, scale: f64) -> bool {
    if scipy == f64::NEG_INFINITY {
        return kiln == f64::NEG_INFINITY;
    }
    (kiln - scipy).abs() <= 1e-12 * scale.max(scipy.abs()).max(1.0)
}

/// The size of the largest term of the density at these arguments (see `close`).
fn term_scale(name: &str, a: &[f64]) -> f64 {
    let lg = |x: f64| libm::lgamma_r(x).0.abs();
    let l = |x: f64| libm::log(x.abs()).abs();
    match name {
        "student" => lg((a[1] + 1.0) / 2.0) + lg(a[1] / 2.0) + l(a[1]) + l(a[3]),
        "gamma" => {
            (a[1] * libm::log(a[2])).abs()
                + lg(a[1])
                + (a[2] * a[0]).abs()
                + ((a[1] - 1.0) * libm::log(a[0])).abs()
        }
        "invgamma" => {
            (a[1] * libm::log(a[2])).abs()
                + lg(a[1])
                + ((a[1] + 1.0) * libm::log(a[0])).abs()
                + (a[2] / a[0]).abs()
        }
        "beta" => lg(a[1]) + lg(a[2]) + lg(a[1] + a[2]),
        "poisson" => lg(a[0] + 1.0) + a[1].abs() + (a[0] * libm::log(a[1])).abs(),
        "binomial" => lg(a[1] + 1.0) + lg(a[0] + 1.0) + lg(a[1] - a[0] + 1.0),
        "negbinomial" => {
            lg(a[0] + a[2]) + lg(a[2]) + lg(a[0] + 1.0) + (a[0] * libm::log(a[1] + a[2])).abs()
        }
        "vonmises" => a[2].abs(),
        "lognormal" => l(a[0]),
        _ => 0.0,
    }
}

#[test]
fn every_density_matches_scipy_at_every_reference_point() {
    let (version, refs) = references();
    assert!(!version.is_empty());
    assert_eq!(
        refs.len(),
        DENSITIES.len(),
        "one reference table per density"
    );
    let mut failures = Vec::new();
    for (name, cases) in &refs {
        let d = DENSITIES
            .iter()
            .find(|d| d.name == name)
            .unwrap_or_else(|| panic!("{name}"));
        assert!(cases.len() >= 20, "{name}: {} points", cases.len());
        let (text, vars) = call_over_unknowns(name, d.args.len());
        let mut ev = compile(&text, &vars, &[]);
        let mut g = vec![0.0; vars.len()];
        for c in cases {
            let v = ev.value(&c.args);
            let vg = ev.value_grad(&c.args, &mut g);
            assert_eq!(
                v.to_bits(),
                vg.to_bits(),
                "{name}{:?}: value and gradient modes",
                c.args
            );
            if !close(v, c.value, term_scale(name, &c.args)) {
                failures.push(format!(
                    "{name}{:?}: Kiln {v}, scipy {} (scipy {version})",
                    c.args, c.value
                ));
            }
        }
    }
    assert!(failures.is_empty(), "{}", failures.join("\n"));
}

#[test]
fn densities_summed_over_data_rows_match_scipy() {
    // The same points as data rows (the first argument, and each parameter, a column plus an
    // unknown u held at 0, so that nothing is checked or folded before the run): the row loop.
    let (_, refs) = references();
    for (name, cases) in &refs {
        let d = DENSITIES.iter().find(|d| d.name == name).unwrap();
        let finite: Vec<&Case> = cases.iter().filter(|c| c.value.is_finite()).collect();
        let cols: Vec<(String, Vec<f64>)> = (0..d.args.len())
            .map(|j| (format!("c{j}"), finite.iter().map(|c| c.args[j]).collect()))
            .collect();
        let args: Vec<String> = (0..d.args.len()).map(|j| format!("c{j} + u")).collect();
        let text = format!("sum(logd_{name}({}))", args.join(", "));
        let mut ev = compile(&text, &["u".to_string()], &cols);
        let v = ev.value(&[0.0]);
        let want: f64 = finite.iter().map(|c| c.value).sum();
        let scale: f64 = finite
            .iter()
            .map(|c| c.value.abs().max(term_scale(name, &c.args)).max(1.0))
            .sum();
        assert!((v - want).abs() <= 1e-12 * scale, "{name}: {v} vs {want}");
    }
}

/// Central differences of the value in argument `i` at steps h and 2h, extrapolated to h → 0
/// (Richardson: (4 D(h) − D(2h))/3 cancels the h² term); `None` when the two do not agree with
/// each other (the point is too close to a kink or the edge of the support).
fn central(ev: &mut Evaluator, x: &[f64], i: usize) -> Option<f64> {
    let fd = |ev: &mut Evaluator, h: f64| {
        let (mut p, mut m) = (x.to_vec(), x.to_vec());
        p[i] += h;
        m[i] -= h;
        (ev.value(&p) - ev.value(&m)) / (2.0 * h)
    };
    let h = 1e-5 * x[i].abs().max(1e-2);
    let (a, b) = (fd(ev, h), fd(ev, 2.0 * h));
    (a.is_finite() && b.is_finite() && (a - b).abs() <= 1e-3 * a.abs().max(1e-3))
        .then_some((4.0 * a - b) / 3.0)
}

#[test]
fn gradients_in_every_argument_match_central_differences() {
    let (_, refs) = references();
    let mut checked = 0;
    for (name, cases) in &refs {
        let d = DENSITIES.iter().find(|d| d.name == name).unwrap();
        let (text, vars) = call_over_unknowns(name, d.args.len());
        let mut ev = compile(&text, &vars, &[]);
        let mut g = vec![0.0; vars.len()];
        let mut per_density = 0;
        for c in cases.iter().filter(|c| c.value.is_finite()) {
            // Moderate points only: far out, differences of rounded values say little.
            if c.args
                .iter()
                .any(|a| a.abs() > 1e4 || (a.abs() < 1e-4 && *a != 0.0))
            {
                continue;
            }
            ev.value_grad(&c.args, &mut g);
            for i in 0..vars.len() {
                let Some(fd) = central(&mut ev, &c.args, i) else {
                    continue;
                };
                assert!(
                    (g[i] - fd).abs() <= 1e-5 * fd.abs().max(1.0),
                    "{name}{:?}: d/d{} = {} by the tape, {fd} by differences",
                    c.args,
                    d.args[i],
                    g[i]
                );
                per_density += 1;
            }
        }
        assert!(
            per_density >= 10,
            "{name}: only {per_density} gradient checks"
        );
        checked += per_density;
    }
    assert!(checked > 300);
}

/// Each density as a likelihood: its first argument a data column, its parameters unknowns
/// (shifted by constants so that every parameter stays inside its range), summed over rows.
/// This is the row loop with its row-invariant parts pulled out of the sum: the value equals
/// the sum of the scalar evaluations, and the gradient matches central differences.
#[test]
fn densities_as_likelihoods_over_data_rows_have_exact_gradients() {
    // (name, data column, parameters as formulas of the unknowns p1 …, the point)
    type Likelihood = (
        &'static str,
        &'static [f64],
        &'static [&'static str],
        &'static [f64],
    );
    let cases: &[Likelihood] = &[
        (
            "normal",
            &[0.3, -1.2, 2.5, 0.9],
            &["p1", "exp(p2)"],
            &[0.4, -0.3],
        ),
        (
            "student",
            &[0.3, -1.2, 2.5, 9.0],
            &["exp(p1)", "p2", "exp(p3)"],
            &[1.1, 0.2, 0.1],
        ),
        (
            "cauchy",
            &[0.3, -1.2, 2.5, 40.0],
            &["p1", "exp(p2)"],
            &[0.1, 0.5],
        ),
        (
            "laplace",
            &[0.3, -1.2, 2.5, 0.9],
            &["p1", "exp(p2)"],
            &[0.35, 0.2],
        ),
        (
            "logistic",
            &[0.3, -1.2, 2.5, 0.9],
            &["p1", "exp(p2)"],
            &[0.1, -0.4],
        ),
        ("exponential", &[0.3, 1.2, 2.5, 0.0], &["exp(p1)"], &[0.3]),
        (
            "gamma",
            &[0.3, 1.2, 2.5, 0.9],
            &["exp(p1)", "exp(p2)"],
            &[0.7, -0.1],
        ),
        (
            "invgamma",
            &[0.3, 1.2, 2.5, 0.9],
            &["exp(p1)", "exp(p2)"],
            &[0.7, 0.4],
        ),
        (
            "beta",
            &[0.3, 0.12, 0.95, 0.5],
            &["exp(p1)", "exp(p2)"],
            &[0.2, 0.6],
        ),
        (
            "lognormal",
            &[0.3, 1.2, 2.5, 0.9],
            &["p1", "exp(p2)"],
            &[0.1, -0.2],
        ),
        (
            "vonmises",
            &[0.3, -1.2, 2.5, 0.9],
            &["p1", "exp(p2)"],
            &[0.2, 0.8],
        ),
        (
            "uniform",
            &[0.3, 1.2, 2.5, 0.9],
            &["p1 - 2", "p2 + 3"],
            &[0.5, 0.5],
        ),
        ("poisson", &[0.0, 3.0, 1.0, 7.0], &["exp(p1)"], &[0.9]),
        (
            "binomial",
            &[0.0, 3.0, 1.0, 2.0],
            &["4", "1/(1 + exp(-p1))"],
            &[0.3],
        ),
        (
            "negbinomial",
            &[0.0, 3.0, 1.0, 7.0],
            &["exp(p1)", "exp(p2)"],
            &[1.0, 0.5],
        ),
        (
            "bernoulli",
            &[0.0, 1.0, 1.0, 0.0],
            &["1/(1 + exp(-p1))"],
            &[0.4],
        ),
        ("bernoulli_logodds", &[0.0, 1.0, 1.0, 0.0], &["p1"], &[0.4]),
    ];
    for (name, column, params, point) in cases {
        let vars: Vec<String> = (1..=point.len()).map(|i| format!("p{i}")).collect();
        let text = format!("sum(logd_{name}(y, {}))", params.join(", "));
        let mut ev = compile(&text, &vars, &[("y".to_string(), column.to_vec())]);
        let mut g = vec![0.0; vars.len()];
        let v = ev.value_grad(point, &mut g);
        assert!(v.is_finite(), "{text}: {v}");
        // The same as adding the scalar density row by row.
        let mut total = 0.0;
        for y in column.iter() {
            let t = format!("logd_{name}({y}, {})", params.join(", "));
            total += compile(&t, &vars, &[]).value(point);
        }
        assert!(
            (v - total).abs() <= 1e-12 * total.abs().max(1.0),
            "{text}: {v} vs {total}"
        );
        for i in 0..vars.len() {
            let fd = central(&mut ev, point, i)
                .unwrap_or_else(|| panic!("{text}: differences unstable"));
            assert!(
                (g[i] - fd).abs() <= 1e-6 * fd.abs().max(1.0),
                "{text}: d/dp{} = {} vs {fd}",
                i + 1,
                g[i]
            );
        }
        // Outside the support (a parameter pushed out), −∞ through the row loop too.
        if params.iter().any(|p| p.starts_with("exp(")) {
            let j = params.iter().position(|p| p.starts_with("exp(")).unwrap();
            let mut out: Vec<String> = params.iter().map(|p| p.to_string()).collect();
            out[j] = format!("-{}", out[j]);
            let text = format!("sum(logd_{name}(y, {}))", out.join(", "));
            let mut ev = compile(&text, &vars, &[("y".to_string(), column.to_vec())]);
            assert_eq!(ev.value_grad(point, &mut g), f64::NEG_INFINITY, "{text}");
            assert!(g.iter().all(|&x| x == 0.0), "{text}: {g:?}");
        }
    }
}

#[test]
fn outside_the_support_the_log_density_is_minus_infinity_with_a_zero_gradient() {
    let outside: &[(&str, &[f64])] = &[
        ("normal", &[0.0, 0.0, -1.0]),
        ("normal", &[0.0, 0.0, 0.0]),
        ("student", &[0.0, 0.0, 0.0, 1.0]),
        ("student", &[0.0, 2.0, 0.0, -3.0]),
        ("cauchy", &[1.0, 0.0, -0.5]),
        ("laplace", &[1.0, 0.0, 0.0]),
        ("logistic", &[1.0, 0.0, -2.0]),
        ("exponential", &[-0.5, 1.0]),
        ("exponential", &[0.5, -1.0]),
        ("gamma", &[-1.0, 2.0, 1.0]),
        ("gamma", &[1.0, -2.0, 1.0]),
        ("gamma", &[1.0, 2.0, 0.0]),
        ("invgamma", &[0.0, 2.0, 1.0]),
        ("beta", &[1.5, 2.0, 2.0]),
        ("beta", &[0.5, 0.0, 2.0]),
        ("lognormal", &[-1.0, 0.0, 1.0]),
        ("vonmises", &[0.0, 0.0, -1.0]),
        ("uniform", &[2.0, 0.0, 1.0]),
        ("uniform", &[0.5, 1.0, 0.0]),
        ("poisson", &[-1.0, 2.0]),
        ("poisson", &[1.0, -2.0]),
        ("binomial", &[4.0, 3.0, 0.5]),
        ("binomial", &[1.0, 3.0, 1.5]),
        ("negbinomial", &[1.0, 2.0, 0.0]),
        ("negbinomial", &[1.0, -2.0, 1.0]),
        ("bernoulli", &[2.0, 0.5]),
        ("bernoulli", &[1.0, -0.1]),
        ("bernoulli_logodds", &[-1.0, 0.3]),
    ];
    for (name, args) in outside {
        let (text, vars) = call_over_unknowns(name, args.len());
        let mut ev = compile(&text, &vars, &[]);
        let mut g = vec![7.0; args.len()];
        assert_eq!(ev.value(args), f64::NEG_INFINITY, "{name}{args:?}");
        assert_eq!(
            ev.value_grad(args, &mut g),
            f64::NEG_INFINITY,
            "{name}{args:?}"
        );
        assert!(
            g.iter().all(|&x| x == 0.0),
            "{name}{args:?}: gradient {g:?}"
        );
        // In a sum over rows as well, and inside a mixture the other component carries on.
        let text = format!("sum(c + logd_{name}({}))", vars.join(", "));
        let mut ev = compile(&text, &vars, &[("c".to_string(), vec![0.0, 1.0])]);
        assert_eq!(ev.value(args), f64::NEG_INFINITY, "{text}");
        let text = format!("logsumexp(logd_{name}({}), 0)", vars.join(", "));
        let mut ev = compile(&text, &vars, &[]);
        assert_eq!(ev.value(args), 0.0, "{text}");
    }
}

#[test]
fn every_function_is_documented_in_the_readme_with_an_example() {
    let readme =
        std::fs::read_to_string(concat!(env!("CARGO_MANIFEST_DIR"), "/README.md")).unwrap();
    let section = readme
        .split("## The formula language")
        .nth(1)
        .and_then(|s| s.split("\n## ").next())
        .expect("a README section on the formula language");
    for f in kiln::formula::catalogue::catalogue() {
        assert!(
            section.contains(&format!("`{}(", f.name)),
            "README: no example of `{}`",
            f.name
        );
    }
    // The catalogue and the language agree: every name resolves with the arguments it lists.
    for f in kiln::formula::catalogue::catalogue() {
        if f.args.contains(&"…".to_string()) || f.kind == "form" {
            continue;
        }
        let vars: Vec<String> = (1..=f.args.len()).map(|i| format!("a{i}")).collect();
        let text = format!("{}({})", f.name, vars.join(", "));
        let prog = parse("energy", &text).unwrap();
        let table = DataTable::of(&[]);
        let inputs = Inputs::plain(&vars, &[], &table);
        assert!(
            resolve("energy", &text, &prog, &inputs, &[]).is_ok(),
            "{text}"
        );
    }
}
