//! Parallel tempering on a β ladder along the base-to-target path, NUTS on every rung above
//! β = 0 and exact draws from q at β = 0, with the stepping-stone estimator of log Z (Xie, Lewis,
//! Fan, Kuo & Chen 2011, Systematic Biology 60, 150–160).
//! Must not: use more evaluations than its budget.

use super::*;
use crate::sample::hmc::DualAveraging;

// ---------------------------------------------------------------------------------------------
// Parallel tempering with the stepping-stone estimator.

struct Ladder {
    betas: Vec<f64>,
    states: Vec<State>,
    adapt: Vec<DualAveraging>,
    eps: Vec<f64>,
}

impl Ladder {
    fn len(&self) -> usize {
        self.betas.len()
    }
}

/// One PT iteration: exact draw at β = 0, NUTS on every other rung, then swaps of neighbours
/// (even pairs on even iterations, odd pairs on odd ones). Returns the swaps (accepted, tried).
fn pt_iteration(
    pot: &mut PathPotential,
    ladder: &mut Ladder,
    iteration: usize,
    adapt: bool,
    rngs: &mut [Stream],
    swap_rng: &mut Stream,
) -> (usize, usize) {
    let lz = pot.log_zeta;
    ladder.states[0] = pot.draw_base(&mut rngs[0]);
    for k in 1..ladder.len() {
        pot.beta = ladder.betas[k];
        let eps = ladder.eps[k];
        let mut s = ladder.states[k].clone();
        let t = pot.transition(&mut s, eps, Move::Nuts, &mut rngs[k]);
        ladder.states[k] = s;
        if adapt {
            ladder.eps[k] = ladder.adapt[k].update(t.accept);
        }
    }
    let (mut accepted, mut tried) = (0, 0);
    let mut k = iteration % 2;
    while k + 1 < ladder.len() {
        let (da, db) = (ladder.states[k].delta(lz), ladder.states[k + 1].delta(lz));
        // π_a(x_b) π_b(x_a) / (π_a(x_a) π_b(x_b)) with π_β ∝ q exp(−βΔ).
        let log_a = (ladder.betas[k] - ladder.betas[k + 1]) * (da - db);
        tried += 1;
        let u = swap_rng.uniform();
        if !log_a.is_nan() && (log_a >= 0.0 || ln(u) < log_a) {
            ladder.states.swap(k, k + 1);
            accepted += 1;
        }
        k += 2;
    }
    (accepted, tried)
}

/// Parallel tempering from q to the target with the stepping-stone estimator, within `budget`.
///
/// Tuning: the first ladder has 8 rungs at β_k = (k/7)^{1/0.3} (Xie et al. 2011). Warm-up (a
/// third of the budget) runs in windows of 25 %, 25 % and 50 %; after each of the first two the
/// ladder is re-placed at equal thermodynamic length from the measured sd(Δ) per rung, with
/// K − 1 = ⌈Λ⌉ segments (swap acceptance about one half), 4 ≤ K ≤ 32, and K small enough that
/// 200 scored iterations fit the budget. Step sizes adapt per rung by dual averaging throughout
/// warm-up and are frozen at their averages.
pub fn parallel_tempering(target: &Target, base: &Base, budget: u64, seed: u64) -> BaselineRun {
    let Some(mut pot) = PathPotential::new(target, base) else {
        return BaselineRun::without_metric(target.dim());
    };
    let lz = base.log_zeta;
    let mut rngs: Vec<Stream> = (0..PT_MAX_RUNGS as u64 + 1)
        .map(|k| stream(seed, 3, k + 1))
        .collect();
    let mut swap_rng = stream(seed, 3, 0);
    let betas = power_schedule(PT_START_RUNGS - 1);
    let mut ladder = Ladder {
        betas: Vec::new(),
        states: Vec::new(),
        adapt: Vec::new(),
        eps: Vec::new(),
    };
    for (k, &b) in betas.iter().enumerate() {
        let s = pot.draw_base(&mut rngs[k]);
        pot.beta = b;
        let e = if k == 0 {
            1.0
        } else {
            pot.first_step_size(&s, &mut rngs[k])
        };
        ladder.betas.push(b);
        ladder.states.push(s);
        ladder.adapt.push(DualAveraging::new(e, TARGET_ACCEPT));
        ladder.eps.push(e);
    }
    let b = budget as f64;
    let warm = WARMUP_SHARE * b;
    let window_ends = [0.25 * warm, 0.5 * warm, warm];
    let mut iteration = 0;
    for (w, &end) in window_ends.iter().enumerate() {
        let mut moments = vec![Moments::default(); ladder.len()];
        let at_start = pot.evaluations();
        let mut its = 0usize;
        while (pot.evaluations() as f64) < end {
            pt_iteration(
                &mut pot,
                &mut ladder,
                iteration,
                true,
                &mut rngs,
                &mut swap_rng,
            );
            for (k, m) in moments.iter_mut().enumerate() {
                m.add(ladder.states[k].delta(lz));
            }
            iteration += 1;
            its += 1;
        }
        if w < 2 && its > 0 {
            // Re-place the ladder at equal thermodynamic length.
            let sds: Vec<f64> = moments.iter().map(|m| m.sd().unwrap_or(0.0)).collect();
            let lam = cumulative_length(&ladder.betas, &sds);
            let length = *lam.last().unwrap_or(&0.0);
            let per_rung_iteration =
                (pot.evaluations() - at_start) as f64 / (its as f64 * ladder.len() as f64);
            let scored = (1.0 - WARMUP_SHARE) * b;
            let affordable =
                (scored / (PT_MIN_ITERATIONS * per_rung_iteration.max(1.0))).floor() as usize;
            let k_new = (length.ceil() as usize + 1)
                .min(PT_MAX_RUNGS)
                .min(affordable.max(PT_MIN_RUNGS))
                .max(PT_MIN_RUNGS);
            let new_betas = equal_length_schedule(&ladder.betas, &lam, k_new - 1);
            let mut next = Ladder {
                betas: new_betas.clone(),
                states: Vec::new(),
                adapt: Vec::new(),
                eps: Vec::new(),
            };
            for &nb in &new_betas {
                let near = (0..ladder.len())
                    .min_by(|&i, &j| {
                        (ladder.betas[i] - nb)
                            .abs()
                            .total_cmp(&(ladder.betas[j] - nb).abs())
                    })
                    .unwrap_or(0);
                let e = if near == 0 && ladder.len() > 1 {
                    ladder.eps[1]
                } else {
                    ladder.eps[near]
                };
                next.states.push(ladder.states[near].clone());
                next.adapt.push(DualAveraging::new(e, TARGET_ACCEPT));
                next.eps.push(e);
            }
            ladder = next;
        }
    }
    for k in 1..ladder.len() {
        ladder.eps[k] = ladder.adapt[k].final_eps();
    }
    // Scored iterations.
    let k_rungs = ladder.len();
    let mut deltas: Vec<Vec<f64>> = vec![Vec::new(); k_rungs];
    let mut draws = Draws::new(target.dim());
    let (mut accepted, mut swaps_tried) = (0usize, 0usize);
    let start_scored = pot.evaluations();
    let mut its = 0u64;
    loop {
        // Stop before an iteration of average cost would pass the budget (at least one runs).
        if its > 0 {
            let per = (pot.evaluations() - start_scored) as f64 / its as f64;
            if pot.evaluations() as f64 + per > b {
                break;
            }
        }
        let (a, t) = pt_iteration(
            &mut pot,
            &mut ladder,
            iteration,
            false,
            &mut rngs,
            &mut swap_rng,
        );
        accepted += a;
        swaps_tried += t;
        for k in 0..k_rungs {
            deltas[k].push(ladder.states[k].delta(lz));
        }
        draws.push(target, &ladder.states[k_rungs - 1].z, 0.0);
        iteration += 1;
        its += 1;
    }
    let estimate = |from: usize, to: usize| -> f64 {
        let mut total = lz;
        for k in 1..k_rungs {
            let db = ladder.betas[k] - ladder.betas[k - 1];
            let v: Vec<f64> = deltas[k - 1][from..to].iter().map(|d| -db * d).collect();
            total += log_mean_exp(&v);
        }
        total
    };
    let n = deltas[0].len();
    let log_z = estimate(0, n);
    // Standard error by batch means over 10 consecutive batches.
    let batches = 10;
    let se = if n >= 2 * batches {
        let vals: Vec<f64> = (0..batches)
            .map(|i| estimate(i * n / batches, (i + 1) * n / batches))
            .collect();
        let m = vals.iter().sum::<f64>() / batches as f64;
        let v = vals.iter().map(|x| (x - m) * (x - m)).sum::<f64>() / (batches - 1) as f64;
        sqrt(v / batches as f64)
    } else {
        f64::NAN
    };
    BaselineRun {
        log_z,
        log_z_se: se,
        evaluations: pot.evaluations(),
        tuning: format!(
            "{k_rungs} rungs at β = {}; {n} scored iterations; swap acceptance {:.2}",
            ladder
                .betas
                .iter()
                .map(|b| format!("{b:.3}"))
                .collect::<Vec<_>>()
                .join(" "),
            accepted as f64 / swaps_tried.max(1) as f64
        ),
        draws,
    }
}
