//! Annealed importance sampling (Neal 2001, "Annealed importance sampling", Statistics and
//! Computing 11, 125–139) along the geometric path `π_β ∝ q^{1−β} f^β`, with static HMC
//! transitions, per-temperature step sizes by dual averaging and a schedule of equal
//! thermodynamic length learned in warm-up runs.
//! Must not: share state between runs beyond the learned schedule and step sizes.

use super::*;
use crate::sample::hmc::DualAveraging;

/// Evaluations of one AIS run over `t` temperatures: the start and `t − 1` transitions.
fn ais_run_cost(t: usize) -> u64 {
    1 + (t.saturating_sub(1) * AIS_LEAPFROGS) as u64
}

struct AisRun {
    log_w: f64,
    z: Vec<f64>,
}

/// One AIS run on `schedule`; with `adapt`, updates the step sizes and records sd(Δ) per bin.
fn ais_run(
    pot: &mut PathPotential,
    schedule: &[f64],
    steps: &mut [DualAveraging],
    adapt: Option<&mut Vec<Moments>>,
    rng: &mut Stream,
) -> AisRun {
    let lz = pot.log_zeta;
    let mut cur = pot.draw_base(rng);
    let mut log_w = 0.0;
    let mut stats = adapt;
    for t in 1..schedule.len() {
        let delta = cur.delta(lz);
        if let Some(s) = stats.as_deref_mut() {
            s[ais_bin(schedule[t - 1])].add(delta);
        }
        log_w -= (schedule[t] - schedule[t - 1]) * delta;
        if !log_w.is_finite() {
            log_w = f64::NEG_INFINITY;
            break;
        }
        if t + 1 < schedule.len() {
            pot.beta = schedule[t];
            let b = ais_bin(schedule[t]);
            let eps = exp(steps[b].log_eps);
            let tr = pot.transition(&mut cur, eps, Move::Hmc(AIS_LEAPFROGS), rng);
            if stats.is_some() {
                steps[b].update(tr.accept);
            }
        }
    }
    AisRun { log_w, z: cur.z }
}

/// Annealed importance sampling with HMC transitions, within `budget` evaluations.
///
/// Tuning: warm-up runs (10 % of the budget) on the power schedule of Xie et al. 2011 adapt one
/// step size per β bin by dual averaging and measure sd(Δ) per bin. The scored runs use a
/// schedule of equal thermodynamic length with T temperatures, T = max(√(B/L), 4Λ²) (runs and
/// temperatures grow together; more temperatures when the per-run log-weight variance Λ²/T
/// would exceed 1/4), and as many runs as the budget holds (at least 16).
pub fn annealed_importance_sampling(
    target: &Target,
    base: &Base,
    budget: u64,
    seed: u64,
) -> BaselineRun {
    let Some(mut pot) = PathPotential::new(target, base) else {
        return BaselineRun::without_metric(target.dim());
    };
    let mut rng = stream(seed, 2, 0);
    let l = AIS_LEAPFROGS as f64;
    let b = budget as f64;
    // Step sizes: one dual averaging per bin, started from the heuristic at a draw from q.
    let start = pot.draw_base(&mut rng);
    pot.beta = 0.5;
    let eps0 = pot.first_step_size(&start, &mut rng);
    let mut steps: Vec<DualAveraging> = (0..AIS_BINS)
        .map(|_| DualAveraging::new(eps0, TARGET_ACCEPT))
        .collect();
    let mut stats = vec![Moments::default(); AIS_BINS];
    let warm_budget = (AIS_WARMUP_SHARE * b) as u64;
    let t_warm = ((0.5 * sqrt(b / l)).ceil() as usize).max(10);
    let warm_schedule = power_schedule(t_warm);
    let mut warm_runs = 0;
    while pot.evaluations() + ais_run_cost(t_warm) <= warm_budget || warm_runs == 0 {
        ais_run(
            &mut pot,
            &warm_schedule,
            &mut steps,
            Some(&mut stats),
            &mut rng,
        );
        warm_runs += 1;
    }
    // Freeze every bin at its averaged step size.
    for s in steps.iter_mut() {
        *s = DualAveraging::new(s.final_eps(), TARGET_ACCEPT);
    }
    // Thermodynamic length from the bins (empty bins borrow their neighbour's sd).
    let mut sds: Vec<Option<f64>> = stats.iter().map(|m| m.sd()).collect();
    for k in 1..AIS_BINS {
        if sds[k].is_none() {
            sds[k] = sds[k - 1];
        }
    }
    for k in (0..AIS_BINS - 1).rev() {
        if sds[k].is_none() {
            sds[k] = sds[k + 1];
        }
    }
    let edges = ais_bin_edges();
    let mut grid = vec![0.0];
    let mut lam = vec![0.0];
    for k in 0..AIS_BINS {
        grid.push(edges[k + 1]);
        lam.push(lam[k] + sds[k].unwrap_or(0.0) * (edges[k + 1] - edges[k]));
    }
    let length = *lam.last().unwrap_or(&0.0);
    let remaining = budget.saturating_sub(pot.evaluations()) as f64;
    let t_cap = (((remaining / AIS_MIN_RUNS as f64) - 1.0) / l + 1.0).max(2.0) as usize;
    let t = ((sqrt(remaining / l).ceil() as usize).max((4.0 * length * length).ceil() as usize))
        .clamp(2, t_cap.max(2));
    let schedule = equal_length_schedule(&grid, &lam, t);
    let mut runs: Vec<f64> = Vec::new();
    let mut draws = Draws::new(target.dim());
    let cost = ais_run_cost(schedule.len() - 1);
    while pot.evaluations() + cost <= budget || runs.is_empty() {
        let r = ais_run(&mut pot, &schedule, &mut steps, None, &mut rng);
        draws.push(target, &r.z, r.log_w);
        runs.push(r.log_w);
    }
    BaselineRun {
        log_z: base.log_zeta + log_mean_exp(&runs),
        log_z_se: log_mean_se(&runs),
        evaluations: pot.evaluations(),
        tuning: format!(
            "{} runs × {} temperatures, {} leapfrogs each; {warm_runs} warm-up runs; Λ = {length:.2}; step sizes {:.3}–{:.3}",
            runs.len(),
            schedule.len() - 1,
            AIS_LEAPFROGS,
            steps.iter().map(|s| exp(s.log_eps)).fold(f64::INFINITY, f64::min),
            steps.iter().map(|s| exp(s.log_eps)).fold(0.0, f64::max),
        ),
        draws,
    }
}
