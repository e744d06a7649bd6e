//! Plain NUTS at β = 1: mode masses from the shares of its draws, no log Z.
//! Must not: temper.

use super::*;
use crate::sample::hmc::{initial_step_size, nuts, DualAveraging};

// ---------------------------------------------------------------------------------------------
// Plain NUTS at β = 1.

/// The target's energy alone, in the base's whitened coordinates.
struct TargetPotential {
    ev: TargetEval,
    w: Whitening,
    z: Vec<f64>,
    gz: Vec<f64>,
}

impl Potential for TargetPotential {
    fn dim(&self) -> usize {
        self.w.dim()
    }
    fn value_grad(&mut self, q: &[f64], grad: &mut [f64]) -> f64 {
        self.w.to_z(q, &mut self.z);
        let e = self.ev.energy_grad(&self.z, &mut self.gz);
        self.w.grad_to_q(&self.gz, grad);
        if e.is_nan() {
            f64::INFINITY
        } else {
            e
        }
    }
}

/// Plain NUTS on the target (β = 1): 4 chains started from draws of q, a third of each chain's
/// share of the budget in warm-up (dual averaging towards 0.8), then kept draws.
pub fn plain_nuts(target: &Target, base: &Base, budget: u64, seed: u64) -> BaselineRun {
    let d = target.dim();
    let Some(w) = Whitening::new(&base.q) else {
        return BaselineRun::without_metric(d);
    };
    let mut pot = TargetPotential {
        ev: target.evaluator(),
        w,
        z: vec![0.0; d],
        gz: vec![0.0; d],
    };
    let share = budget as f64 / NUTS_CHAINS as f64;
    let mut draws = Draws::new(d);
    let mut scratch = base.q.scratch();
    let mut eps_used = Vec::new();
    for c in 0..NUTS_CHAINS {
        let mut rng = stream(seed, 4, c as u64);
        let start = pot.ev.evaluations;
        let mut z = vec![0.0; d];
        base.q.sample(&mut rng, &mut z, &mut scratch);
        let q0 = pot.w.to_q(&z);
        let mut point = Point::at(&mut pot, q0);
        let mut eps = if point.u.is_finite() {
            initial_step_size(&mut pot, &point, 0.5, &mut rng)
        } else {
            0.5
        };
        let mut da = DualAveraging::new(eps, TARGET_ACCEPT);
        while ((pot.ev.evaluations - start) as f64) < WARMUP_SHARE * share {
            let t = nuts(&mut pot, &mut point, eps, MAX_DEPTH, &mut rng);
            eps = da.update(t.accept);
        }
        eps = da.final_eps();
        eps_used.push(eps);
        let kept_start = pot.ev.evaluations;
        let mut n = 0u64;
        loop {
            let used = pot.ev.evaluations - start;
            let per = if n > 0 {
                (pot.ev.evaluations - kept_start) as f64 / n as f64
            } else {
                0.0
            };
            if n > 0 && used as f64 + per > share {
                break;
            }
            nuts(&mut pot, &mut point, eps, MAX_DEPTH, &mut rng);
            let mut zz = vec![0.0; d];
            pot.w.to_z(&point.q, &mut zz);
            draws.push(target, &zz, 0.0);
            n += 1;
        }
    }
    BaselineRun {
        log_z: f64::NAN,
        log_z_se: f64::NAN,
        evaluations: pot.ev.evaluations,
        tuning: format!(
            "{NUTS_CHAINS} chains, {} kept draws, step sizes {}",
            draws.len(),
            eps_used
                .iter()
                .map(|e| format!("{e:.3}"))
                .collect::<Vec<_>>()
                .join(" ")
        ),
        draws,
    }
}
