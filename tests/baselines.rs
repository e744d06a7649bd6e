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
            groups: Groups::Nearest {
                centres: vec![vec![0.5, 0.0], vec![10.3, -8.0], vec![-9.0, 7.0]],
                masses: vec![3.0 / 4.5, 1.2 / 4.5, 0.3 / 4.5],
            },
        },
    ]
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

fn check_log_z(what: &str, o: &BaselineRun, truth: f64, budget: u64) {
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
    assert!(err.abs() < 0.1, "{what}: error {err:+.4} is too large");
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
            check_log_z(&format!("AIS on {}", c.name), &ais, c.log_z, budget);
            let pt = parallel_tempering(&p.target, &base, budget, seed);
            check_log_z(&format!("PT on {}", c.name), &pt, c.log_z, budget);
            // Tempering also gets the masses.
            for (name, o) in [("AIS", &ais), ("PT", &pt)] {
                let e = c.groups.largest_error(&o.draws).unwrap();
                assert!(e < 0.1, "{name} on {}: mass error {e}", c.name);
            }
            if c.is_valid {
                let is = importance_sampling(&p.target, &base, budget, seed);
                check_log_z(&format!("IS on {}", c.name), &is, c.log_z, budget);
                assert_eq!(is.evaluations, budget);
                let e = c.groups.largest_error(&is.draws).unwrap();
                assert!(e < 0.1, "IS on {}: mass error {e}", c.name);
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
    let e = c.groups.largest_error(&o.draws).unwrap();
    assert!((0.0..=1.0).contains(&e), "mass error {e}");
    // Its draws stay in the modes they started in: with 4 chains, the shares are quarters.
    let masses = c.groups.masses().unwrap();
    let mut shares = vec![0.0; masses.len()];
    for i in 0..o.draws.len() {
        shares[c.groups.group(&o.draws.x[i * 2..i * 2 + 2])] += 1.0 / o.draws.len() as f64;
    }
    assert!((shares.iter().sum::<f64>() - 1.0).abs() < 1e-9);
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
            let r =
                kiln::bench::kiln_run(&p, seed, counts.warmup, counts.draws, Some(budget)).unwrap();
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
            let e = c.groups.largest_error(&r.draws).unwrap();
            assert!(e < 0.1, "Kiln at {budget}: mass error {e}");
        }
    }
}
