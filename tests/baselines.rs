//! The benchmark's baselines against exact answers from outside Kiln: a Gaussian mixture's Z is
//! its total weight and its modes' masses are the weight shares (an identity). Annealed
//! importance sampling, parallel tempering with the stepping-stone estimator, and importance
//! sampling must each get log Z within a few of their own standard errors; plain NUTS must
//! report mode masses (its draws, assigned to modes, add up to one). Importance sampling is
//! checked only where its weights have finite variance (the 2-D case): on the 1-D case the
//! base's tails are lighter than the target's skirt, and its standard error means nothing.
//! Kiln's own benchmark runs (pilot, then a run stopped by the budget) are held to the same
//! budget rule and the same exact log Z.
// Reference values use the platform maths library on purpose: an independent implementation.
#![allow(clippy::disallowed_methods)]

use kiln::bench::baselines::{
    annealed_importance_sampling, importance_sampling, parallel_tempering, plain_nuts, BaselineRun,
};
use kiln::bench::targets::Groups;
use kiln::sample::tempering::Base;
use std::sync::Arc;

struct Case {
    name: &'static str,
    /// Whether the importance weights f/q have finite variance.
    is_valid: bool,
    spec: &'static str,
    log_z: f64,
    /// A fixed bound on the log Z error (not the run's SE): half the error of losing the
    /// lightest mode entirely (log(1 − its mass)), so a lost mode fails whatever the SE says.
    tol: f64,
    groups: Groups,
}

/// Two targets whose Laplace base is not exact, so the methods have work to do: a 1-D mixture
/// whose first mode is a narrow core on a wide skirt (a non-Gaussian mode) with a separated
/// second mode, and a 2-D mixture of three separated skewed clusters.
fn cases() -> Vec<Case> {
    vec![
        Case {
            name: "core and skirt, 1-D",
            is_valid: false,
            spec: r#"{"mixture": [
                {"weight": 1.0, "mean": [0.0], "sd": [0.5]},
                {"weight": 1.0, "mean": [0.5], "sd": [1.5]},
                {"weight": 0.5, "mean": [14.0], "sd": [0.7]}]}"#,
            log_z: 2.5f64.ln(),
            tol: 0.11, // lightest mode 0.2: log 0.8 = −0.223
            groups: Groups::Nearest {
                centres: vec![vec![0.1], vec![14.0]],
                masses: vec![0.8, 0.2],
            },
        },
        Case {
            name: "three skewed clusters, 2-D",
            is_valid: true,
            spec: r#"{"mixture": [
                {"weight": 2.0, "mean": [0.0, 0.0], "cov": [[1.0, 0.5], [0.5, 1.5]]},
                {"weight": 1.0, "mean": [1.4, 0.0], "cov": [[1.0, 0.5], [0.5, 1.5]]},
                {"weight": 0.8, "mean": [10.0, -8.0], "sd": [0.6, 0.5]},
                {"weight": 0.4, "mean": [10.8, -8.0], "sd": [0.6, 0.5]},
                {"weight": 0.3, "mean": [-9.0, 7.0], "sd": [1.0, 0.8]}]}"#,
            log_z: 4.5f64.ln(),
            tol: 0.034, // lightest mode 0.3/4.5: log(1 − 0.067) = −0.069
            groups: Groups::Nearest {
                centres: vec![vec![0.5, 0.0], vec![10.3, -8.0], vec![-9.0, 7.0]],
                masses: vec![3.0 / 4.5, 1.2 / 4.5, 0.3 / 4.5],
            },
        },
    ]
}

/// Each group's weighted share of the draws (computed here, not by `Groups::largest_error`).
fn shares(groups: &Groups, draws: &kiln::bench::baselines::Draws) -> Vec<f64> {
    let n = groups.masses().unwrap().len();
    let top = draws
        .log_w
        .iter()
        .cloned()
        .fold(f64::NEG_INFINITY, f64::max);
    let mut share = vec![0.0; n];
    let mut total = 0.0;
    for (i, lw) in draws.log_w.iter().enumerate() {
        let w = (lw - top).exp();
        share[groups
            .group(&draws.x[i * draws.dim..(i + 1) * draws.dim])
            .min(n - 1)] += w;
        total += w;
    }
    share.iter().map(|s| s / total).collect()
}

/// Every mode's mass near its exact weight share: within 25 % of it plus 0.01 (so a lost
/// 0.067 mode, error 0.067 > 0.027, fails, and so does a 0.2 mode found at half its mass).
fn check_masses(what: &str, c: &Case, draws: &kiln::bench::baselines::Draws) {
    let exact = c.groups.masses().unwrap();
    let got = shares(&c.groups, draws);
    eprintln!("{what}: masses {got:.3?} vs exact {exact:.3?}");
    for (g, e) in got.iter().zip(&exact) {
        assert!(
            (g - e).abs() <= 0.25 * e + 0.01,
            "{what}: mass {g:.4} vs exact {e:.4} (all: {got:.4?})"
        );
    }
}

/// AIS's masses rest on the few dozen annealing runs a budget of 30 000 allows, whose weights
/// are very uneven (seen: the 0.067 mode at 0.027 on one seed), so for AIS only this is held:
/// every mode is found with at least a quarter of its mass (a lost mode fails), and no mass is
/// off by more than 0.1.
fn check_masses_found(what: &str, c: &Case, draws: &kiln::bench::baselines::Draws) {
    let exact = c.groups.masses().unwrap();
    let got = shares(&c.groups, draws);
    eprintln!("{what}: masses {got:.3?} vs exact {exact:.3?}");
    for (g, e) in got.iter().zip(&exact) {
        assert!(
            *g >= 0.25 * e && (g - e).abs() <= 0.1,
            "{what}: mass {g:.4} vs exact {e:.4} (all: {got:.4?})"
        );
    }
}

fn prepared(c: &Case) -> (kiln::run::Prepared, Base) {
    let spec = kiln::parse_spec(c.name, c.spec).unwrap_or_else(|e| panic!("{}", e.render()));
    let p = kiln::run::prepare(&spec).unwrap_or_else(|e| panic!("{}", e.render()));
    let base = Base {
        q: Arc::new(p.laplace.base.clone()),
        log_zeta: p.laplace.log_zeta,
    };
    (p, base)
}

fn check_log_z(what: &str, o: &BaselineRun, truth: f64, tol: f64, budget: u64) {
    let err = o.log_z - truth;
    assert!(
        o.log_z_se.is_finite() && o.log_z_se > 0.0,
        "{what}: no standard error ({})",
        o.log_z_se
    );
    assert!(
        err.abs() <= 4.0 * o.log_z_se + 1e-3,
        "{what}: log Z {} ± {} vs exact {truth} (error {err:+.4}); {}",
        o.log_z,
        o.log_z_se,
        o.tuning
    );
    eprintln!("{what}: log Z error {err:+.4}, SE {:.4}", o.log_z_se);
    assert!(
        err.abs() < tol,
        "{what}: error {err:+.4} is more than {tol}"
    );
    // Budgets are honest: within a few transitions of the budget, never far past it.
    assert!(
        o.evaluations <= budget + budget / 50 && o.evaluations >= budget * 8 / 10,
        "{what}: {} evaluations for a budget of {budget}",
        o.evaluations
    );
}

#[test]
fn ais_pt_and_is_get_exact_mixture_log_z_within_their_errors() {
    let budget = 30_000;
    for c in cases() {
        let (p, base) = prepared(&c);
        for seed in 1..=2 {
            let ais = annealed_importance_sampling(&p.target, &base, budget, seed);
            check_log_z(&format!("AIS on {}", c.name), &ais, c.log_z, c.tol, budget);
            let pt = parallel_tempering(&p.target, &base, budget, seed);
            check_log_z(&format!("PT on {}", c.name), &pt, c.log_z, c.tol, budget);
            // Tempering also gets the masses.
            check_masses_found(&format!("AIS on {}", c.name), &c, &ais.draws);
            check_masses(&format!("PT on {}", c.name), &c, &pt.draws);
            if c.is_valid {
                let is = importance_sampling(&p.target, &base, budget, seed);
                check_log_z(&format!("IS on {}", c.name), &is, c.log_z, c.tol, budget);
                assert_eq!(is.evaluations, budget);
                check_masses(&format!("IS on {}", c.name), &c, &is.draws);
            }
        }
    }
}

#[test]
fn plain_nuts_reports_masses_but_no_log_z() {
    let c = &cases()[1];
    let (p, base) = prepared(c);
    let o = plain_nuts(&p.target, &base, 20_000, 3);
    assert!(o.log_z.is_nan());
    assert!(!o.draws.is_empty());
    assert!(o.evaluations <= 21_000, "{} evaluations", o.evaluations);
    // Masses are reported: every draw has a finite weight and falls in one of the groups, and
    // the shares are those of the draws (largest_error agrees with the shares computed here).
    assert!(o.draws.log_w.iter().all(|w| w.is_finite()));
    let exact = c.groups.masses().unwrap();
    let got = shares(&c.groups, &o.draws);
    let largest = got
        .iter()
        .zip(&exact)
        .map(|(g, e)| (g - e).abs())
        .fold(0.0, f64::max);
    let reported = c.groups.largest_error(&o.draws).unwrap();
    assert!(
        (reported - largest).abs() < 1e-12,
        "{reported} vs {largest}"
    );
    // Plain NUTS at β = 1 never crosses the barriers between these clusters (10 sd apart): its
    // 4 chains, kept one after the other, each stay in the cluster they started in, so the
    // draws' cluster changes at most 3 times along the record.
    let d = o.draws.dim;
    let groups: Vec<usize> = (0..o.draws.len())
        .map(|i| c.groups.group(&o.draws.x[i * d..(i + 1) * d]))
        .collect();
    let switches = groups.windows(2).filter(|w| w[0] != w[1]).count();
    assert!(
        switches <= 3,
        "plain NUTS changed cluster {switches} times: it should stay where each chain started"
    );
}

#[test]
fn kiln_at_a_budget_stops_near_it_and_gets_the_exact_log_z() {
    // The benchmark's Kiln runs: iteration counts from a pilot, then a run stopped by the
    // budget. The budget must hold as it does for the baselines, and log Z must match the
    // exact total weight within its standard error.
    let c = &cases()[1];
    let (p, _) = prepared(c);
    for budget in [20_000u64, 60_000] {
        let counts = kiln::bench::kiln_counts(&p, budget).unwrap();
        for seed in 1..=2 {
            let r = kiln::bench::kiln_run(
                &p,
                seed,
                counts.chains,
                counts.warmup,
                counts.draws,
                Some(budget),
            )
            .unwrap();
            assert!(
                r.evaluations <= budget + budget / 50 && r.evaluations >= budget * 9 / 10,
                "Kiln: {} evaluations for a budget of {budget}",
                r.evaluations
            );
            let err = r.log_z - c.log_z;
            assert!(
                r.log_z_se > 0.0 && err.abs() <= 4.0 * r.log_z_se + 1e-3,
                "Kiln at {budget}: log Z {} ± {} vs exact {} ({})",
                r.log_z,
                r.log_z_se,
                c.log_z,
                r.notes
            );
            eprintln!(
                "Kiln at {budget}: log Z error {err:+.4}, SE {:.4}",
                r.log_z_se
            );
            assert!(err.abs() < c.tol, "Kiln at {budget}: error {err:+.4}");
            check_masses(&format!("Kiln at {budget}"), c, &r.draws);
        }
    }
}
