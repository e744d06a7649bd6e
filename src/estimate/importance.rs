//! The importance-sampling cross-check: log Z from independent draws of the frozen base.
//!
//! Owns: `log mean(f/q)` over fresh base draws, its delta-method standard error and the
//! effective sample size of its weights. It shares the base with the sampler, so it cannot
//! reveal a mode both lack.
//! Must not: use the chains' draws.

use crate::common::maths::{exp, ln, log_sum_exp, sqrt};
use crate::common::rng::{Purpose, Stream};
use crate::model::target::Target;
use crate::sample::Plan;

/// log Z by importance sampling from the frozen base: log mean(f/q), with its delta-method
/// standard error and the effective sample size of the weights.
pub fn importance_check(target: &Target, plan: &Plan, n: usize) -> (f64, f64, f64) {
    if n == 0 {
        return (f64::NAN, f64::NAN, 0.0);
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
        return (f64::NEG_INFINITY, f64::NAN, 0.0);
    }
    let w: Vec<f64> = lw.iter().map(|l| exp(l - lse)).collect(); // sums to 1
    let sum_sq: f64 = w.iter().map(|x| x * x).sum();
    let ess = 1.0 / sum_sq;
    // Var of the mean of w·n around 1, relative: SE(log Ẑ) ≈ sd(w n) / sqrt(n).
    let rel_var = (sum_sq * n as f64 - 1.0).max(0.0);
    (lse - ln(n as f64), sqrt(rel_var / n as f64), ess)
}
