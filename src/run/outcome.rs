//! `kiln run` and `kiln compare`: a prepared target sampled to the end, and everything the run
//! reports.
//!
//! Owns: [`run`], [`finish_run`] (estimates, cross-checks, verdict, warnings and notes
//! gathered into a [`RunOutcome`]), [`RunResult`] with its draws, and [`compare`].
//! Must not: print or format numbers beyond the sentences of notes and warnings.

use super::digest::{mode_table_by_mass, unknowns_summary, ModeTable, UnknownsSummary};
use super::prepare::{unknowns_of, Prepared, Unknown};
use super::session::Session;
use super::settings::{Overrides, RunSettings};
use crate::common::error::KilnError;
use crate::common::format::rough;
use crate::common::maths::sqrt;
use crate::common::message::Message;
use crate::common::stats::resample;
use crate::estimate::crosscheck::Agreement;
use crate::estimate::crosscheck::CheckInputs;
use crate::estimate::crosscheck::GridValue;
use crate::estimate::crosscheck::ImportanceValue;
use crate::estimate::quadrature::GridResult;
use crate::estimate::Verdict;
use crate::estimate::{
    cross_checks, estimate, verdict, warnings, CrossCheck, Estimates, WeightedDraws,
};
use crate::model::spec::Spec;
use crate::sample::{SamplerOptions, Stepper};
use crate::search::Coverage;
use serde::{Deserialize, Serialize};

/// Draws of the importance-sampling cross-check: enough for its Pareto k̂ to tell bounded weights
/// from a heavy tail on the demos (measured, src/TUNING.md), about 3 % of a default run's cost.
pub const IS_DRAWS: usize = 64_000;

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
    pub verdict: Verdict,
    /// The mode search's evidence that every mode was found (with the modes the chains found).
    pub mode_coverage: Coverage,
    /// The unknowns in the summary's layout (median, 90 % interval, mean ± sd, R-hat,
    /// effective draws), the interval's level stated.
    pub unknowns_summary: UnknownsSummary,
    /// The mode table's rows: by mass, with the tiny tail folded.
    pub mode_table: ModeTable,
    /// What to act on, each with a remedy.
    pub warnings: Vec<Message>,
    /// What Kiln chose and why.
    pub notes: Vec<Message>,
    pub seed: u64,
    /// Every evaluation of the energy (with or without its gradient): the mode search, warm-up,
    /// the kept draws and the chains' discovery of modes.
    pub energy_evaluations: u64,
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
    let inputs = CheckInputs {
        exact: exact_log_z,
        grid: grid.map(|g| GridValue {
            log_z: g.log_z,
            error: g.change,
            converged: g.converged,
        }),
        importance: Some(ImportanceValue {
            log_z: est.is_log_z,
            se: est.is_log_z_se,
            ess: est.diagnostics.is_ess,
            khat: est.diagnostics.is_khat,
        }),
        laplace: laplace_log_z,
        modes_gaussian: plan.modes.iter().all(|m| !m.non_quadratic),
    };
    let checks = cross_checks(est.log_z, est.log_z_se, &inputs);
    let mut coverage = p.search.coverage.clone();
    coverage.add_found_by_chains(plan.new_modes);
    let v = verdict(&checks, est.log_z, &coverage);
    let names = p.target.names.clone();
    let iterations = plan.options.draws * plan.options.chains;
    let mut warns = warnings(&est, &checks, &names, plan.is_tempered(), iterations);
    if let Some(g) = grid {
        warns.extend(g.warnings.iter().cloned());
    }
    let mut notes = p.search.notes.clone();
    notes.extend(plan.notes.iter().map(|n| sampler_note(n)));
    if plan.new_modes > 0 {
        notes.push(Message::note(
            "found_by_chains",
            format!(
                "the chains found {} mode(s) the mode search had missed",
                plan.new_modes
            ),
        ));
    }
    let energy_evaluations =
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
    let unknowns = unknowns_of(spec);
    let outcome = RunOutcome {
        title: spec.title.clone(),
        dimension: p.target.dim(),
        unknowns_summary: unknowns_summary(&unknowns, &est),
        mode_table: mode_table_by_mass(&est.modes),
        unknowns,
        settings,
        est,
        laplace_log_z,
        grid_log_z: grid.map(|g| g.log_z).filter(|v| v.is_finite()),
        exact_log_z,
        cross_checks: checks,
        verdict: v,
        mode_coverage: coverage,
        warnings: warns,
        notes,
        seed: p.seed,
        energy_evaluations,
        exact_masses,
    };
    Ok(RunResult {
        outcome,
        draws,
        names,
    })
}

/// The codes of the sampler's notes (what warm-up chose), by how each sentence begins; a
/// sentence the table does not know keeps the general code `warmup_choice`.
pub const SAMPLER_NOTE_CODES: &[(&str, &str)] = &[
    ("the base was refitted", "base_refitted"),
    (
        "Hamiltonian moves in every iteration",
        "moves_every_iteration",
    ),
    ("Hamiltonian moves in ", "moves_schedule"),
    ("warm-up shortened", "warmup_shortened"),
    (
        "% of the base approximation lies where the density is zero",
        "base_outside_support",
    ),
];

/// A note of the sampler (plain text from warm-up) with its code.
pub fn sampler_note(sentence: &str) -> Message {
    let code = SAMPLER_NOTE_CODES
        .iter()
        .find(|(start, _)| {
            if start.starts_with('%') {
                sentence.contains(start)
            } else {
                sentence.starts_with(start)
            }
        })
        .map_or("warmup_choice", |(_, code)| code);
    Message::note(code, sentence)
}

fn dist2(a: &[f64], b: &[f64]) -> f64 {
    a.iter().zip(b).map(|(x, y)| (x - y) * (x - y)).sum()
}

/// What a comparison reads of each run (the page sends these fields of each run's result).
#[derive(Clone, Debug, Serialize, Deserialize)]
pub struct Evidence {
    pub log_z: f64,
    pub log_z_se: f64,
    pub verdict: VerdictBrief,
}

/// The verdict's state and whether the search was limited.
#[derive(Clone, Copy, Debug, Serialize, Deserialize)]
pub struct VerdictBrief {
    pub state: Agreement,
    pub search_limited: bool,
}

impl Evidence {
    pub fn of(r: &RunOutcome) -> Evidence {
        Evidence {
            log_z: r.est.log_z,
            log_z_se: r.est.log_z_se,
            verdict: VerdictBrief {
                state: r.verdict.state,
                search_limited: r.verdict.search_limited,
            },
        }
    }
}

/// log(Z_A / Z_B) ± SE from two independent runs, and what it may be read as.
#[derive(Clone, Debug, Serialize)]
pub struct BayesFactor {
    pub log_bayes_factor: f64,
    pub log_bayes_factor_se: f64,
    /// False when either run's verdict is not "agree": the number is then not to be used.
    pub judged: bool,
    /// Why it is not judged.
    pub refused_because: Option<String>,
    /// Whether the difference is within twice its standard error (the runs cannot tell the
    /// models apart).
    pub within_errors: bool,
    /// What it means, in plain words.
    pub meaning: String,
}

/// The one implementation of the comparison of two runs (the command line and the page).
pub fn bayes_factor(a: &Evidence, b: &Evidence) -> BayesFactor {
    let lbf = a.log_z - b.log_z;
    let se = sqrt(a.log_z_se * a.log_z_se + b.log_z_se * b.log_z_se);
    let not_agreed = |name: &str, e: &Evidence| -> Option<String> {
        match e.verdict.state {
            Agreement::Agree => None,
            Agreement::Disagree => Some(format!("{name}'s cross-checks disagree")),
            Agreement::NotEnoughEvidence => {
                Some(format!("{name}'s log Z has no independent check"))
            }
        }
    };
    let refusals: Vec<String> = [not_agreed("A", a), not_agreed("B", b)]
        .into_iter()
        .flatten()
        .collect();
    let refused_because = (!refusals.is_empty()).then(|| {
        format!(
            "{}: resolve that before comparing the models",
            refusals.join(" and ")
        )
    });
    let within_errors = lbf.abs() <= 2.0 * se;
    let meaning = if !lbf.is_finite() || !se.is_finite() {
        "no comparison: a log Z is not finite".to_string()
    } else if within_errors {
        format!(
            "the two models explain the data about equally well: their difference, {lbf:.3} nats, is within twice its standard error"
        )
    } else {
        let (better, worse, by) = if lbf > 0.0 {
            ("A", "B", lbf)
        } else {
            ("B", "A", -lbf)
        };
        format!(
            "the data are about {} times as probable under model {better} as under model {worse} (a difference of {by:.3} nats in log evidence)",
            rough(crate::common::maths::exp(by))
        )
    };
    let limited: Vec<&str> = [("A", a), ("B", b)]
        .into_iter()
        .filter(|(_, e)| e.verdict.search_limited)
        .map(|(n, _)| n)
        .collect();
    let meaning = if limited.is_empty() {
        meaning
    } else {
        format!(
            "{meaning}; {}'s mode search was limited, so this holds given the modes found",
            limited.join(" and ")
        )
    };
    BayesFactor {
        log_bayes_factor: lbf,
        log_bayes_factor_se: se,
        judged: refused_because.is_none(),
        refused_because,
        within_errors,
        meaning,
    }
}

/// A warning of one of the two runs of a comparison.
#[derive(Clone, Debug, Serialize)]
pub struct ModelMessage {
    /// "A" or "B".
    pub model: &'static str,
    #[serde(flatten)]
    pub message: Message,
}

/// What `kiln compare` reports: log(Z_A / Z_B) ± SE from two independent runs.
#[derive(Clone, Debug, Serialize)]
pub struct CompareOutcome {
    pub bayes_factor: BayesFactor,
    pub a: RunOutcome,
    pub b: RunOutcome,
    /// Both runs' warnings, A's first.
    pub warnings: Vec<ModelMessage>,
}

pub fn compare(a: RunOutcome, b: RunOutcome) -> CompareOutcome {
    let bf = bayes_factor(&Evidence::of(&a), &Evidence::of(&b));
    let side = |model: &'static str, r: &RunOutcome| -> Vec<ModelMessage> {
        r.warnings
            .iter()
            .map(|m| ModelMessage {
                model,
                message: m.clone(),
            })
            .collect()
    };
    let mut warnings = side("A", &a);
    warnings.extend(side("B", &b));
    CompareOutcome {
        bayes_factor: bf,
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

#[cfg(test)]
mod tests {
    use super::*;

    fn ev(log_z: f64, log_z_se: f64, state: Agreement) -> Evidence {
        Evidence {
            log_z,
            log_z_se,
            verdict: VerdictBrief {
                state,
                search_limited: false,
            },
        }
    }

    #[test]
    fn the_bayes_factor_combines_errors_and_refuses_without_agreement() {
        // SEs 0.375 and 0.5 combine to √(0.140625 + 0.25) = 0.625 exactly; 2·SE = 1.25.
        let bf = bayes_factor(
            &ev(1.25, 0.375, Agreement::Agree),
            &ev(0.0, 0.5, Agreement::Agree),
        );
        assert_eq!(bf.log_bayes_factor, 1.25);
        assert_eq!(bf.log_bayes_factor_se, 0.625);
        assert!(bf.within_errors && bf.judged && bf.refused_because.is_none());
        let bf = bayes_factor(
            &ev(-3.2, 0.03, Agreement::Agree),
            &ev(-4.0, 0.04, Agreement::Agree),
        );
        assert!(!bf.within_errors);
        assert!(bf.meaning.contains("model A"), "{}", bf.meaning);
        let bf = bayes_factor(
            &ev(-3.2, 0.03, Agreement::Disagree),
            &ev(-4.0, 0.04, Agreement::NotEnoughEvidence),
        );
        assert!(!bf.judged);
        let why = bf.refused_because.unwrap();
        assert!(why.contains("A's cross-checks disagree") && why.contains("B's log Z"));
    }
}
