//! `kiln run` and `kiln compare`: a prepared target sampled to the end, and everything the run
//! reports.
//!
//! Owns: [`run`], [`finish_run`] (estimates, cross-checks, verdict, warnings and notes
//! gathered into a [`RunOutcome`]), [`RunResult`] with its draws, and [`compare`].
//! Must not: print or format numbers beyond the sentences of notes and warnings.

use super::prepare::{unknowns_of, Prepared, Unknown};
use super::session::Session;
use super::settings::{Overrides, RunSettings};
use crate::common::error::KilnError;
use crate::common::stats::resample;
use crate::estimate::quadrature::GridResult;
use crate::estimate::{
    cross_checks, estimate, verdict, warnings, CrossCheck, Estimates, WeightedDraws,
};
use crate::model::spec::Spec;
use crate::sample::{SamplerOptions, Stepper};
use serde::Serialize;

/// Draws of the importance-sampling cross-check.
pub const IS_DRAWS: usize = 4000;

/// What `kiln run` reports: the run's identity and settings, the estimates (flattened into
/// the same JSON object), the cross-checks and the messages.
#[derive(Clone, Debug, Serialize)]
pub struct RunOutcome {
    pub title: String,
    pub dimension: usize,
    pub unknowns: Vec<Unknown>,
    pub settings: RunSettings,
    /// log Z, modes, moments and diagnostics (see `estimates::Estimates`).
    #[serde(flatten)]
    pub est: Estimates,
    pub laplace_log_z: f64,
    pub grid_log_z: Option<f64>,
    pub exact_log_z: Option<f64>,
    pub cross_checks: Vec<CrossCheck>,
    pub verdict: String,
    pub warnings: Vec<String>,
    pub notes: Vec<String>,
    pub seed: u64,
    pub gradient_evaluations: u64,
    /// Exact masses of the mixture components, in the order of `modes` (null unless a mixture).
    pub exact_masses: Option<Vec<f64>>,
}

/// A run's report and its draws.
pub struct RunResult {
    pub outcome: RunOutcome,
    pub draws: WeightedDraws,
    pub names: Vec<String>,
}

/// `kiln run`: modes, warm-up, sampling, estimates, cross-checks. The same steps as the page.
pub fn run(spec: &Spec, overrides: &Overrides) -> Result<RunResult, KilnError> {
    let mut session = Session::new(spec, overrides, None)?;
    while session.step().is_some() {
        let records = session.run_step();
        session.absorb(records)?;
    }
    session.finish()
}

/// The sampling part of a run, for a prepared target (also used by benchmarks and tests).
pub fn run_prepared(
    spec: &Spec,
    p: &Prepared,
    grid: Option<GridResult>,
    opts: SamplerOptions,
    settings: RunSettings,
) -> Result<RunResult, KilnError> {
    let mut stepper = Stepper::new(
        &p.target,
        p.search.modes.clone(),
        p.laplace.clone(),
        opts,
        None,
    )?;
    stepper.run_to_end()?;
    finish_run(spec, p, grid.as_ref(), &stepper, settings)
}

/// Everything a run reports, from a stepper whose steps are all done.
pub fn finish_run(
    spec: &Spec,
    p: &Prepared,
    grid: Option<&GridResult>,
    stepper: &Stepper,
    settings: RunSettings,
) -> Result<RunResult, KilnError> {
    let laplace_log_z = p.laplace.log_zeta;
    let plan = &stepper.plan;
    let records = &stepper.kept;
    let (mut est, draws) = estimate(&p.target, plan, records, IS_DRAWS);
    est.diagnostics.step_sizes = stepper.step_sizes();
    let exact = p.target.mixture_truth();
    let exact_log_z = exact.as_ref().map(|t| t.log_z);
    let grid_pair = grid
        .filter(|g| g.log_z.is_finite())
        .map(|g| (g.log_z, g.change));
    let checks = cross_checks(
        est.log_z,
        est.log_z_se,
        exact_log_z,
        grid_pair,
        (est.is_log_z, est.is_log_z_se, est.diagnostics.is_ess),
        laplace_log_z,
    );
    let v = verdict(&checks, est.log_z, est.log_z_se);
    let names = p.target.names.clone();
    let iterations = plan.options.draws * plan.options.chains;
    let mut warns = warnings(&est, &checks, &names, plan.is_tempered(), iterations);
    if let Some(g) = grid {
        warns.extend(g.warnings.iter().cloned());
    }
    let mut notes = p.search.notes.clone();
    notes.extend(plan.notes.iter().cloned());
    if plan.new_modes > 0 {
        notes.push(format!(
            "the chains found {} mode(s) the optimiser had missed",
            plan.new_modes
        ));
    }
    let gradient_evaluations =
        p.search.evaluations + stepper.chain_evaluations() + plan.discovery_evaluations;
    // Exact masses, matched to modes by nearest component mean.
    let exact_masses = exact.map(|t| {
        est.modes
            .iter()
            .map(|m| {
                let best = (0..t.means.len())
                    .min_by(|&a, &b| {
                        dist2(&t.means[a], &m.location).total_cmp(&dist2(&t.means[b], &m.location))
                    })
                    .unwrap_or(0);
                t.masses[best]
            })
            .collect()
    });
    let outcome = RunOutcome {
        title: spec.title.clone(),
        dimension: p.target.dim(),
        unknowns: unknowns_of(spec),
        settings,
        est,
        laplace_log_z,
        grid_log_z: grid_pair.map(|g| g.0),
        exact_log_z,
        cross_checks: checks,
        verdict: v,
        warnings: warns,
        notes,
        seed: p.seed,
        gradient_evaluations,
        exact_masses,
    };
    Ok(RunResult {
        outcome,
        draws,
        names,
    })
}

fn dist2(a: &[f64], b: &[f64]) -> f64 {
    a.iter().zip(b).map(|(x, y)| (x - y) * (x - y)).sum()
}

/// What `kiln compare` reports: log(Z_A / Z_B) ± SE from two independent runs.
#[derive(Clone, Debug, Serialize)]
pub struct CompareOutcome {
    pub log_bayes_factor: f64,
    pub log_bayes_factor_se: f64,
    pub a: RunOutcome,
    pub b: RunOutcome,
    pub warnings: Vec<String>,
}

pub fn compare(a: RunOutcome, b: RunOutcome) -> CompareOutcome {
    let lbf = a.est.log_z - b.est.log_z;
    let se = crate::common::maths::sqrt(
        a.est.log_z_se * a.est.log_z_se + b.est.log_z_se * b.est.log_z_se,
    );
    let mut warnings: Vec<String> = a.warnings.iter().map(|w| format!("A: {w}")).collect();
    warnings.extend(b.warnings.iter().map(|w| format!("B: {w}")));
    if a.verdict.starts_with("DISAGREEMENT") {
        warnings.push("A's cross-checks disagree: the Bayes factor inherits that doubt".into());
    }
    if b.verdict.starts_with("DISAGREEMENT") {
        warnings.push("B's cross-checks disagree: the Bayes factor inherits that doubt".into());
    }
    CompareOutcome {
        log_bayes_factor: lbf,
        log_bayes_factor_se: se,
        a,
        b,
        warnings,
    }
}

/// Draws for plots: resampled target draws (at most `max`), per unknown, with their modes.
#[derive(Clone, Debug, Serialize)]
pub struct PlotDraws {
    pub names: Vec<String>,
    /// x[j][i]: unknown j of draw i.
    pub x: Vec<Vec<f64>>,
    /// 1-based mode of each draw.
    pub mode: Vec<usize>,
    pub beta: Vec<f64>,
}

impl RunResult {
    /// Resampled, unweighted target draws as in `kiln run --draws-csv`.
    pub fn resampled(&self) -> Vec<usize> {
        let n = self.outcome.settings.draws * self.outcome.settings.chains;
        resample(&self.draws.weight, n, self.outcome.seed)
    }

    pub fn plot_draws(&self, max: usize) -> PlotDraws {
        let picks = self.resampled();
        let stride = picks.len().div_ceil(max.max(1)).max(1);
        let d = self.names.len();
        let chosen: Vec<usize> = picks.iter().step_by(stride).copied().collect();
        PlotDraws {
            names: self.names.clone(),
            x: (0..d)
                .map(|j| chosen.iter().map(|&i| self.draws.x[i * d + j]).collect())
                .collect(),
            mode: chosen.iter().map(|&i| self.draws.mode[i] + 1).collect(),
            beta: chosen.iter().map(|&i| self.draws.beta[i]).collect(),
        }
    }
}
