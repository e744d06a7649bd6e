//! The kept draws summarised: weighted draws in the user's coordinates with their modes,
//! moments, quantiles, R-hat and ESS per unknown, mode masses ± SE, and the run's diagnostics.
//!
//! Owns: [`estimate`] (everything estimated from the records of a frozen plan),
//! [`Estimates`], [`ModeEstimate`], [`Diagnostics`], [`WeightedDraws`]. Expectations and
//! masses are weighted by p(β=1|x), with standard errors from the same linearisation as log Z.
//! Must not: run chains or change the plan.

use super::importance::importance_check;
use super::log_z::{log_z_reported, ControlSummary, LogZ, ProposalSummary};
use crate::common::maths::{exp, ln, sqrt};
use crate::common::stats::{ess_bulk, rhat, weighted_quantile};
use crate::model::target::Target;
use crate::sample::series::{mean_square, Series};
use crate::sample::{Plan, Record};
use crate::search::basin_of;
use crate::search::modes::mahalanobis2;
use crate::search::FoundBy;
use serde::Serialize;

#[derive(Clone, Debug, Serialize)]
pub struct ModeEstimate {
    /// Location in the user's coordinates.
    pub location: Vec<f64>,
    /// Share of the target's weight in draws assigned to this mode (0 when not visited).
    pub mass: f64,
    /// Its standard error; null when no draw near β = 1 visited the mode (its mass is then
    /// not estimated, rather than 0 ± 0).
    pub mass_se: Option<f64>,
    pub laplace_mass: f64,
    /// Whether draws near β = 1 (β ≥ 0.5) were assigned to this mode.
    pub visited: bool,
    /// How the mode was first found.
    pub found_by: FoundBy,
}

#[derive(Clone, Debug, Serialize)]
pub struct Diagnostics {
    /// Mean acceptance statistic of the Hamiltonian moves.
    pub acceptance: f64,
    pub divergences: usize,
    /// Transitions that hit the maximum tree depth.
    pub max_depth_hits: usize,
    /// Share of independence proposals accepted.
    pub independence_acceptance: f64,
    /// Share of iterations that made a Hamiltonian move (the rest made only the independence
    /// move and the β draw).
    pub hamiltonian_share: f64,
    /// Round trips β < 0.1 → β > 0.9 → β < 0.1, per chain.
    pub round_trips: Vec<usize>,
    /// Share of draws with β ≥ 0.9.
    pub share_near_beta_one: f64,
    /// Mean of p(β=1|x): the share of the draws' weight that counts for the target.
    pub mean_p1: f64,
    /// Effective sample size of the log Z series.
    pub log_z_ess: f64,
    /// max g − min g of the frozen bias (0 for the plain method).
    pub bias_span: f64,
    pub base_refitted: bool,
    pub base_components: usize,
    pub step_sizes: Vec<f64>,
    /// Importance sampling from the base: effective sample size of its weights.
    pub is_ess: f64,
    /// Importance sampling from the base: Pareto k̂ of its weights (`estimate::psis`).
    pub is_khat: f64,
    /// Share of the target weight in draws far (squared Mahalanobis distance above 30 + 4D)
    /// from the mode they are assigned to.
    pub far_from_modes: f64,
}

#[derive(Clone, Debug, Serialize)]
pub struct Estimates {
    pub log_z: f64,
    pub log_z_se: f64,
    /// The method note's estimator without control variates (equal to `log_z` when they are
    /// not used).
    pub log_z_plain: f64,
    pub log_z_plain_se: f64,
    pub control_variates: Option<ControlSummary>,
    /// What the combination with the independence proposals' estimate did.
    pub proposals: Option<ProposalSummary>,
    pub is_log_z: f64,
    pub is_log_z_se: f64,
    pub modes: Vec<ModeEstimate>,
    pub mean: Vec<f64>,
    pub sd: Vec<f64>,
    /// 5 %, 50 % and 95 % quantiles per unknown.
    pub quantiles: Vec<[f64; 3]>,
    /// Rank-normalised split R-hat per unknown, on the tempered chains.
    pub rhat: Vec<f64>,
    /// Effective number of target draws per unknown: sd² / SE(mean)², from the weighted series.
    pub ess: Vec<f64>,
    /// Bulk ESS per unknown of the tempered chains (Vehtari et al. 2021).
    pub ess_chains: Vec<f64>,
    pub diagnostics: Diagnostics,
}

/// A draw with its provenance.
#[derive(Clone, Debug)]
pub struct WeightedDraws {
    /// User coordinates, `dim` per draw, chains one after another.
    pub x: Vec<f64>,
    pub beta: Vec<f64>,
    /// p(β=1|x) / mean p(β=1|x).
    pub weight: Vec<f64>,
    pub chain: Vec<usize>,
    pub iteration: Vec<usize>,
    /// Index (0-based) of the mode whose Laplace component is most responsible for the draw.
    pub mode: Vec<usize>,
}

/// Round trips β low → high → low.
fn round_trips(beta: &[f64]) -> usize {
    let mut state = 0; // 0: unknown, 1: last extreme was low, 2: went high after low
    let mut trips = 0;
    for &b in beta {
        if b < 0.1 {
            if state == 2 {
                trips += 1;
            }
            state = 1;
        } else if b > 0.9 && state == 1 {
            state = 2;
        }
    }
    trips
}

/// Linearised standard error of a weighted mean: SE² = var(h) / ESS(h) with
/// h_i = w̃_i (v_i − m) and w̃ = normalised weights, per chain.
fn weighted_mean_se(values: &[f64], wn: &[f64], mean: f64, series: &Series) -> (f64, f64) {
    let h: Vec<f64> = values.iter().zip(wn).map(|(v, w)| w * (v - mean)).collect();
    let var = mean_square(&h);
    let e = series.ess_of(&h);
    (sqrt(var / e), e)
}

/// Most draws whose mode is decided by a local search, per run.
pub const MAX_BASIN_SEARCHES: usize = 4000;
/// Draws with less weight than this (relative to the mean weight, 1) keep their most
/// responsible Laplace component: together they hold a negligible share of the masses.
pub const MIN_BASIN_WEIGHT: f64 = 0.01;

/// Everything estimated from the sampling records of a frozen plan.
pub fn estimate(
    target: &Target,
    plan: &Plan,
    records: &[Record],
    is_draws: usize,
) -> (Estimates, WeightedDraws) {
    let d = target.dim();
    let tempered = plan.is_tempered();
    let LogZ {
        log_z,
        se: log_z_se,
        ess: log_z_ess,
        series,
        plain: log_z_plain,
        plain_se: log_z_plain_se,
        control: control_variates,
        proposals,
    } = log_z_reported(plan, records);
    let total = series.len();
    let n = total as f64;
    let lse1 = series.lse1;
    // Normalised weights w̃_i = p1_i / mean(p1).
    let wn: Vec<f64> = series.weights();

    // User coordinates and mode assignment.
    let laplace = &plan.laplace;
    let mut scratch = laplace.base.scratch();
    let k = laplace.base.components.len();
    let mut resp = vec![0.0; k];
    let mut x = Vec::with_capacity(total * d);
    let mut mode = Vec::with_capacity(total);
    let mut beta = Vec::with_capacity(total);
    let mut chain = Vec::with_capacity(total);
    let mut iteration = Vec::with_capacity(total);
    // A draw belongs to the mode whose region of attraction holds it. Draws well inside the
    // Laplace component of a mode (squared Mahalanobis distance at most D + 3√(2D), about the
    // 99.9 % point of a normal mode's) are that mode's; for the others that carry weight, the
    // local search from the draw decides (`search::basin_of`), at most MAX_BASIN_SEARCHES times.
    // (Assigning every draw to its most responsible Laplace component instead put a heavy-tailed
    // mode's far draws into a lighter-tailed neighbour: 40 % coverage of the masses' ±2 SE on
    // two clusters in 8-D, one of them Student-t.)
    let inner = d as f64 + 3.0 * crate::common::maths::sqrt(2.0 * d as f64);
    let far = 30.0 + 4.0 * d as f64;
    let mut far_weight = 0.0;
    let mut ev = target.evaluator();
    let mut searches = 0usize;
    for (c, r) in records.iter().enumerate() {
        for i in 0..r.beta.len() {
            let z = &r.z[i * d..(i + 1) * d];
            x.extend(target.to_user(z));
            laplace.base.responsibilities(z, &mut resp, &mut scratch);
            let mut best = (0..k)
                .max_by(|&a, &b| resp[a].total_cmp(&resp[b]))
                .unwrap_or(0);
            let near = mahalanobis2(z, &plan.modes[best].z, &plan.modes[best].hessian);
            let w = wn[mode.len()];
            if near > inner && w > MIN_BASIN_WEIGHT && searches < MAX_BASIN_SEARCHES {
                searches += 1;
                match basin_of(target, &mut ev, z, &plan.modes) {
                    Some(m) => best = m,
                    None => far_weight += w,
                }
            } else if near > far {
                far_weight += w;
            }
            mode.push(best);
            beta.push(r.beta[i]);
            chain.push(c);
            iteration.push(i);
        }
    }

    // Moments and quantiles per unknown, weighted by p1.
    let mut mean = vec![0.0; d];
    let mut sd = vec![0.0; d];
    let mut quantiles = vec![[0.0; 3]; d];
    let mut ess_target = vec![0.0; d];
    let mut rh = vec![0.0; d];
    let mut ess_ch = vec![0.0; d];
    for j in 0..d {
        let v: Vec<f64> = (0..total).map(|i| x[i * d + j]).collect();
        let m = v.iter().zip(&wn).map(|(a, w)| a * w).sum::<f64>() / n;
        let var = v
            .iter()
            .zip(&wn)
            .map(|(a, w)| w * (a - m) * (a - m))
            .sum::<f64>()
            / n;
        mean[j] = m;
        sd[j] = sqrt(var);
        for (qi, q) in [0.05, 0.5, 0.95].iter().enumerate() {
            quantiles[j][qi] = weighted_quantile(&v, &wn, *q);
        }
        let (se, _) = weighted_mean_se(&v, &wn, m, &series);
        ess_target[j] = if se > 0.0 { var / (se * se) } else { n };
        let chains = series.per_chain(&v);
        rh[j] = rhat(&chains);
        ess_ch[j] = ess_bulk(&chains);
    }

    // Mode masses.
    let laplace_masses = laplace.masses();
    let modes: Vec<ModeEstimate> = (0..plan.modes.len())
        .map(|km| {
            let ind: Vec<f64> = mode
                .iter()
                .map(|&m| if m == km { 1.0 } else { 0.0 })
                .collect();
            let mass = ind.iter().zip(&wn).map(|(a, w)| a * w).sum::<f64>() / n;
            let (se, _) = weighted_mean_se(&ind, &wn, mass, &series);
            let visited = (0..total).any(|i| mode[i] == km && beta[i] >= 0.5);
            let se = visited.then_some(se);
            ModeEstimate {
                location: plan.modes[km].x.clone(),
                mass,
                mass_se: se,
                laplace_mass: laplace_masses[km],
                visited,
                found_by: plan.modes[km].found_by,
            }
        })
        .collect();

    // Importance sampling from the base.
    let is = importance_check(target, plan, is_draws);
    let (is_log_z, is_log_z_se, is_ess) = (is.log_z, is.se, is.ess);

    let transitions: usize = records.iter().map(|r| r.transitions).sum();
    let acc: f64 = records
        .iter()
        .map(|r| r.accept * r.transitions as f64)
        .sum::<f64>()
        / transitions.max(1) as f64;
    let iters: usize = records.iter().map(|r| r.iterations).sum();
    let indep: usize = records.iter().map(|r| r.independence_accepted).sum();
    let bias_span = plan
        .bias
        .values
        .iter()
        .copied()
        .fold(f64::NEG_INFINITY, f64::max)
        - plan
            .bias
            .values
            .iter()
            .copied()
            .fold(f64::INFINITY, f64::min);
    let diagnostics = Diagnostics {
        acceptance: acc,
        divergences: records.iter().map(|r| r.divergences).sum(),
        max_depth_hits: records.iter().map(|r| r.max_depth_hits).sum(),
        independence_acceptance: if tempered && plan.options.independence {
            indep as f64 / iters.max(1) as f64
        } else {
            0.0
        },
        hamiltonian_share: transitions as f64 / iters.max(1) as f64,
        round_trips: records.iter().map(|r| round_trips(&r.beta)).collect(),
        share_near_beta_one: beta.iter().filter(|b| **b >= 0.9).count() as f64 / n.max(1.0),
        mean_p1: exp(lse1 - ln(n)),
        log_z_ess,
        bias_span,
        base_refitted: plan.refitted,
        base_components: plan.base.q.components.len(),
        step_sizes: Vec::new(),
        is_ess,
        is_khat: is.khat,
        far_from_modes: far_weight / n.max(1.0),
    };
    let est = Estimates {
        log_z,
        log_z_se,
        log_z_plain,
        log_z_plain_se,
        control_variates,
        proposals,
        is_log_z,
        is_log_z_se,
        modes,
        mean,
        sd,
        quantiles,
        rhat: rh,
        ess: ess_target,
        ess_chains: ess_ch,
        diagnostics,
    };
    let draws = WeightedDraws {
        x,
        beta,
        weight: wn,
        chain,
        iteration,
        mode,
    };
    (est, draws)
}
