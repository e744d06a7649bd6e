//! the tempered family between the base q and the target.
//!
//! Owns: `Δ(x) = E(x) + log ζ − ψ(x)` and the joint density
//! `p(x, β) ∝ q(x) exp(−β Δ(x) + g(β))` on β ∈ [0, 1] (uniform prior on β), with the bias
//! `g` piecewise linear on fixed knots (g = 0 is the plain method of the method note). For it:
//! - the normaliser over β, `C(x) = ∫₀¹ exp(−βΔ(x) + g(β)) dβ`, in closed form: on segment j
//!   (knots b_j < b_{j+1}, width w_j, slope s_j, value g_j at b_j),
//!   `∫ = exp(g_j − b_j Δ) · w_j · φ((Δ − s_j) w_j)` with `φ(a) = (1 − e^{−a})/a`;
//! - `p(b | x) = exp(−bΔ + g(b)) / C(x)`, in particular `p(1|x)` and `p(0|x)`, which for g = 0
//!   are `Δ/(e^Δ − 1)` and `Δ/(1 − e^{−Δ})`;
//! - the exact draw of `β | x`: pick a segment by its integral, then invert that segment's
//!   truncated-exponential CDF, `t = −log1p(U · expm1(−r w)) / r`, r = Δ − s_j;
//! - the potentials of the two ways to move (alternating `x | β`, and joint on (x, u) with
//!   β = σ(u)).
//!
//! With the bias, `log Z = log ζ + g(0) − g(1) + log mean p(1|x) − log mean p(0|x)`
//! (see `estimate::log_z`). Everything is evaluated in log space.
//!
//! Must not: run chains or estimate anything.

use crate::common::gaussian::{Mixture, MixtureScratch};
use crate::common::maths::{exp, exp_m1, ln, ln_1p, log_sum_exp, logistic, softplus};
use crate::common::rng::Stream;
use crate::model::target::TargetEval;
use std::sync::Arc;

/// The base: a normalised mixture q in unconstrained coordinates and log ζ ≈ log Z.
#[derive(Clone, Debug)]
pub struct Base {
    pub q: Arc<Mixture>,
    pub log_zeta: f64,
}

/// The bias g(β), piecewise linear on knots from 0 to 1.
#[derive(Clone, Debug, PartialEq)]
pub struct Bias {
    pub knots: Vec<f64>,
    pub values: Vec<f64>,
}

/// log φ(a) = log((1 − e^{−a}) / a), stable for every a (φ(0) = 1).
#[inline]
pub fn log_phi(a: f64) -> f64 {
    if a.abs() < 1e-10 {
        -0.5 * a
    } else if a > 0.0 {
        ln(-exp_m1(-a)) - ln(a)
    } else {
        let b = -a;
        b + ln(-exp_m1(-b)) - ln(b)
    }
}

impl Bias {
    /// g = 0 on `k` equal segments.
    pub fn flat(k: usize) -> Bias {
        let k = k.max(1);
        Bias {
            knots: (0..=k).map(|j| j as f64 / k as f64).collect(),
            values: vec![0.0; k + 1],
        }
    }

    pub fn is_flat(&self) -> bool {
        self.values.iter().all(|v| *v == 0.0)
    }

    /// g(b).
    pub fn at(&self, b: f64) -> f64 {
        let k = self.knots.len() - 1;
        let mut j = 0;
        while j + 1 < k && b > self.knots[j + 1] {
            j += 1;
        }
        let w = self.knots[j + 1] - self.knots[j];
        let t = ((b - self.knots[j]) / w).clamp(0.0, 1.0);
        self.values[j] + t * (self.values[j + 1] - self.values[j])
    }

    /// g′(b) (the slope of the segment holding b).
    pub fn slope(&self, b: f64) -> f64 {
        let k = self.knots.len() - 1;
        let mut j = 0;
        while j + 1 < k && b > self.knots[j + 1] {
            j += 1;
        }
        (self.values[j + 1] - self.values[j]) / (self.knots[j + 1] - self.knots[j])
    }

    /// log of each segment's integral of exp(−βΔ + g(β)); `out` has one entry per segment.
    fn segment_logs(&self, delta: f64, out: &mut [f64]) {
        for j in 0..self.knots.len() - 1 {
            let w = self.knots[j + 1] - self.knots[j];
            let s = (self.values[j + 1] - self.values[j]) / w;
            out[j] = self.values[j] - self.knots[j] * delta + ln(w) + log_phi((delta - s) * w);
        }
    }

    /// log C(x) for a point with the given Δ.
    pub fn log_c(&self, delta: f64, scratch: &mut [f64]) -> f64 {
        if self.knots.len() == 2 && self.is_flat() {
            return log_phi(delta);
        }
        self.segment_logs(delta, scratch);
        log_sum_exp(&scratch[..self.knots.len() - 1])
    }

    /// (log p(1|x), log p(0|x)).
    pub fn log_p1_p0(&self, delta: f64, scratch: &mut [f64]) -> (f64, f64) {
        let lc = self.log_c(delta, scratch);
        let g1 = self.values[self.values.len() - 1];
        (-delta + g1 - lc, self.values[0] - lc)
    }

    /// log p(b_j|x) at every knot, written to `out`.
    pub fn log_p_knots(&self, delta: f64, out: &mut [f64], scratch: &mut [f64]) {
        let lc = self.log_c(delta, scratch);
        for (j, b) in self.knots.iter().enumerate() {
            out[j] = -b * delta + self.values[j] - lc;
        }
    }

    /// An exact draw of β | x.
    pub fn draw_beta(&self, delta: f64, rng: &mut Stream, scratch: &mut [f64]) -> f64 {
        let k = self.knots.len() - 1;
        let mut j = 0;
        if k > 1 {
            self.segment_logs(delta, scratch);
            let total = log_sum_exp(&scratch[..k]);
            let u = rng.uniform();
            let mut acc = 0.0;
            j = k - 1;
            for (i, l) in scratch[..k].iter().enumerate() {
                acc += exp(l - total);
                if u < acc {
                    j = i;
                    break;
                }
            }
        }
        let w = self.knots[j + 1] - self.knots[j];
        let s = (self.values[j + 1] - self.values[j]) / w;
        let r = delta - s;
        let u = rng.uniform();
        let t = truncated_exponential(r, w, u);
        (self.knots[j] + t).clamp(self.knots[j], self.knots[j + 1])
    }
}

/// Inverse CDF of the density ∝ exp(−r t) on [0, w], at u ∈ (0, 1).
pub fn truncated_exponential(r: f64, w: f64, u: f64) -> f64 {
    let a = r * w;
    if a.abs() < 1e-12 {
        return u * w;
    }
    if a > 0.0 {
        -ln_1p(u * exp_m1(-a)) / r
    } else {
        // Rising density: mirror, t = w − t′ with t′ ∝ exp(−|r| t′).
        let rp = -r;
        w + ln_1p((1.0 - u) * exp_m1(-rp * w)) / rp
    }
}

/// Evaluates E, ψ and Δ (and gradients) at a point; owns the scratch memory.
#[derive(Clone)]
pub struct Tempered {
    pub target: TargetEval,
    pub base: Base,
    scratch: MixtureScratch,
    pub gradient_evaluations: u64,
}

/// E, ψ, Δ at a point, with the gradients ∇E and ∇ψ.
#[derive(Clone, Debug)]
pub struct Evaluated {
    pub e: f64,
    pub psi: f64,
    pub delta: f64,
    pub grad_e: Vec<f64>,
    pub grad_psi: Vec<f64>,
}

impl Tempered {
    pub fn new(target: TargetEval, base: Base) -> Tempered {
        let scratch = base.q.scratch();
        Tempered {
            target,
            base,
            scratch,
            gradient_evaluations: 0,
        }
    }

    pub fn dim(&self) -> usize {
        self.target.dim()
    }

    /// E, ψ = −log q and Δ with gradients, written to `out`.
    pub fn eval(&mut self, z: &[f64], out: &mut Evaluated) {
        self.gradient_evaluations += 1;
        out.e = self.target.energy_grad(z, &mut out.grad_e);
        let lq = self
            .base
            .q
            .log_density_grad(z, &mut out.grad_psi, &mut self.scratch);
        out.psi = -lq;
        for g in out.grad_psi.iter_mut() {
            *g = -*g;
        }
        out.delta = out.e + self.base.log_zeta - out.psi;
        if out.delta.is_nan() {
            out.delta = f64::INFINITY;
        }
    }

    /// Δ only (no gradient): for independence proposals and checks.
    pub fn delta(&mut self, z: &[f64]) -> (f64, f64) {
        let e = self.target.energy(z);
        let psi = -self.base.q.log_density(z, &mut self.scratch);
        let d = e + self.base.log_zeta - psi;
        (if d.is_nan() { f64::INFINITY } else { d }, e)
    }

    /// Δ and log q (no gradient).
    pub fn delta_log_q(&mut self, z: &[f64]) -> (f64, f64) {
        let e = self.target.energy(z);
        let log_q = self.base.q.log_density(z, &mut self.scratch);
        let d = e + self.base.log_zeta + log_q;
        (if d.is_nan() { f64::INFINITY } else { d }, log_q)
    }

    pub fn draw_base(&mut self, rng: &mut Stream, out: &mut [f64]) {
        let q = self.base.q.clone();
        q.sample(rng, out, &mut self.scratch);
    }

    pub fn new_evaluated(&self) -> Evaluated {
        let d = self.dim();
        Evaluated {
            e: 0.0,
            psi: 0.0,
            delta: 0.0,
            grad_e: vec![0.0; d],
            grad_psi: vec![0.0; d],
        }
    }
}

/// The joint variant's potential terms in u: −log σ(u) − log(1 − σ(u)) = softplus(−u) + softplus(u).
#[inline]
pub fn u_prior_energy(u: f64) -> f64 {
    softplus(-u) + softplus(u)
}

/// β = σ(u).
#[inline]
pub fn beta_of(u: f64) -> f64 {
    logistic(u)
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::common::rng::Purpose;

    #[test]
    fn plain_method_weights_match_the_closed_forms() {
        // With g = 0: p(1|x) = Δ/(e^Δ − 1) and p(0|x) = Δ/(1 − e^{−Δ}) (method note).
        let g = Bias::flat(1);
        let mut s = [0.0; 4];
        for &d in &[-30.0, -2.0, -1e-9, 0.0, 1e-7, 0.5, 3.0, 40.0] {
            let (l1, l0) = g.log_p1_p0(d, &mut s);
            let (p1, p0) = if d == 0.0 {
                (1.0, 1.0)
            } else {
                (d / exp_m1(d), d / -exp_m1(-d))
            };
            assert!((l1 - ln(p1)).abs() < 1e-9, "{d}: {l1} vs {}", ln(p1));
            assert!((l0 - ln(p0)).abs() < 1e-9, "{d}: {l0} vs {}", ln(p0));
        }
        // A piecewise-linear g that is in fact one straight line gives the same C as one segment.
        let line = Bias {
            knots: vec![0.0, 0.3, 1.0],
            values: vec![0.0, 0.6, 2.0],
        };
        let one = Bias {
            knots: vec![0.0, 1.0],
            values: vec![0.0, 2.0],
        };
        for &d in &[-5.0, 0.1, 7.0] {
            assert!((line.log_c(d, &mut s) - one.log_c(d, &mut s)).abs() < 1e-12);
        }
    }

    #[test]
    fn exact_beta_draws_follow_the_conditional() {
        // Compare the empirical CDF of β | x with the exact CDF, ∫₀^b exp(−βΔ + g(β)) dβ / C,
        // computed by fine midpoint integration (a direct identity).
        let g = Bias {
            knots: vec![0.0, 0.25, 0.5, 1.0],
            values: vec![0.0, 1.5, -0.5, 2.0],
        };
        let mut rng = Stream::new(11, Purpose::Check, 0);
        let mut s = [0.0; 8];
        for &d in &[-3.0, 0.0, 2.5, 12.0] {
            let n = 40_000;
            let mut xs: Vec<f64> = (0..n).map(|_| g.draw_beta(d, &mut rng, &mut s)).collect();
            xs.sort_by(|a, b| a.total_cmp(b));
            let lc = g.log_c(d, &mut s);
            let m = 20_000;
            let mut cdf = 0.0;
            let mut worst: f64 = 0.0;
            let mut idx = 0;
            for i in 0..m {
                let b = (i as f64 + 0.5) / m as f64;
                cdf += exp(-b * d + g.at(b) - lc) / m as f64;
                let edge = (i + 1) as f64 / m as f64;
                while idx < n && xs[idx] <= edge {
                    idx += 1;
                }
                worst = worst.max((idx as f64 / n as f64 - cdf).abs());
            }
            assert!(worst < 0.012, "Δ = {d}: Kolmogorov distance {worst}");
            assert!(
                (cdf - 1.0).abs() < 1e-6,
                "C(x) closed form vs quadrature: {cdf}"
            );
        }
    }

    #[test]
    fn truncated_exponential_inverts_its_cdf() {
        for &(r, w) in &[
            (3.0, 1.0),
            (-4.0, 0.5),
            (800.0, 1.0),
            (-800.0, 1.0),
            (1e-14, 0.2),
        ] {
            for &u in &[0.01, 0.3, 0.5, 0.99] {
                let t = truncated_exponential(r, w, u);
                assert!((0.0..=w).contains(&t), "{r} {w} {u} -> {t}");
                // CDF(t) = (1 − e^{−rt}) / (1 − e^{−rw}); check where it is representable.
                if (r * w).abs() < 50.0 && (r * w).abs() > 1e-10 {
                    let cdf = exp_m1(-r * t) / exp_m1(-r * w);
                    assert!((cdf - u).abs() < 1e-9, "{r} {w} {u}: {cdf}");
                }
            }
        }
    }
}
