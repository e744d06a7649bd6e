//! Exact gradients: the compiled tape's reverse-mode gradient against central finite
//! differences (a mathematical identity up to O(h²) truncation) on many random formulas and
//! points, and against gradients derived by hand.

// Hand-derived values use the platform maths library on purpose: an independent implementation.
#![allow(clippy::disallowed_methods)]

use kiln::common::rng::{Purpose, Stream};
use kiln::model::target::Target;

fn target(spec: &str) -> Target {
    let spec = kiln::parse_spec("test", spec).unwrap_or_else(|e| panic!("{}", e.render()));
    Target::from_spec(&spec).unwrap_or_else(|e| panic!("{}", e.render()))
}

/// A random formula over x, y, z; `depth` bounds its size.
fn random_formula(rng: &mut Stream, depth: usize, data: bool) -> String {
    let leaf = |rng: &mut Stream| -> String {
        let names = if data {
            vec!["x", "y", "z", "u", "v"]
        } else {
            vec!["x", "y", "z"]
        };
        match rng.below(4) {
            0 => format!("{:.3}", 4.0 * rng.uniform() - 2.0),
            _ => names[rng.below(names.len())].to_string(),
        }
    };
    if depth == 0 {
        return leaf(rng);
    }
    let a = random_formula(rng, depth - 1, data);
    let b = random_formula(rng, depth - 1, data);
    match rng.below(22) {
        0 => format!("({a} + {b})"),
        1 => format!("({a} - {b})"),
        2 => format!("({a} * {b})"),
        3 => format!("({a} / (1.5 + {b}^2))"),
        4 => format!("({a})^2"),
        5 => format!("({a})^3"),
        6 => format!("exp(0.3 * {a})"),
        7 => format!("log(1 + ({a})^2)"),
        8 => format!("log1p(({a})^2)"),
        9 => format!("expm1(0.2 * {a})"),
        10 => format!("sqrt(2 + ({a})^2)"),
        11 => format!("sin({a})"),
        12 => format!("cos({a})"),
        13 => format!("atan({a})"),
        14 => format!("tanh({a})"),
        15 => format!("sinh(0.5 * {a})"),
        16 => format!("erf({a})"),
        17 => format!("lgamma(2 + ({a})^2)"),
        18 => format!("atan2({a}, 2 + ({b})^2)"),
        19 => format!("logsumexp({a}, {b}, 0.5)"),
        20 => format!("pow(1.2 + ({a})^2, 0.7 + 0.1 * {b})"),
        _ => format!("asin(0.9 * tanh({a})) + acos(0.5 * tanh({b})) + cosh(0.3 * {a})"),
    }
}

/// Checks the gradient at `z` against central differences; returns false if the check was
/// not meaningful (non-finite values, or finite differences unstable in `h`).
fn check_point(t: &Target, z: &[f64], context: &str) -> bool {
    let d = z.len();
    let mut ev = t.evaluator();
    let mut g = vec![0.0; d];
    let e = ev.energy_grad(z, &mut g);
    if !e.is_finite() {
        return false;
    }
    for i in 0..d {
        let mut fd = |h: f64| {
            let mut zp = z.to_vec();
            let mut zm = z.to_vec();
            zp[i] += h;
            zm[i] -= h;
            (ev.energy(&zp) - ev.energy(&zm)) / (2.0 * h)
        };
        let f1 = fd(1e-5);
        let f2 = fd(2e-5);
        if !(f1.is_finite() && f2.is_finite()) {
            return false;
        }
        let scale = 1.0 + g[i].abs() + e.abs() * 1e-3;
        if (f1 - f2).abs() > 1e-6 * scale {
            return false; // too curved here for differences to be trusted
        }
        assert!(
            (g[i] - f1).abs() < 2e-6 * scale,
            "{context}: d/dz{i} reverse mode {} vs finite differences {f1} at {z:?}",
            g[i]
        );
    }
    true
}

#[test]
fn random_formulas_have_exact_gradients() {
    let mut rng = Stream::new(2024, Purpose::Check, 0);
    let mut checked = 0;
    let total = 400;
    for case in 0..total {
        let f = random_formula(&mut rng, 1 + case % 4, false);
        let spec = format!(
            r#"{{"variables": [{{"name": "x"}}, {{"name": "y"}}, {{"name": "z"}}], "energy": "{f}"}}"#
        );
        let t = target(&spec);
        let z: Vec<f64> = (0..3).map(|_| 3.0 * rng.uniform() - 1.5).collect();
        if check_point(&t, &z, &f) {
            checked += 1;
        }
    }
    // Guard against a vacuous pass: most random cases must have been checked.
    assert!(
        checked > total * 3 / 4,
        "only {checked} of {total} cases checked"
    );
}

#[test]
fn gradients_through_data_sums_bounds_and_lets() {
    let mut rng = Stream::new(99, Purpose::Check, 1);
    let mut checked = 0;
    let total = 150;
    let u: Vec<String> = (0..7)
        .map(|i| format!("{:.2}", -1.0 + 0.37 * i as f64))
        .collect();
    let v: Vec<String> = (0..7)
        .map(|i| format!("{:.2}", 0.5 + 0.11 * i as f64))
        .collect();
    for case in 0..total {
        let inner = random_formula(&mut rng, 1 + case % 3, true);
        let outer = random_formula(&mut rng, 1, false);
        let f = format!("let s = {outer}; sum({inner}) * 0.1 + s + sum((u - x)^2 * v)");
        let spec = format!(
            r#"{{"variables": [{{"name": "x"}}, {{"name": "y", "lower": -1}}, {{"name": "z", "lower": -2, "upper": 3}}],
                "data": {{"u": [{}], "v": [{}]}}, "energy": "{f}"}}"#,
            u.join(","),
            v.join(",")
        );
        let t = target(&spec);
        let z: Vec<f64> = (0..3).map(|_| 2.0 * rng.uniform() - 1.0).collect();
        if check_point(&t, &z, &f) {
            checked += 1;
        }
    }
    assert!(
        checked > total * 3 / 4,
        "only {checked} of {total} cases checked"
    );
}

#[test]
fn hand_derived_gradients() {
    // E(x, y) = (x^2 - 1)^2 + 3 x y + log(1 + y^2) - sum over rows of w_i * exp(-x * t_i)
    // dE/dx = 4x(x^2 - 1) + 3y + Σ w_i t_i exp(-x t_i);  dE/dy = 3x + 2y / (1 + y^2).
    let t = target(
        r#"{"variables": [{"name": "x"}, {"name": "y"}],
            "data": {"t": [0.5, 1.0, 2.0], "w": [1.0, -2.0, 0.25]},
            "energy": "(x^2 - 1)^2 + 3*x*y + log(1 + y^2) - sum(w * exp(-x * t))"}"#,
    );
    let (x, y) = (0.7f64, -1.3f64);
    let (ts, ws) = ([0.5, 1.0, 2.0], [1.0, -2.0, 0.25]);
    let e_want = (x * x - 1.0).powi(2) + 3.0 * x * y + (1.0 + y * y).ln()
        - ts.iter()
            .zip(&ws)
            .map(|(t, w)| w * (-x * t).exp())
            .sum::<f64>();
    let gx = 4.0 * x * (x * x - 1.0)
        + 3.0 * y
        + ts.iter()
            .zip(&ws)
            .map(|(t, w)| w * t * (-x * t).exp())
            .sum::<f64>();
    let gy = 3.0 * x + 2.0 * y / (1.0 + y * y);
    let mut g = [0.0; 2];
    let e = t.evaluator().energy_grad(&[x, y], &mut g);
    assert!((e - e_want).abs() < 1e-12, "{e} vs {e_want}");
    assert!(
        (g[0] - gx).abs() < 1e-12 && (g[1] - gy).abs() < 1e-12,
        "{g:?} vs {gx} {gy}"
    );

    // A log density on a bounded unknown: log p(x) = a log x + b log(1 - x) on (0, 1).
    // In z = logit(x), E(z) = -(a+1) log x - (b+1) log(1-x) (Jacobian x(1-x) added), and
    // dE/dz = -(a+1)(1-x) + (b+1) x.
    let t = target(
        r#"{"variables": [{"name": "x", "lower": 0, "upper": 1}], "log_density": "2.5*log(x) + 0.5*log(1 - x)"}"#,
    );
    let z = 0.4f64;
    let x = 1.0 / (1.0 + (-z).exp());
    let mut g = [0.0];
    let e = t.evaluator().energy_grad(&[z], &mut g);
    assert!((e - (-(3.5) * x.ln() - 1.5 * (1.0 - x).ln())).abs() < 1e-12);
    assert!((g[0] - (-(3.5) * (1.0 - x) + 1.5 * x)).abs() < 1e-12);

    // Special functions: d/dx lgamma(x) = digamma(x); at x = 1, −γ (Euler's constant).
    let t =
        target(r#"{"variables": [{"name": "x"}], "energy": "lgamma(x) + erf(x) + atan2(x, 2)"}"#);
    let mut g = [0.0];
    t.evaluator().energy_grad(&[1.0], &mut g);
    let want =
        -0.577_215_664_901_532_9 + 2.0 / std::f64::consts::PI.sqrt() * (-1.0f64).exp() + 2.0 / 5.0;
    assert!((g[0] - want).abs() < 1e-13, "{} vs {want}", g[0]);
}

#[test]
fn mixture_targets_have_exact_gradients() {
    let t = target(
        r#"{"mixture": [{"weight": 2, "mean": [0, 1], "cov": [[1, 0.5], [0.5, 2]]},
                        {"weight": 1, "mean": [3, -1], "sd": [0.5, 0.7]}]}"#,
    );
    let mut rng = Stream::new(5, Purpose::Check, 2);
    let mut checked = 0;
    for _ in 0..50 {
        let z: Vec<f64> = (0..2).map(|_| 6.0 * rng.uniform() - 2.0).collect();
        if check_point(&t, &z, "mixture") {
            checked += 1;
        }
    }
    assert!(checked >= 45);
}

/// A constant `sum` next to a constant: value and gradient evaluation agree (found by fuzzing).
#[test]
fn constant_sums_evaluate_the_same_with_and_without_gradient() {
    let t = target(
        r#"{"variables": [{"name": "x"}, {"name": "y", "lower": -2, "upper": 3}],
            "data": {"d": [0.5, -1.0, 2.0]}, "energy": "3 +sum(1)"}"#,
    );
    let mut ev = t.evaluator();
    let mut g = [0.0; 2];
    let a = ev.energy_grad(&[6.4, 0.0], &mut g);
    let b = ev.energy(&[6.4, 0.0]);
    assert_eq!(a.to_bits(), b.to_bits(), "{a} vs {b}");
}

/// Constants the compiler makes (a sum over rows of a row-independent body is rows × body)
/// that equal a constant of the formula share its slot correctly (found by fuzzing).
#[test]
fn compiler_constants_equal_to_formula_constants() {
    // Two data rows: sum(y) compiles to 2 * y, next to the formula's own 2.
    let t = target(
        r#"{"variables": [{"name": "x"}, {"name": "y"}], "data": {"d": [1, 2]}, "energy": "2*x^2 + sum(y^2) + 0.5*sum(1) + 1"}"#,
    );
    let mut ev = t.evaluator();
    let (x, y) = (0.7f64, -1.3f64);
    let want = 2.0 * x * x + 2.0 * y * y + 0.5 * 2.0 + 1.0;
    let mut g = [0.0; 2];
    let e = ev.energy_grad(&[x, y], &mut g);
    assert!(
        (e - want).abs() < 1e-12 && (ev.energy(&[x, y]) - want).abs() < 1e-12,
        "{e} vs {want}"
    );
    assert!(
        (g[0] - 4.0 * x).abs() < 1e-12 && (g[1] - 4.0 * y).abs() < 1e-12,
        "{g:?}"
    );
}
