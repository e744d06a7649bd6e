//! Warm-up: the schedule of windows and what is learned after each.
//!
//! Owns: the window lengths, the bias learning rate, when modes found by the chains and
//! candidate bases are considered, how often a Hamiltonian move is made (the trial of cheaper
//! moves, [`gradient_probability`], [`TRIAL_WINDOW`], [`UNDER_COVERED`]), when a good base
//! shortens warm-up ([`GOOD_ESS_SHARE`]) and the joint variant's mass of u. Everything it
//! learns is frozen before the kept draws (the stepper's job).
//! Must not: estimate anything for the report.

use super::chain::Chain;
use super::plan::Record;
use super::series::Series;
use super::stepper::Stepper;
use super::tempering::Bias;
use crate::common::error::KilnError;
use crate::common::maths::{ln, sqrt};
use crate::common::psis::{pareto_khat, KHAT_FINITE_VARIANCE};
use crate::common::stats::{ess, weights_ess};

/// Least share of the evaluations that Hamiltonian moves keep once independence moves carry
/// the chains (see [`gradient_probability`]).
pub const MIN_HAMILTONIAN_SHARE: f64 = 0.1;

/// Probability that an iteration makes a Hamiltonian move, from the acceptance rate `a` of the
/// independence moves and the mean energy evaluations `l` of one Hamiltonian move.
///
/// An iteration always makes the independence move (one evaluation) and the β draw (none);
/// with probability p it first makes a Hamiltonian move (`l` evaluations). The Hamiltonian
/// moves get the share 1 − a of the evaluations, and at least [`MIN_HAMILTONIAN_SHARE`]:
/// p·l / (p·l + 1) = max(1 − a, MIN_HAMILTONIAN_SHARE). When the base is close to the target,
/// independence proposals are accepted almost always and each is a nearly independent draw for
/// one evaluation, where a Hamiltonian move costs `l` and moves only locally; when they are
/// mostly rejected, the Hamiltonian moves carry the chain. Mixing the two kernels with a fixed
/// probability keeps the joint density invariant.
pub fn gradient_probability(a: f64, l: f64) -> f64 {
    let share = (1.0 - a).clamp(MIN_HAMILTONIAN_SHARE, 1.0);
    if !(share < 1.0) || !l.is_finite() {
        return 1.0;
    }
    (share / ((1.0 - share) * l.max(1.0))).clamp(0.0, 1.0)
}

/// Warm-up windows as shares of the warm-up length.
pub const WINDOWS: [f64; 7] = [0.08, 0.08, 0.12, 0.12, 0.15, 0.2, 0.25];
/// After which windows the base may be refitted (and chains' new modes looked for).
pub const REFIT_AFTER: [usize; 2] = [2, 4];

/// Lengths of the warm-up windows for `warmup` iterations (they add up to `warmup`).
pub fn window_lengths(warmup: usize) -> Vec<usize> {
    let mut out: Vec<usize> = WINDOWS
        .iter()
        .map(|f| (f * warmup as f64).floor() as usize)
        .collect();
    let used: usize = out.iter().sum();
    if let Some(last) = out.last_mut() {
        *last += warmup - used;
    }
    out
}

/// The warm-up window (0-based) that tries fewer Hamiltonian moves against the window before it,
/// which makes one in every iteration.
pub const TRIAL_WINDOW: usize = 4;

/// The probability of a Hamiltonian move that the window's independence moves suggest (see
/// [`gradient_probability`]).
fn suggested_probability(records: &[Record]) -> f64 {
    let iterations: usize = records.iter().map(|r| r.iterations).sum();
    let accepted: usize = records.iter().map(|r| r.independence_accepted).sum();
    let transitions: usize = records.iter().map(|r| r.transitions).sum();
    let leapfrogs: u64 = records.iter().map(|r| r.leapfrogs).sum();
    if iterations == 0 || transitions == 0 {
        return 1.0;
    }
    gradient_probability(
        accepted as f64 / iterations as f64,
        leapfrogs as f64 / transitions as f64,
    )
}

/// The largest share of the target's weight that may lie where the base falls short of it by
/// more than e² (draws with Δ < −2, weighted by p(1|x)) for a schedule of mostly independence
/// moves. Independence moves go only where the proposal has mass; where the target has mass the
/// base lacks, Hamiltonian moves at high β carry the chains there, and with few of them a run of
/// moderate length under-represents those regions (log Z biased low) without its effective
/// sample size showing it. (Measured in the trial window: near-normal, skewed or separated
/// modes, even in 8 dimensions, give 0 to 0.6 %; the curved ridge 2.5 to 23 %, the two shells
/// 20 to 26 %; the ridge at default settings came out 7 standard errors low without this rule.)
pub const UNDER_COVERED: f64 = 0.01;

/// Effective draws of the log Z series (multi-chain ESS) per energy evaluation in the records
/// (evaluations: the leapfrog steps of the Hamiltonian moves and one per independence move),
/// and the share of the target's weight in draws with Δ < −2 (see [`UNDER_COVERED`]).
fn efficiency(bias: &Bias, records: &[Record]) -> (f64, f64) {
    let series = Series::new(bias, records);
    if series.len() < 4 {
        return (0.0, f64::INFINITY);
    }
    let z = series.linearised();
    let evaluations: u64 = records
        .iter()
        .map(|r| r.leapfrogs + r.iterations as u64)
        .sum();
    (
        ess(&series.per_chain(&z)) / evaluations.max(1) as f64,
        under_covered_share(&series, records),
    )
}

/// The share of the target's weight in draws where the base falls short of the target by more
/// than e² (Δ < −2, weighted by p(1|x)); `series` is the records' own (see [`UNDER_COVERED`]).
pub fn under_covered_share(series: &Series, records: &[Record]) -> f64 {
    let w = series.weights();
    let weight: f64 = w.iter().sum();
    let under: f64 = records
        .iter()
        .flat_map(|r| r.delta.iter())
        .zip(&w)
        .filter(|(d, _)| **d < -2.0)
        .map(|(_, a)| a)
        .sum();
    // An empty sum is −0.0; print it as 0 the same way on every platform.
    if under > 0.0 {
        under / weight
    } else {
        0.0
    }
}

/// The warm-up window (0-based) after which warm-up may be shortened (see [`GOOD_ESS_SHARE`]).
pub const SHORTEN_AFTER: usize = 1;
/// Least effective sample size (Kish) of window [`SHORTEN_AFTER`]'s independence proposals, as
/// a share of their number, for the base to count as already good; the weights' k̂ must also be
/// at most `KHAT_FINITE_VARIANCE` and at most [`UNDER_COVERED`] of the target's weight
/// under-covered. Then the warm-up windows left are cut to [`WARMUP_KEEP`] of their length and
/// the kept draws stay as asked: a run limited by a budget spends what was saved on kept draws
/// (whose proposals' importance-sampling estimate carries such runs), any other run ends
/// sooner. The proposals measure the base whatever the chains' β (the bias is still near zero
/// this early, with few draws near β = 1). Measured in windows 1–2 over the benchmark's
/// targets (3 seeds at 2e4 and 6e4): the separated and old-faithful mixtures and the 4-D and
/// 8-D rotated products 0.71–0.98 with k̂ ≤ 0.35; the egg crate up to 0.99 but k̂ 1.0–2.6; the
/// two shells and the curved ridge 0.06–0.65, k̂ 0.2–1.1 and 11–89 % under-covered. Effect and
/// calibration: src/TUNING.md ("Warm-up shortens itself when the base is already good").
pub const GOOD_ESS_SHARE: f64 = 0.5;
/// Share of their length that the warm-up windows left keep when warm-up is shortened.
pub const WARMUP_KEEP: f64 = 0.4;
/// A shortened window keeps at least this many iterations (or its whole length if shorter).
pub const MIN_SHORT_WINDOW: usize = 20;

/// Learning rate of the bias update after warm-up window `w` (counted from the last reset).
fn bias_step(w: usize) -> f64 {
    [1.0, 1.0, 0.8, 0.6, 0.5, 0.4, 0.3][w.min(6)]
}

impl Stepper {
    /// What warm-up learns from one window of every chain.
    pub(super) fn learn(&mut self, w: usize, records: &[Record]) -> Result<(), KilnError> {
        let target = self.target.clone();
        let plan = &mut self.plan;
        let used = plan.bias.clone();
        if plan.options.learn_bias {
            plan.update_bias(records, bias_step(self.since_reset));
            self.since_reset += 1;
        }
        self.history.push((used.clone(), records.to_vec()));
        let mut refitted_now = false;
        if REFIT_AFTER.contains(&w) {
            let found = plan.discover_modes(&target, records)?;
            plan.new_modes += found;
            // New modes force a new base; otherwise a candidate must beat the current one.
            let must_change = found > 0;
            let first_window = w + 1 - self.history.len();
            let change =
                plan.refit_base(&target, &self.history, must_change, &mut self.merge_rng)?;
            refitted_now = change.is_some();
            if let Some(what) = change {
                for c in self.chains.iter_mut() {
                    c.set_base(plan);
                    c.restart_adaptation(plan);
                }
                self.since_reset = 0;
                self.history.clear();
                plan.notes.push(format!(
                    "the base was refitted to the draws of warm-up windows {}–{}: {what}{}",
                    first_window + 1,
                    w + 1,
                    if found > 0 {
                        format!(", after the chains found {found} new mode(s)")
                    } else {
                        String::new()
                    }
                ));
            }
        }
        // How often to make a Hamiltonian move. Window 0 makes one in every iteration (the step
        // size adapts); the following windows make them with the probability that the measured
        // acceptance of the independence moves suggests (when the base covers the target),
        // except window TRIAL_WINDOW − 1, which makes one in every iteration again as the
        // reference for the trial: after window TRIAL_WINDOW, the cheaper schedule is kept if its
        // draws carried more effective draws of the log Z series per evaluation than the
        // reference window's did.
        if plan.is_tempered() && plan.options.independence {
            let (eff, under) = efficiency(&used, records);
            if w + 2 < TRIAL_WINDOW {
                // Only where the base covers the target (see UNDER_COVERED); otherwise the
                // Hamiltonian moves explore what the next refit is fitted to.
                plan.p_gradient = if under <= UNDER_COVERED {
                    suggested_probability(records)
                } else {
                    1.0
                };
            } else if w + 2 == TRIAL_WINDOW {
                plan.p_gradient = 1.0;
            } else if w + 1 == TRIAL_WINDOW {
                // The trial runs only where the reference window found the base covering the
                // target; otherwise its window keeps exploring with Hamiltonian moves.
                self.full_efficiency = eff;
                self.trial_skipped = under > UNDER_COVERED;
                if self.trial_skipped {
                    plan.p_gradient = 1.0;
                    plan.notes.push(format!(
                        "Hamiltonian moves in every iteration: {:.1}% of the target's weight lies where the base falls short of it by more than e² (above the {}% up to which mostly independence moves are tried)",
                        100.0 * under,
                        100.0 * UNDER_COVERED
                    ));
                } else {
                    plan.p_gradient = suggested_probability(records);
                }
            } else if w == TRIAL_WINDOW && !self.trial_skipped && refitted_now {
                // The trial measured the base that was just replaced: nothing is known of how
                // the new one carries the chains, so every iteration keeps its Hamiltonian move.
                // (Measured: on a twisted 6-D valley the cheap schedule chosen on the old base
                // left ±2 SE covering the truth in 2 of 4 such seeds.)
                plan.p_gradient = 1.0;
                plan.notes.push(
                    "Hamiltonian moves in every iteration: the base was replaced after the trial of cheaper moves, which had measured the old one".to_string(),
                );
            } else if w == TRIAL_WINDOW && !self.trial_skipped {
                let cheap = plan.p_gradient;
                let close = under <= UNDER_COVERED;
                plan.p_gradient = if eff > self.full_efficiency && close {
                    cheap
                } else {
                    1.0
                };
                plan.notes.push(format!(
                    "Hamiltonian moves in {:.1}% of iterations from warm-up window {} on: effective draws of the log Z series per 1000 evaluations {:.1} with them in every iteration, {:.1} with them in {:.1}%; {:.1}% of the target's weight where the base falls short of it by more than e² ({} the {}% up to which mostly independence moves are allowed)",
                    100.0 * plan.p_gradient,
                    w + 2,
                    1000.0 * self.full_efficiency,
                    1000.0 * eff,
                    100.0 * cheap,
                    100.0 * under,
                    if close { "within" } else { "above" },
                    100.0 * UNDER_COVERED
                ));
            }
            // A base that already looks good shortens the windows left (see `GOOD_ESS_SHARE`).
            if w == SHORTEN_AFTER {
                let log_w: Vec<f64> = records
                    .iter()
                    .flat_map(|r| r.proposal_log_w.iter().copied())
                    .collect();
                let share = weights_ess(&log_w) / log_w.len().max(1) as f64;
                let khat = pareto_khat(&log_w).unwrap_or(f64::INFINITY);
                if share >= GOOD_ESS_SHARE && khat <= KHAT_FINITE_VARIANCE && under <= UNDER_COVERED
                {
                    let asked = self.plan.options.warmup;
                    let now = self.shorten_warmup(w, WARMUP_KEEP);
                    self.plan.notes.push(format!(
                        "warm-up shortened from {asked} to {now} iterations per chain, because the base already looked good in warm-up windows 1–{}: the {} independence proposals of window {} had an effective sample size of {:.0}% of their number (at least {:.0}% needed) and k̂ {khat:.2} (at most {KHAT_FINITE_VARIANCE}), and {:.1}% of the target's weight lay where the base falls short of it by more than e² (at most {}%); the windows left were cut to {:.0}% of their length, and the kept draws are as many as asked",
                        w + 1,
                        log_w.len(),
                        w + 1,
                        100.0 * share,
                        100.0 * GOOD_ESS_SHARE,
                        100.0 * under,
                        100.0 * UNDER_COVERED,
                        100.0 * WARMUP_KEEP
                    ));
                }
            }
        }
        let plan = &mut self.plan;
        if Chain::joint(plan) {
            let us: Vec<f64> = records
                .iter()
                .flat_map(|r| r.beta.iter().map(|b| ln(*b) - ln(1.0 - b)))
                .filter(|u| u.is_finite())
                .collect();
            if us.len() > 10 {
                let m = us.iter().sum::<f64>() / us.len() as f64;
                let v = us.iter().map(|u| (u - m) * (u - m)).sum::<f64>() / (us.len() - 1) as f64;
                plan.u_scale = sqrt(v).clamp(0.5, 5.0);
            }
        }
        Ok(())
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn hamiltonian_probability_gives_the_stated_share_of_evaluations() {
        // p·l / (p·l + 1) = max(1 − a, MIN_HAMILTONIAN_SHARE), by construction.
        for &(a, l) in &[(0.95, 9.0), (0.5, 15.0), (0.3, 3.0), (0.99, 63.0)] {
            let p = gradient_probability(a, l);
            let share = p * l / (p * l + 1.0);
            let want = (1.0 - a).max(MIN_HAMILTONIAN_SHARE);
            if p < 1.0 {
                assert!(
                    (share - want).abs() < 1e-12,
                    "a {a}, l {l}: {share} vs {want}"
                );
            } else {
                assert!(share <= want + 1e-12);
            }
        }
        assert_eq!(gradient_probability(0.0, 10.0), 1.0);
        assert_eq!(gradient_probability(0.2, 2.0), 1.0);
        assert_eq!(gradient_probability(0.9, f64::NAN), 1.0);
    }
}
