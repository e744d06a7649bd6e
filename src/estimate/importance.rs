//! The importance-sampling cross-check: log Z from independent draws of the frozen base.
//!
//! Owns: `log mean(f/q)` over fresh base draws, its delta-method standard error, the
//! effective sample size of its weights and their Pareto k̂ (`psis`). It shares the base with
//! the sampler, so it cannot reveal a mode both lack.
//! Must not: use the chains' draws.

use super::psis::pareto_khat;
use crate::common::maths::{exp, ln, log_sum_exp, sqrt};
use crate::common::rng::{Purpose, Stream};
use crate::model::target::Target;
use crate::sample::Plan;

/// The importance-sampling estimate and what its weights look like.
#[derive(Clone, Copy, Debug, PartialEq)]
pub struct Importance {
    pub log_z: f64,
    pub se: f64,
    /// Effective sample size of the weights, (Σw)² / Σw².
    pub ess: f64,
    /// Pareto k̂ of the weights' upper tail (NaN with too few finite weights).
    pub khat: f64,
}

/// log Z by importance sampling from the frozen base: log mean(f/q), with its delta-method
/// standard error, the effective sample size of the weights and their Pareto k̂.
pub fn importance_check(target: &Target, plan: &Plan, n: usize) -> Importance {
    let none = |log_z: f64| Importance {
        log_z,
        se: f64::NAN,
        ess: 0.0,
        khat: f64::NAN,
    };
    if n == 0 {
        return none(f64::NAN);
    }
    let d = target.dim();
    let mut rng = Stream::new(plan.options.seed, Purpose::Check, 0);
    let mut ev = target.evaluator();
    let q = &plan.base.q;
    let mut scratch = q.scratch();
    let mut z = vec![0.0; d];
    let mut lw = Vec::with_capacity(n);
    for _ in 0..n {
        q.sample(&mut rng, &mut z, &mut scratch);
        let e = ev.energy(&z);
        let lq = q.log_density(&z, &mut scratch);
        lw.push(if e.is_finite() {
            -e - lq
        } else {
            f64::NEG_INFINITY
        });
    }
    let lse = log_sum_exp(&lw);
    if !lse.is_finite() {
        return none(f64::NEG_INFINITY);
    }
    let w: Vec<f64> = lw.iter().map(|l| exp(l - lse)).collect(); // sums to 1
    let sum_sq: f64 = w.iter().map(|x| x * x).sum();
    let ess = 1.0 / sum_sq;
    // Var of the mean of w·n around 1, relative: SE(log Ẑ) ≈ sd(w n) / sqrt(n).
    let rel_var = (sum_sq * n as f64 - 1.0).max(0.0);
    Importance {
        log_z: lse - ln(n as f64),
        se: sqrt(rel_var / n as f64),
        ess,
        khat: pareto_khat(&lw).unwrap_or(f64::NAN),
    }
}
