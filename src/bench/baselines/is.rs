//! Importance sampling from the base q: `log Z = log ζ + log mean exp(−Δ)` (Δ = E + log ζ − ψ).
//! Must not: adapt anything (the base is given).

use super::{log_mean_exp, log_mean_se, stream, BaselineRun, Draws};
use crate::model::target::Target;
use crate::sample::tempering::{Base, Tempered};

// ---------------------------------------------------------------------------------------------
// Importance sampling.

/// Importance sampling from the base: `budget` draws, one energy evaluation each.
pub fn importance_sampling(target: &Target, base: &Base, budget: u64, seed: u64) -> BaselineRun {
    let mut tempered = Tempered::new(target.evaluator(), base.clone());
    let mut rng = stream(seed, 1, 0);
    let d = target.dim();
    let mut z = vec![0.0; d];
    let mut draws = Draws::new(d);
    for _ in 0..budget {
        tempered.draw_base(&mut rng, &mut z);
        let (delta, _) = tempered.delta(&z);
        draws.push(target, &z, -delta);
    }
    let log_z = base.log_zeta + log_mean_exp(&draws.log_w);
    BaselineRun {
        log_z,
        log_z_se: log_mean_se(&draws.log_w),
        evaluations: tempered.target.evaluations,
        tuning: format!("{budget} draws from q"),
        draws,
    }
}
