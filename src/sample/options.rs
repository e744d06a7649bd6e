//! The sampler's settings: the two ways to move, the integrator, lengths, and switches.
//!
//! Owns: [`Method`], [`Integrator`], [`SamplerOptions`] and their defaults.
//! Must not: resolve user settings (that is `run`) or hold state.

/// The two ways to move of the method note.
///
/// Alternating is the default, by measurement (`kiln run --json` at default settings, seeds
/// 1–6, error against the scipy references in tests/reference/; the figure is RMSE × √(energy
/// evaluations), lower is better, alternating vs joint): egg-crate 11.8 vs 6.9, two shells
/// 7.5 vs 10.5, parabolic ridge 4.2 vs 9.6, tilted double well 1.3 vs 1.8, heavy-tailed
/// location 1.3 vs 2.0. Alternating wins on four of five and never loses badly; its exact β
/// draw also removes the mass of u from the tuning.
#[derive(Clone, Copy, Debug, PartialEq, Eq, serde::Serialize)]
#[serde(rename_all = "lowercase")]
pub enum Method {
    Joint,
    Alternating,
}

#[derive(Clone, Copy, Debug, PartialEq, Eq, serde::Serialize)]
#[serde(rename_all = "lowercase")]
pub enum Integrator {
    Nuts,
    Hmc,
}

/// Everything a run of the sampler is told (the run layer fills it from the resolved settings).
#[derive(Clone, Debug)]
pub struct SamplerOptions {
    pub chains: usize,
    pub warmup: usize,
    pub draws: usize,
    pub method: Method,
    pub integrator: Integrator,
    pub target_accept: f64,
    pub seed: u64,
    pub max_depth: usize,
    /// Independence moves from the base after every transition.
    pub independence: bool,
    /// Learn the bias g(β) in warm-up (false: the plain method, g = 0).
    pub learn_bias: bool,
    /// Knots of g: equal segments on [0, 1].
    pub knots: usize,
    /// `Some(b)`: no tempering, β fixed at b (b = 1 is plain HMC on the target).
    pub fixed_beta: Option<f64>,
}

impl SamplerOptions {
    pub fn new(seed: u64) -> SamplerOptions {
        SamplerOptions {
            chains: 8,
            warmup: 500,
            draws: 1000,
            method: Method::Alternating,
            integrator: Integrator::Nuts,
            target_accept: 0.8,
            seed,
            max_depth: 10,
            independence: true,
            learn_bias: true,
            knots: 16,
            fixed_beta: None,
        }
    }
}

/// Energy evaluations each chain should have, at least, in a run limited to a budget.
pub const EVALUATIONS_PER_CHAIN: u64 = 25_000;
/// Fewest chains of a run limited to a budget (the multi-chain ESS and R-hat need several).
pub const MIN_BUDGET_CHAINS: usize = 4;

/// The number of chains for a run limited to `budget` energy evaluations: one per
/// [`EVALUATIONS_PER_CHAIN`], between [`MIN_BUDGET_CHAINS`] and the default 8. With a small
/// budget, 8 chains each get too short a warm-up to learn their step size and the bias.
/// Measured (`kiln bench --methods kiln`, 16 seeds, log Z RMSE with 8 / 4 / 2 chains): egg crate
/// at 2e4 0.054 / 0.014 / 0.27 and at 6e4 0.077 / 0.028 / 0.019; separated mixture 4.7e-3 /
/// 3.1e-3 / 8.3e-4 and 1.3e-3 / 5.6e-4 / 1.6e-3; 8-D rotated product 7.2e-3 / 6.8e-3 / 5.7e-3 and
/// 3.5e-3 / 3.1e-3 / 3.3e-3; two shells 0.19 / 0.41 / 0.26 and 0.15 / 0.12 / 0.10. Two chains
/// were erratic (the egg crate at 2e4), four the steadiest; from 2e5 the default 8 stands (its
/// coverage at full length is in src/TUNING.md, "Sampler defaults").
pub fn chains_for_budget(budget: u64) -> usize {
    ((budget / EVALUATIONS_PER_CHAIN) as usize)
        .clamp(MIN_BUDGET_CHAINS, SamplerOptions::new(0).chains)
}

#[cfg(test)]
mod budget_tests {
    use super::*;

    #[test]
    fn chains_grow_with_the_budget_between_four_and_eight() {
        assert_eq!(chains_for_budget(1_000), 4);
        assert_eq!(chains_for_budget(60_000), 4);
        assert_eq!(chains_for_budget(150_000), 6);
        assert_eq!(chains_for_budget(200_000), 8);
        assert_eq!(chains_for_budget(10_000_000), 8);
    }
}
