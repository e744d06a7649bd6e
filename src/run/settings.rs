//! Run settings: command-line overrides over the spec's settings over the defaults.
//!
//! Owns: [`Overrides`], [`RunSettings`], their validation, and the sampler options they give.
//! Must not: run anything.

use super::prepare::DEFAULT_SEED;
use crate::common::error::KilnError;
use crate::model::spec::Spec;
use crate::sample::{Integrator, Method, SamplerOptions};
use serde::Serialize;

/// Defaults of `kiln run` (chosen by measurement; see DEVELOPERS.md).
/// 8 chains of 500 warm-up and 1000 kept iterations: the same cost as 4 chains of 1000 + 2000,
/// with error bars that cover better, because the multi-chain effective sample size of the log
/// Z series has more chains to see slow mixing between modes with (measured over 40 seeds, ±2
/// SE coverage of log Z: egg crate 88 % → 95 %, twisted 6-D valley 90 % → 95 %, two shells
/// 95 % → 95 %; see src/TUNING.md).
pub const DEFAULT_CHAINS: usize = 8;
pub const DEFAULT_WARMUP: usize = 500;
pub const DEFAULT_DRAWS: usize = 1000;
/// The default average acceptance of the Hamiltonian moves that warm-up aims the step size at.
pub const DEFAULT_ACCEPTANCE_GOAL: f64 = 0.8;
/// Most values the kept draws may hold in memory (draws × chains × (unknowns + 3)).
pub const MAX_KEPT_VALUES: usize = 50_000_000;

/// Command-line values that override the spec's settings.
#[derive(Clone, Debug, Default)]
pub struct Overrides {
    pub seed: Option<u64>,
    pub chains: Option<usize>,
    pub draws: Option<usize>,
    pub warmup: Option<usize>,
    pub method: Option<String>,
    pub integrator: Option<String>,
}

/// The settings a run used, after defaults and overrides.
#[derive(Clone, Debug, Serialize)]
pub struct RunSettings {
    pub seed: u64,
    pub chains: usize,
    pub warmup: usize,
    pub draws: usize,
    pub method: Method,
    pub integrator: Integrator,
    /// The average acceptance of the Hamiltonian moves that warm-up tunes the step size to reach.
    pub acceptance_goal: f64,
}

fn parse_method(m: &str) -> Result<Method, KilnError> {
    match m {
        "joint" => Ok(Method::Joint),
        "alternating" => Ok(Method::Alternating),
        other => Err(KilnError::usage(format!("unknown method `{other}`"))
            .with_hint("use `joint` or `alternating`")),
    }
}

fn parse_integrator(m: &str) -> Result<Integrator, KilnError> {
    match m {
        "nuts" => Ok(Integrator::Nuts),
        "hmc" => Ok(Integrator::Hmc),
        other => Err(KilnError::usage(format!("unknown integrator `{other}`"))
            .with_hint("use `nuts` or `hmc`")),
    }
}

/// Resolves the run settings: command line over spec settings over defaults.
pub fn run_settings(spec: &Spec, o: &Overrides) -> Result<RunSettings, KilnError> {
    let s = &spec.settings;
    let method = o
        .method
        .clone()
        .or_else(|| s.method.clone())
        .map_or(Ok(Method::Alternating), |m| parse_method(&m))?;
    let integrator = o
        .integrator
        .clone()
        .or_else(|| s.integrator.clone())
        .map_or(Ok(Integrator::Nuts), |m| parse_integrator(&m))?;
    let r = RunSettings {
        seed: o.seed.or(s.seed).unwrap_or(DEFAULT_SEED),
        chains: o.chains.or(s.chains).unwrap_or(DEFAULT_CHAINS),
        warmup: o.warmup.or(s.warmup).unwrap_or(DEFAULT_WARMUP),
        draws: o.draws.or(s.draws).unwrap_or(DEFAULT_DRAWS),
        method,
        integrator,
        acceptance_goal: s.acceptance_goal.unwrap_or(DEFAULT_ACCEPTANCE_GOAL),
    };
    if !(1..=64).contains(&r.chains) {
        return Err(KilnError::usage(format!("{} chains requested", r.chains))
            .with_hint("use between 1 and 64 chains"));
    }
    if !(10..=1_000_000).contains(&r.draws) || !(10..=1_000_000).contains(&r.warmup) {
        return Err(
            KilnError::usage("draws and warm-up must each be between 10 and 1000000")
                .with_hint("for example --draws 2000 --warmup 1000"),
        );
    }
    let kept = r.chains * r.draws * (spec.dimension() + 3);
    if kept > MAX_KEPT_VALUES {
        return Err(KilnError::limit(format!(
            "{} chains × {} draws of {} unknowns would keep {kept} values in memory; the limit is {MAX_KEPT_VALUES}",
            r.chains,
            r.draws,
            spec.dimension()
        ))
        .with_hint("use fewer draws or chains"));
    }
    Ok(r)
}

/// Sampler options for the resolved settings (the one place defaults meet the sampler).
pub fn sampler_options(r: &RunSettings) -> SamplerOptions {
    let mut o = SamplerOptions::new(r.seed);
    o.chains = r.chains;
    o.warmup = r.warmup;
    o.draws = r.draws;
    o.method = r.method;
    o.integrator = r.integrator;
    o.target_accept = r.acceptance_goal;
    o
}
