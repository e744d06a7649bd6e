//! Engine speed: nanoseconds per energy + gradient of the compiled formula tape against a
//! hand-written Rust function of the same energy with its analytic gradient, for three energies
//! of the benchmark (the egg crate; a Gaussian likelihood summed over the 272 Old Faithful
//! eruption durations; the 8-D rotated product) and two likelihoods written
//! with built-in densities (a Student-t location-scale likelihood, `logd_student`, over 10,
//! 100, 1000 and 10 000 rows: how the cost grows with the data; a Poisson log-linear
//! regression, `logd_poisson`, 1000 rows). The same code runs natively (`kiln bench`) and
//! as WebAssembly under Node (`src/wasm_bench.rs`, `scripts/bench-wasm.mjs`); only the clock is
//! passed in, because `std::time::Instant` does not exist on wasm32-unknown-unknown.
//! Must not: read files or the clock itself.

use crate::common::maths::{exp, ln, log_sum_exp};
use crate::common::rng::{Purpose, Stream};
use crate::formula::tape::{DataTable, Evaluator, Tape};
use std::hint::black_box;
use std::sync::Arc;

/// One energy timed both ways.
#[derive(Clone, Debug, serde::Serialize, serde::Deserialize)]
pub struct SpeedRow {
    pub energy: String,
    pub dimension: usize,
    pub data_rows: usize,
    /// Nanoseconds per energy + gradient through the tape (`Evaluator::value_grad`).
    pub tape_ns: f64,
    /// Nanoseconds per energy + gradient of the hand-written function.
    pub hand_ns: f64,
    /// tape ÷ hand-written.
    pub ratio: f64,
    /// Largest difference between the two (value and gradient), relative to their size.
    pub max_difference: f64,
}

type HandFn = fn(&[f64], &mut [f64], &[f64]) -> f64;

struct Case {
    name: String,
    tape: Evaluator,
    hand: HandFn,
    data: Vec<f64>,
    points: Vec<Vec<f64>>,
    dim: usize,
    rows: usize,
}

fn compile(text: &str, vars: &[String], data: &[(&str, Vec<f64>)]) -> Evaluator {
    let names: Vec<String> = data.iter().map(|(n, _)| n.to_string()).collect();
    let columns: Vec<Vec<f64>> = data.iter().map(|(_, c)| c.clone()).collect();
    let table = DataTable::of(&columns);
    // The formulas are constants of this module, never user input; the benchmark tests run them,
    // so these `expect`s cannot fire.
    let prog = crate::formula::syntax::parse("energy", text).expect("benchmark formula parses");
    let inputs = crate::formula::resolve::Inputs::plain(vars, &names, &table);
    let graph = crate::formula::resolve::resolve("energy", text, &prog, &inputs, &[])
        .expect("benchmark formula checks");
    let tape = Tape::compile(&graph, vars.len(), &table);
    Evaluator::new(Arc::new(tape))
}

// ---------------------------------------------------------------------------------------------
// The three energies, as formulas and by hand.

/// The egg crate's energy (uniform prior on [0, 10π]² folded in as a constant).
pub const EGG_CRATE: &str = "-(2 + cos(x/2)*cos(y/2))^5 + 2*log(10*pi)";

fn egg_crate_hand(v: &[f64], g: &mut [f64], _: &[f64]) -> f64 {
    let (cx, sx) = (libm::cos(0.5 * v[0]), libm::sin(0.5 * v[0]));
    let (cy, sy) = (libm::cos(0.5 * v[1]), libm::sin(0.5 * v[1]));
    let a = 2.0 + cx * cy;
    let a2 = a * a;
    let a4 = a2 * a2;
    g[0] = 2.5 * a4 * sx * cy;
    g[1] = 2.5 * a4 * cx * sy;
    -(a4 * a) + 2.0 * ln(10.0 * crate::common::maths::PI)
}

/// A Gaussian likelihood with unknown mean and sd, summed over the data column `y`.
pub const GAUSSIAN_SUM: &str = "sum(0.5*((y - mu)/sigma)^2 + log(sigma) + 0.5*log(2*pi))";

fn gaussian_sum_hand(v: &[f64], g: &mut [f64], y: &[f64]) -> f64 {
    let (mu, sigma) = (v[0], v[1]);
    let inv = 1.0 / sigma;
    let (mut e, mut dmu, mut dsig) = (0.0, 0.0, 0.0);
    for &yi in y {
        let r = (yi - mu) * inv;
        e += 0.5 * r * r;
        dmu -= r * inv;
        dsig -= r * r * inv;
    }
    let n = y.len() as f64;
    g[0] = dmu;
    g[1] = dsig + n * inv;
    e + n * (ln(sigma) + 0.5 * crate::common::maths::LN_2PI)
}

/// Per factor of the rotated product: weights and means of its four N(·, 0.5²) components.
pub const FACTOR_WEIGHTS: [f64; 4] = [0.7 * 2.0 / 3.0, 0.7 / 3.0, 0.3 * 2.0 / 3.0, 0.3 / 3.0];
pub const FACTOR_MEANS: [f64; 4] = [-3.0, -3.75, 3.0, 3.75];
pub const FACTOR_SD: f64 = 0.5;

/// The reflection H = I − 2 v vᵀ/|v|², v_i = 1 + 0.37 i (orthogonal and symmetric, |det| = 1).
pub fn householder(d: usize) -> Vec<Vec<f64>> {
    let v: Vec<f64> = (0..d).map(|i| 1.0 + 0.37 * i as f64).collect();
    let vv: f64 = v.iter().map(|a| a * a).sum();
    (0..d)
        .map(|i| {
            (0..d)
                .map(|j| if i == j { 1.0 } else { 0.0 } - 2.0 * v[i] * v[j] / vv)
                .collect()
        })
        .collect()
}

/// The energy of the rotated product in `d` dimensions as a formula over x1 … xd: y = H x, and
/// each y_i has the density Σ_j a_j N(y_i; m_j, 0.5²) (two modes near ∓3, each skewed outward
/// by a second component 1.5 sd further out). Z = Π_i Σ_j a_j = 1 exactly.
pub fn rotated_product_formula(d: usize) -> String {
    let h = householder(d);
    let mut lets = String::new();
    let mut terms = Vec::new();
    let two_var = 2.0 * FACTOR_SD * FACTOR_SD;
    for i in 0..d {
        let lin: Vec<String> = (0..d)
            .map(|j| format!("({:.17})*x{}", h[i][j], j + 1))
            .collect();
        lets.push_str(&format!("let y{} = {};\n", i + 1, lin.join(" + ")));
        let parts: Vec<String> = (0..4)
            .map(|j| {
                let m = FACTOR_MEANS[j];
                let shifted = if m < 0.0 {
                    format!("(y{} + {})", i + 1, -m)
                } else {
                    format!("(y{} - {})", i + 1, m)
                };
                format!("log({:.17}) - {shifted}^2 / {two_var}", FACTOR_WEIGHTS[j])
            })
            .collect();
        terms.push(format!(
            "logsumexp({}) - 0.5*log(2*pi*{})",
            parts.join(", "),
            FACTOR_SD * FACTOR_SD
        ));
    }
    format!("{lets}-({})", terms.join(" + "))
}

fn rotated_8_hand(x: &[f64], g: &mut [f64], h: &[f64]) -> f64 {
    // `h` is H row-major (8 × 8).
    const D: usize = 8;
    let inv_var = 1.0 / (FACTOR_SD * FACTOR_SD);
    let lw = [
        ln(FACTOR_WEIGHTS[0]),
        ln(FACTOR_WEIGHTS[1]),
        ln(FACTOR_WEIGHTS[2]),
        ln(FACTOR_WEIGHTS[3]),
    ];
    let norm = 0.5 * ln(2.0 * crate::common::maths::PI * FACTOR_SD * FACTOR_SD);
    let mut e = 0.0;
    let mut dy = [0.0; D];
    for i in 0..D {
        let mut y = 0.0;
        for j in 0..D {
            y += h[i * D + j] * x[j];
        }
        let mut t = [0.0; 4];
        for k in 0..4 {
            let r = y - FACTOR_MEANS[k];
            t[k] = lw[k] - 0.5 * r * r * inv_var;
        }
        let lse = log_sum_exp(&t);
        e -= lse - norm;
        let mut s = 0.0;
        for k in 0..4 {
            s += exp(t[k] - lse) * (y - FACTOR_MEANS[k]) * inv_var;
        }
        dy[i] = s;
    }
    for j in 0..D {
        let mut s = 0.0;
        for i in 0..D {
            s += h[i * D + j] * dy[i];
        }
        g[j] = s;
    }
    e
}

/// Degrees of freedom of the Student-t speed row.
const STUDENT_DF: f64 = 4.0;

/// A Student-t likelihood (df 4) with unknown location and scale over the column `y`, through
/// the built-in density.
pub const STUDENT_SUM: &str = "-sum(logd_student(y, 4, mu, sigma))";

fn student_sum_hand(v: &[f64], g: &mut [f64], y: &[f64]) -> f64 {
    let (mu, sigma) = (v[0], v[1]);
    let nu = STUDENT_DF;
    let inv = 1.0 / (nu * sigma * sigma);
    let half = 0.5 * (nu + 1.0);
    let (mut l, mut rw, mut tw) = (0.0, 0.0, 0.0);
    for &yi in y {
        let r = yi - mu;
        let t = r * r * inv;
        l += crate::common::maths::ln_1p(t);
        let w = 1.0 / (1.0 + t);
        rw += r * w;
        tw += t * w;
    }
    let n = y.len() as f64;
    let c = crate::common::maths::lgamma(half)
        - crate::common::maths::lgamma(0.5 * nu)
        - 0.5 * ln(nu * crate::common::maths::PI);
    g[0] = -2.0 * half * inv * rw;
    g[1] = n / sigma - 2.0 * half * tw / sigma;
    n * (ln(sigma) - c) + half * l
}

/// A Poisson regression with a log link: counts `k` against the covariate `x`, through the
/// built-in density.
pub const POISSON_SUM: &str = "-sum(logd_poisson(k, exp(a + b*x)))";

/// `data` holds x, then k, then Σ lgamma(k + 1) (the constant of the log mass, computed once).
fn poisson_sum_hand(v: &[f64], g: &mut [f64], data: &[f64]) -> f64 {
    let (a, b) = (v[0], v[1]);
    let n = (data.len() - 1) / 2;
    let (x, k) = (&data[..n], &data[n..2 * n]);
    let (mut l, mut da, mut db) = (0.0, 0.0, 0.0);
    for i in 0..n {
        let eta = a + b * x[i];
        let m = exp(eta);
        l += k[i] * eta - m;
        let r = k[i] - m;
        da += r;
        db += r * x[i];
    }
    g[0] = -da;
    g[1] = -db;
    -(l - data[2 * n])
}

/// Rows of the Poisson regression written with a built-in density.
const DENSITY_ROWS: usize = 1000;

/// Row counts of the Student-t likelihood's growth series (one speed row each).
pub const GROWTH_ROWS: [usize; 4] = [10, 100, 1000, 10_000];

/// The 272 Old Faithful eruption durations of the benchmark's open-dataset target.
pub fn faithful_eruptions() -> Vec<f64> {
    // FAITHFUL_SPEC is a file compiled into the binary (bench/targets/), not user input, and the
    // benchmark tests parse it, so these `expect`s cannot fire.
    let spec: serde_json::Value = serde_json::from_str(crate::bench::targets::FAITHFUL_SPEC)
        .expect("the Faithful spec is JSON");
    spec["data"]["eruptions"]
        .as_array()
        .expect("eruptions column")
        .iter()
        .filter_map(|v| v.as_f64())
        .collect()
}

fn cases() -> Vec<Case> {
    let mut rng = Stream::new(1, Purpose::Check, 1 << 36);
    let mut points = |d: usize, lo: f64, hi: f64| -> Vec<Vec<f64>> {
        (0..64)
            .map(|_| (0..d).map(|_| lo + (hi - lo) * rng.uniform()).collect())
            .collect()
    };
    let xy: Vec<String> = vec!["x".into(), "y".into()];
    let egg = Case {
        name: "egg crate (2-D)".into(),
        tape: compile(EGG_CRATE, &xy, &[]),
        hand: egg_crate_hand,
        data: Vec::new(),
        points: points(2, 0.0, 10.0 * crate::common::maths::PI),
        dim: 2,
        rows: 0,
    };
    let y = faithful_eruptions();
    let ms: Vec<String> = vec!["mu".into(), "sigma".into()];
    let gauss_points: Vec<Vec<f64>> = points(2, 0.0, 1.0)
        .into_iter()
        .map(|p| vec![2.0 + 2.5 * p[0], 0.5 + 1.5 * p[1]])
        .collect();
    let gauss = Case {
        name: "Gaussian likelihood, 272 rows (2-D)".into(),
        tape: compile(GAUSSIAN_SUM, &ms, &[("y", y.clone())]),
        hand: gaussian_sum_hand,
        rows: y.len(),
        data: y,
        points: gauss_points,
        dim: 2,
    };
    let d = 8;
    let vars: Vec<String> = (1..=d).map(|i| format!("x{i}")).collect();
    let h: Vec<f64> = householder(d).into_iter().flatten().collect();
    let rot = Case {
        name: "rotated product (8-D)".into(),
        tape: compile(&rotated_product_formula(d), &vars, &[]),
        hand: rotated_8_hand,
        data: h,
        points: points(d, -4.0, 4.0),
        dim: d,
        rows: 0,
    };
    // The Student-t likelihood over 10, 100, 1000 and 10 000 rows (the first n of one sample
    // from a Student-t, df 4, around 3 with scale 0.8): how the cost grows with the data.
    let mut data_rng = Stream::new(2, Purpose::Check, 1 << 36);
    let all_ys: Vec<f64> = (0..*GROWTH_ROWS.last().unwrap_or(&0))
        .map(|_| {
            let z = data_rng.normal();
            let chi2: f64 = (0..4)
                .map(|_| {
                    let w = data_rng.normal();
                    w * w
                })
                .sum();
            3.0 + 0.8 * z / crate::common::maths::sqrt(chi2 / STUDENT_DF)
        })
        .collect();
    let student_points: Vec<Vec<f64>> = points(2, 0.0, 1.0)
        .into_iter()
        .map(|p| vec![2.5 + p[0], 0.5 + 0.6 * p[1]])
        .collect();
    let students: Vec<Case> = GROWTH_ROWS
        .iter()
        .map(|&n| {
            let ys = all_ys[..n].to_vec();
            Case {
                name: format!("Student-t likelihood via logd_student, {n} rows (2-D)"),
                tape: compile(STUDENT_SUM, &ms, &[("y", ys.clone())]),
                hand: student_sum_hand,
                rows: n,
                data: ys,
                points: student_points.clone(),
                dim: 2,
            }
        })
        .collect();
    // 1000 counts of a Poisson regression, rate exp(0.3 + 0.9 x), x in [0, 2].
    let xs: Vec<f64> = (0..DENSITY_ROWS)
        .map(|_| 2.0 * data_rng.uniform())
        .collect();
    let ks: Vec<f64> = xs
        .iter()
        .map(|&x| {
            // Inversion of the Poisson distribution function.
            let rate = exp(0.3 + 0.9 * x);
            let u = data_rng.uniform();
            let (mut k, mut p) = (0.0, exp(-rate));
            let mut cdf = p;
            while u > cdf && k < 1000.0 {
                k += 1.0;
                p *= rate / k;
                cdf += p;
            }
            k
        })
        .collect();
    let constant: f64 = ks
        .iter()
        .map(|&k| crate::common::maths::lgamma(k + 1.0))
        .sum();
    let mut poisson_data = xs.clone();
    poisson_data.extend(&ks);
    poisson_data.push(constant);
    let ab: Vec<String> = vec!["a".into(), "b".into()];
    let poisson_points: Vec<Vec<f64>> = points(2, 0.0, 1.0)
        .into_iter()
        .map(|p| vec![0.1 + 0.4 * p[0], 0.7 + 0.4 * p[1]])
        .collect();
    let poisson = Case {
        name: "Poisson regression via logd_poisson, 1000 rows (2-D)".into(),
        tape: compile(POISSON_SUM, &ab, &[("x", xs), ("k", ks)]),
        hand: poisson_sum_hand,
        rows: DENSITY_ROWS,
        data: poisson_data,
        points: poisson_points,
        dim: 2,
    };
    let mut out = vec![egg, gauss, rot];
    out.extend(students);
    out.push(poisson);
    out
}

/// Times `f` over the points: the best of 5 repetitions of at least `min_ms` each, in ns per call.
fn time_ns(
    now_ms: &mut dyn FnMut() -> f64,
    min_ms: f64,
    points: &[Vec<f64>],
    f: &mut dyn FnMut(&[f64], &mut [f64]) -> f64,
) -> f64 {
    let d = points[0].len();
    let mut g = vec![0.0; d];
    // Calibrate the number of calls to about `min_ms`.
    let mut n = 64usize;
    loop {
        let t0 = now_ms();
        let mut acc = 0.0;
        for i in 0..n {
            acc += f(black_box(&points[i % points.len()]), &mut g);
        }
        black_box(acc);
        let dt = now_ms() - t0;
        if dt >= 0.2 * min_ms || n > (1 << 30) {
            n = ((n as f64) * min_ms / dt.max(1e-3)).ceil() as usize;
            break;
        }
        n *= 4;
    }
    let mut best = f64::INFINITY;
    for _ in 0..5 {
        let t0 = now_ms();
        let mut acc = 0.0;
        for i in 0..n {
            acc += f(black_box(&points[i % points.len()]), &mut g);
            acc += g[0];
        }
        black_box(acc);
        let dt = now_ms() - t0;
        best = best.min(dt * 1e6 / n as f64);
    }
    best
}

/// Measures every energy both ways; `now_ms` is a clock in milliseconds.
pub fn measure(now_ms: &mut dyn FnMut() -> f64, min_ms: f64) -> Vec<SpeedRow> {
    let mut out = Vec::new();
    for mut c in cases() {
        // The two agree (value and gradient) at every point.
        let mut worst: f64 = 0.0;
        let (mut g1, mut g2) = (vec![0.0; c.dim], vec![0.0; c.dim]);
        for p in &c.points {
            let a = c.tape.value_grad(p, &mut g1);
            let b = (c.hand)(p, &mut g2, &c.data);
            let scale = 1.0 + a.abs().max(b.abs());
            worst = worst.max((a - b).abs() / scale);
            for i in 0..c.dim {
                let s = 1.0 + g1[i].abs().max(g2[i].abs());
                worst = worst.max((g1[i] - g2[i]).abs() / s);
            }
        }
        let points = c.points.clone();
        let tape_ns = {
            let ev = &mut c.tape;
            time_ns(now_ms, min_ms, &points, &mut |x, g| ev.value_grad(x, g))
        };
        let hand = c.hand;
        let data = c.data.clone();
        let hand_ns = time_ns(now_ms, min_ms, &points, &mut |x, g| hand(x, g, &data));
        out.push(SpeedRow {
            energy: c.name.clone(),
            dimension: c.dim,
            data_rows: c.rows,
            tape_ns,
            hand_ns,
            ratio: tape_ns / hand_ns,
            max_difference: worst,
        });
    }
    out
}

/// Row by row, the faster of two measurements of the same energies (tape and hand-written
/// each at its fastest); `old` may be empty.
pub fn fastest(old: &[SpeedRow], new: Vec<SpeedRow>) -> Vec<SpeedRow> {
    new.into_iter()
        .map(|mut n| {
            if let Some(o) = old.iter().find(|o| o.energy == n.energy) {
                n.tape_ns = n.tape_ns.min(o.tape_ns);
                n.hand_ns = n.hand_ns.min(o.hand_ns);
                n.ratio = n.tape_ns / n.hand_ns;
                n.max_difference = n.max_difference.max(o.max_difference);
            }
            n
        })
        .collect()
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn the_fastest_of_two_rounds_is_kept_row_by_row() {
        let row = |tape: f64, hand: f64| SpeedRow {
            energy: "e".into(),
            dimension: 2,
            data_rows: 0,
            tape_ns: tape,
            hand_ns: hand,
            ratio: tape / hand,
            max_difference: 0.0,
        };
        let best = fastest(&[row(100.0, 40.0)], vec![row(80.0, 50.0)]);
        assert_eq!((best[0].tape_ns, best[0].hand_ns), (80.0, 40.0));
        assert_eq!(best[0].ratio, 2.0);
        assert_eq!(fastest(&[], vec![row(3.0, 1.0)])[0].tape_ns, 3.0);
    }

    #[test]
    fn hand_written_energies_match_the_tape() {
        for mut c in cases() {
            let (mut g1, mut g2) = (vec![0.0; c.dim], vec![0.0; c.dim]);
            for p in c.points.iter().take(16) {
                let a = c.tape.value_grad(p, &mut g1);
                let b = (c.hand)(p, &mut g2, &c.data);
                assert!(
                    (a - b).abs() <= 1e-9 * (1.0 + a.abs()),
                    "{}: {a} vs {b}",
                    c.name
                );
                for i in 0..c.dim {
                    assert!(
                        (g1[i] - g2[i]).abs() <= 1e-8 * (1.0 + g1[i].abs()),
                        "{}: gradient {i}: {} vs {}",
                        c.name,
                        g1[i],
                        g2[i]
                    );
                }
            }
        }
    }
}
