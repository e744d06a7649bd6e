//! Layer 4 — sampling: chains of continuously tempered Hamiltonian Monte Carlo between the
//! base (the Laplace mixture, possibly refitted) and the target, warm-up and kept draws.
//!
//! In: the target, its modes and their Laplace mixture (`search`), [`SamplerOptions`].
//! Out: a frozen [`Plan`] and the kept [`Record`]s of every chain (read by `estimate`).
//!
//! Files, in the order a run uses them:
//! - `options`: the settings of the sampler (method, integrator, lengths);
//! - `tempering`: Δ, the bias g(β), p(β|x) in closed form, exact β draws;
//! - `hmc`: leapfrog, NUTS, static HMC, dual averaging;
//! - `plan`: what the chains share in a phase, and their records;
//! - `chain`: one chain's iteration (Hamiltonian move, independence move, β draw);
//! - `series`: the log p(1|x)/p(0|x) series of tempered draws (built once, read everywhere);
//! - `warmup`: the warm-up schedule and what it learns;
//! - `refit`, `candidates`: candidate bases fitted to warm-up draws and judged on held-out ones;
//! - `stepper`: a run as a fixed sequence of steps that workers can share.
//!
//! One iteration (method note, "Two ways to move"):
//! - with probability p (see [`warmup::gradient_probability`] and [`warmup::TRIAL_WINDOW`]), a
//!   Hamiltonian move: alternating, HMC or NUTS on `x | β` with potential `ψ + βΔ`; joint, HMC
//!   or NUTS on (x, u), β = σ(u), potential `ψ + βΔ − g(β) − log σ(u) − log(1 − σ(u))`;
//! - an independence move, proposing from the defensive mixture q′ of [`chain::heavy_tails`];
//! - the exact draw of `β | x` (in the joint method, only after an iteration without a
//!   Hamiltonian move, as a Gibbs update of u).
//!
//! Coordinates are whitened, z = L q with L L' the within-mode covariance of the base
//! (Σ_k w_k Σ_k), which is the dense metric; the joint variant's u is scaled by the standard
//! deviation of u, its own mass. The joint variant uses the same piecewise-linear g as the
//! alternating one: its gradient in u jumps at the knots, which the leapfrog integrator
//! tolerates (the potential is continuous, so the chain stays exact), and the closed forms of
//! `tempering` stay available for the estimator.
//!
//! Chains are independent between synchronisation points (the ends of warm-up windows), where
//! their records are merged in chain order; results therefore do not depend on how many
//! threads or workers run the chains.
//! Must not: estimate log Z, masses or diagnostics for the report (that is `estimate`; warm-up
//! reads the same series only to decide what to learn), format numbers for people beyond its
//! notes, or import a later stage.

pub mod candidates;
pub mod chain;
pub mod hmc;
pub mod options;
pub mod plan;
pub mod refit;
pub mod series;
pub mod stepper;
pub mod tempering;
pub mod warmup;

pub use options::{Integrator, Method, SamplerOptions};
pub use plan::{decode_records, encode_records, Plan, Record};
pub use series::Series;
pub use stepper::{Step, Stepper};

/// A 2-D mixture of a unit mode at the origin and a narrower, lighter one at (c, c), and the
/// modes the optimiser finds (shared by the unit tests of this layer).
#[cfg(test)]
pub(crate) fn two_modes_at(
    c: f64,
) -> (
    crate::model::target::Target,
    crate::search::modes::ModeSearch,
) {
    let text = format!(
        r#"{{"mixture": [{{"weight": 1, "mean": [0, 0], "sd": [1, 1]}}, {{"weight": 0.5, "mean": [{c}, {c}], "sd": [0.7, 0.7]}}]}}"#
    );
    let spec = crate::model::spec::parse_spec("t", &text).unwrap();
    let target = crate::model::target::Target::from_spec(&spec).unwrap();
    let search =
        crate::search::modes::find_modes(&target, crate::search::SearchOptions::default_for(2, 1))
            .unwrap();
    (target, search)
}
