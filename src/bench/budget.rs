//! Kiln's run at a budget of energy evaluations, as a benchmark job makes it.
//!
//! Owns: [`kiln_run`] (a pilot run turns a budget into iteration counts; the scored run then
//! stops within a chunk of [`BUDGET_STEP_ITERATIONS`] iterations of it) and [`kiln_counts`].
//! Must not: change what Kiln does in a run.

use crate::bench::baselines::Draws;
use crate::common::error::KilnError;
use crate::run::Prepared;
use crate::sample::options::chains_for_budget;
use crate::sample::{SamplerOptions, Step, Stepper};
use serde::Serialize;
use std::time::Instant;

/// Seed of the pilot run that converts a budget into Kiln's iteration counts (never scored).
pub const PILOT_SEED: u64 = 1_000_001;

/// One Kiln run (as `kiln run` with the given iteration counts), stopped before the chunk of
/// kept draws that would pass `budget`.
#[derive(Clone, Debug)]
pub struct KilnRun {
    pub log_z: f64,
    pub log_z_se: f64,
    pub evaluations: u64,
    pub warmup_evaluations: u64,
    /// Warm-up iterations per chain, as run (warm-up shortens itself when the base is good).
    pub warmup_iterations: usize,
    /// Kept iterations per chain.
    pub kept: usize,
    pub draws: Draws,
    /// Single-threaded wall time: every chain's steps and one copy of what warm-up learns.
    pub seconds: f64,
    pub notes: String,
}

/// Iterations per sampling step of a run stopped by a budget.
pub(super) const BUDGET_STEP_ITERATIONS: usize = 10;

/// Runs Kiln's sampler on a prepared target with `chains` chains of `warmup` and `draws` iterations
/// (defaults otherwise). With a budget, stops at the end of a chunk of kept draws
/// ([`BUDGET_STEP_ITERATIONS`] iterations) when the next one would pass it, so runs use at most
/// about the budget.
pub fn kiln_run(
    prep: &Prepared,
    seed: u64,
    chains: usize,
    warmup: usize,
    draws: usize,
    budget: Option<u64>,
) -> Result<KilnRun, KilnError> {
    let mut opts = SamplerOptions::new(seed);
    opts.chains = chains;
    opts.warmup = warmup.max(10);
    opts.draws = draws.max(10);
    let mut steppers: Vec<Stepper> = (0..chains)
        .map(|c| {
            Stepper::new(
                &prep.target,
                prep.search.modes.clone(),
                prep.laplace.clone(),
                opts.clone(),
                Some(&[c]),
            )
        })
        .collect::<Result<_, _>>()?;
    if budget.is_some() {
        // Small sampling steps, so the run stops within a few iterations of the budget.
        for s in steppers.iter_mut() {
            s.split_sampling(BUDGET_STEP_ITERATIONS);
        }
    }
    let mut seconds = 0.0;
    let mut per_chain = vec![0u64; chains];
    let mut per_iteration = 0.0;
    let mut warmup_evaluations = 0;
    let mut chunks = 0;
    while let Some(step) = steppers[0].step() {
        let iterations = match step {
            Step::Warmup { iterations, .. } | Step::Sample { iterations, .. } => iterations,
        };
        let used: u64 = per_chain.iter().sum::<u64>() + steppers[0].plan.discovery_evaluations;
        if let (Step::Sample { .. }, Some(b)) = (step, budget) {
            let next = per_iteration * (iterations * chains) as f64;
            if chunks > 0 && used as f64 + next > b as f64 {
                break;
            }
        }
        let t0 = Instant::now();
        let mut records = Vec::with_capacity(chains);
        for s in steppers.iter_mut() {
            records.extend(s.run_step());
        }
        seconds += t0.elapsed().as_secs_f64();
        for r in &records {
            per_chain[r.chain] = r.evaluations;
        }
        let now: u64 = per_chain.iter().sum::<u64>() + steppers[0].plan.discovery_evaluations;
        if iterations > 0 {
            per_iteration = (now - used) as f64 / (iterations * chains) as f64;
        }
        let t1 = Instant::now();
        steppers[0].absorb(records.clone())?;
        seconds += t1.elapsed().as_secs_f64();
        for s in steppers[1..].iter_mut() {
            s.absorb(records.clone())?;
        }
        match step {
            Step::Warmup { .. } => warmup_evaluations = now,
            Step::Sample { .. } => chunks += 1,
        }
    }
    let t2 = Instant::now();
    let plan = &steppers[0].plan;
    let kept = &steppers[0].kept;
    let lz = crate::estimate::log_z_reported(plan, kept);
    let d = prep.target.dim();
    let mut out = Draws {
        dim: d,
        ..Draws::default()
    };
    let mut i = 0;
    for r in kept {
        for k in 0..r.beta.len() {
            out.x.extend(prep.target.to_user(&r.z[k * d..(k + 1) * d]));
            out.log_w.push(lz.series.l1[i]);
            i += 1;
        }
    }
    seconds += t2.elapsed().as_secs_f64();
    let evaluations = per_chain.iter().sum::<u64>() + plan.discovery_evaluations;
    Ok(KilnRun {
        log_z: lz.log_z,
        log_z_se: lz.se,
        evaluations,
        warmup_evaluations,
        warmup_iterations: plan.options.warmup,
        kept: kept.first().map_or(0, |r| r.iterations),
        draws: out,
        seconds,
        notes: format!(
            "log Z ± {:.2e} (ESS {:.0}); {} warm-up + {} kept iterations × {chains} chains; Hamiltonian moves in {:.1}% of kept iterations{}{}{}{}{}",
            lz.se,
            lz.ess,
            plan.options.warmup,
            kept.first().map_or(0, |r| r.iterations),
            100.0 * kept.iter().map(|r| r.transitions).sum::<usize>() as f64
                / kept.iter().map(|r| r.iterations).sum::<usize>().max(1) as f64,
            if plan.refitted {
                format!(
                    "; base refitted ({})",
                    plan.notes
                        .iter()
                        .filter(|n| n.starts_with("the base was refitted"))
                        .map(|n| n.trim_start_matches("the base was refitted to the draws of "))
                        .collect::<Vec<_>>()
                        .join("; then ")
                )
            } else {
                String::new()
            },
            if plan.options.warmup < opts.warmup {
                format!(
                    "; warm-up shortened from {} (the base looked good)",
                    opts.warmup
                )
            } else {
                String::new()
            },
            if plan.new_modes > 0 {
                format!("; {} new modes", plan.new_modes)
            } else {
                String::new()
            },
            lz.control
                .as_ref()
                .map_or(String::new(), |c| format!("; control variates {}", c.note)),
            lz.proposals
                .as_ref()
                .map_or(String::new(), |p| format!("; proposals: {}", p.note)),
        ),
    })
}

/// Iteration counts that spend `budget` evaluations in Kiln's default proportions (a third in
/// warm-up), measured on one pilot run (seed [`PILOT_SEED`], never scored). The scored runs get
/// room for as many kept iterations as the budget could buy and stop at the chunk where the
/// budget ends.
#[derive(Clone, Copy, Debug, Serialize)]
pub struct KilnCounts {
    /// Chains (`sample::options::chains_for_budget`), and iterations per chain.
    pub chains: usize,
    pub warmup: usize,
    pub draws: usize,
    pub warmup_per_iteration: f64,
    pub kept_per_iteration: f64,
}

pub fn kiln_counts(prep: &Prepared, budget: u64) -> Result<KilnCounts, KilnError> {
    let n_chains = chains_for_budget(budget);
    let chains = n_chains as f64;
    let guess = 10.0;
    let b = budget as f64;
    let iterations = b / (chains * guess);
    let w0 = ((iterations / 3.0) as usize).max(20);
    let n0 = ((2.0 * iterations / 3.0) as usize).max(20);
    let pilot = kiln_run(prep, PILOT_SEED, n_chains, w0, n0, None)?;
    let cw = pilot.warmup_evaluations as f64 / (chains * pilot.warmup_iterations.max(1) as f64);
    let cs =
        (pilot.evaluations - pilot.warmup_evaluations) as f64 / (chains * pilot.kept.max(1) as f64);
    let warmup = ((b / 3.0 / (chains * cw.max(1.0))) as usize).max(20);
    let left = (b - warmup as f64 * chains * cw).max(0.0);
    // Room for as many kept iterations as the rest of the budget could buy at one evaluation
    // each (the cheapest iteration): a run's cost per iteration depends on what its own warm-up
    // chose (base, share of Hamiltonian moves), so runs stop by the budget.
    let draws = ((left / chains).ceil() as usize).max(20);
    Ok(KilnCounts {
        chains: n_chains,
        warmup,
        draws,
        warmup_per_iteration: cw,
        kept_per_iteration: cs,
    })
}
