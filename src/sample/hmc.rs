//! Hamiltonian integrators on a potential with an identity metric.
//!
//! Owns: the leapfrog integrator, the multinomial No-U-Turn sampler (Hoffman & Gelman 2014,
//! "The No-U-Turn Sampler", JMLR 15, 1593; in the multinomial form of Betancourt 2017, "A
//! conceptual introduction to Hamiltonian Monte Carlo", arXiv:1701.02434, with the extra
//! U-turn checks across merged sub-trees), static HMC with a jittered path length, and
//! step-size adaptation by dual averaging (Hoffman & Gelman 2014, section 3.2).
//! The caller whitens coordinates, so a dense metric is a linear change of variables done
//! outside; here the metric is the identity.
//! Must not: know what the potential means (tempering, bases, targets).

use crate::common::maths::{exp, ln, log_add_exp, sqrt};
use crate::common::rng::Stream;

/// A potential energy U(q) with its gradient. Non-finite values mean zero density.
pub trait Potential {
    fn dim(&self) -> usize;
    fn value_grad(&mut self, q: &[f64], grad: &mut [f64]) -> f64;
}

/// A point of the chain: position, potential, gradient.
#[derive(Clone, Debug)]
pub struct Point {
    pub q: Vec<f64>,
    pub u: f64,
    pub g: Vec<f64>,
}

impl Point {
    pub fn at<P: Potential>(pot: &mut P, q: Vec<f64>) -> Point {
        let mut g = vec![0.0; q.len()];
        let u = pot.value_grad(&q, &mut g);
        Point { q, u, g }
    }
}

/// What one transition did.
#[derive(Clone, Copy, Debug, Default)]
pub struct Transition {
    /// Mean Metropolis acceptance over the trajectory (the adaptation statistic).
    pub accept: f64,
    pub divergent: bool,
    pub leapfrogs: usize,
    pub depth: usize,
}

/// Energy error beyond which a trajectory counts as divergent.
const MAX_DELTA_H: f64 = 1000.0;

struct State {
    q: Vec<f64>,
    p: Vec<f64>,
    g: Vec<f64>,
    u: f64,
}

fn leapfrog<P: Potential>(pot: &mut P, s: &mut State, eps: f64) {
    let n = s.q.len();
    for i in 0..n {
        s.p[i] -= 0.5 * eps * s.g[i];
    }
    for i in 0..n {
        s.q[i] += eps * s.p[i];
    }
    s.u = pot.value_grad(&s.q, &mut s.g);
    if s.g.iter().any(|v| !v.is_finite()) {
        s.u = f64::INFINITY;
    }
    for i in 0..n {
        s.p[i] -= 0.5 * eps * s.g[i];
    }
}

fn kinetic(p: &[f64]) -> f64 {
    0.5 * p.iter().map(|v| v * v).sum::<f64>()
}

fn dot(a: &[f64], b: &[f64]) -> f64 {
    a.iter().zip(b).map(|(x, y)| x * y).sum()
}

fn no_u_turn(p_minus: &[f64], p_plus: &[f64], rho: &[f64]) -> bool {
    dot(p_plus, rho) > 0.0 && dot(p_minus, rho) > 0.0
}

struct Nuts<'a, P: Potential> {
    pot: &'a mut P,
    rng: &'a mut Stream,
    eps: f64,
    h0: f64,
    leapfrogs: usize,
    sum_accept: f64,
    divergent: bool,
}

/// A proposal kept while building a tree.
#[derive(Clone)]
struct Proposal {
    q: Vec<f64>,
    u: f64,
    g: Vec<f64>,
}

impl<'a, P: Potential> Nuts<'a, P> {
    /// Builds a sub-tree of 2^depth leapfrog steps continuing from `z` in direction `sign`.
    /// Returns false if it diverged or made a U-turn. Updates the proposal, the running sums of
    /// momenta and weights, and the first and last momenta of the sub-tree.
    #[allow(clippy::too_many_arguments)]
    fn build(
        &mut self,
        z: &mut State,
        depth: usize,
        sign: f64,
        proposal: &mut Proposal,
        p_beg: &mut Vec<f64>,
        p_end: &mut Vec<f64>,
        rho: &mut [f64],
        log_w: &mut f64,
    ) -> bool {
        if depth == 0 {
            leapfrog(self.pot, z, sign * self.eps);
            self.leapfrogs += 1;
            let mut h = z.u + kinetic(&z.p);
            if h.is_nan() {
                h = f64::INFINITY;
            }
            if h - self.h0 > MAX_DELTA_H {
                self.divergent = true;
            }
            let lw = self.h0 - h;
            *log_w = log_add_exp(*log_w, lw);
            self.sum_accept += if lw > 0.0 { 1.0 } else { exp(lw) };
            proposal.q.copy_from_slice(&z.q);
            proposal.u = z.u;
            proposal.g.copy_from_slice(&z.g);
            p_beg.copy_from_slice(&z.p);
            p_end.copy_from_slice(&z.p);
            for (r, p) in rho.iter_mut().zip(&z.p) {
                *r += p;
            }
            return !self.divergent;
        }
        let n = z.q.len();
        let mut log_w_init = f64::NEG_INFINITY;
        let mut p_init_end = vec![0.0; n];
        let mut rho_init = vec![0.0; n];
        if !self.build(
            z,
            depth - 1,
            sign,
            proposal,
            p_beg,
            &mut p_init_end,
            &mut rho_init,
            &mut log_w_init,
        ) {
            return false;
        }
        let mut proposal_final = proposal.clone();
        let mut log_w_final = f64::NEG_INFINITY;
        let mut p_final_beg = vec![0.0; n];
        let mut rho_final = vec![0.0; n];
        if !self.build(
            z,
            depth - 1,
            sign,
            &mut proposal_final,
            &mut p_final_beg,
            p_end,
            &mut rho_final,
            &mut log_w_final,
        ) {
            return false;
        }
        let log_w_sub = log_add_exp(log_w_init, log_w_final);
        *log_w = log_add_exp(*log_w, log_w_sub);
        if log_w_final > log_w_sub || self.rng.uniform() < exp(log_w_final - log_w_sub) {
            *proposal = proposal_final;
        }
        let rho_sub: Vec<f64> = rho_init
            .iter()
            .zip(&rho_final)
            .map(|(a, b)| a + b)
            .collect();
        for (r, s) in rho.iter_mut().zip(&rho_sub) {
            *r += s;
        }
        let mut persist = no_u_turn(p_beg, p_end, &rho_sub);
        let ext: Vec<f64> = rho_init
            .iter()
            .zip(&p_final_beg)
            .map(|(a, b)| a + b)
            .collect();
        persist &= no_u_turn(p_beg, &p_final_beg, &ext);
        let ext: Vec<f64> = rho_final
            .iter()
            .zip(&p_init_end)
            .map(|(a, b)| a + b)
            .collect();
        persist &= no_u_turn(&p_init_end, p_end, &ext);
        persist
    }
}

/// One multinomial NUTS transition from `point` (updated in place).
pub fn nuts<P: Potential>(
    pot: &mut P,
    point: &mut Point,
    eps: f64,
    max_depth: usize,
    rng: &mut Stream,
) -> Transition {
    let n = point.q.len();
    let p0: Vec<f64> = (0..n).map(|_| rng.normal()).collect();
    let h0 = point.u + kinetic(&p0);
    let mut fwd = State {
        q: point.q.clone(),
        p: p0.clone(),
        g: point.g.clone(),
        u: point.u,
    };
    let mut bck = State {
        q: point.q.clone(),
        p: p0.clone(),
        g: point.g.clone(),
        u: point.u,
    };
    let mut sample = Proposal {
        q: point.q.clone(),
        u: point.u,
        g: point.g.clone(),
    };
    let mut rho = p0.clone();
    let mut log_w = 0.0;
    // First and last momenta of the backward and forward halves of the whole tree.
    let (mut p_bck_bck, mut p_bck_fwd) = (p0.clone(), p0.clone());
    let (mut p_fwd_bck, mut p_fwd_fwd) = (p0.clone(), p0.clone());
    let mut nuts = Nuts {
        pot,
        rng,
        eps,
        h0,
        leapfrogs: 0,
        sum_accept: 0.0,
        divergent: false,
    };
    let mut depth = 0;
    while depth < max_depth {
        let mut proposal = sample.clone();
        let mut log_w_sub = f64::NEG_INFINITY;
        let mut rho_fwd = vec![0.0; n];
        let mut rho_bck = vec![0.0; n];
        let valid = if nuts.rng.uniform() > 0.5 {
            // Extend forwards: the old tree becomes the backward half.
            rho_bck.copy_from_slice(&rho);
            p_bck_fwd.copy_from_slice(&p_fwd_fwd);
            nuts.build(
                &mut fwd,
                depth,
                1.0,
                &mut proposal,
                &mut p_fwd_bck,
                &mut p_fwd_fwd,
                &mut rho_fwd,
                &mut log_w_sub,
            )
        } else {
            rho_fwd.copy_from_slice(&rho);
            p_fwd_bck.copy_from_slice(&p_bck_bck);
            nuts.build(
                &mut bck,
                depth,
                -1.0,
                &mut proposal,
                &mut p_bck_fwd,
                &mut p_bck_bck,
                &mut rho_bck,
                &mut log_w_sub,
            )
        };
        if !valid {
            break;
        }
        depth += 1;
        if log_w_sub > log_w || nuts.rng.uniform() < exp(log_w_sub - log_w) {
            sample = proposal;
        }
        log_w = log_add_exp(log_w, log_w_sub);
        for i in 0..n {
            rho[i] = rho_bck[i] + rho_fwd[i];
        }
        let mut persist = no_u_turn(&p_bck_bck, &p_fwd_fwd, &rho);
        let ext: Vec<f64> = rho_bck.iter().zip(&p_fwd_bck).map(|(a, b)| a + b).collect();
        persist &= no_u_turn(&p_bck_bck, &p_fwd_bck, &ext);
        let ext: Vec<f64> = rho_fwd.iter().zip(&p_bck_fwd).map(|(a, b)| a + b).collect();
        persist &= no_u_turn(&p_bck_fwd, &p_fwd_fwd, &ext);
        if !persist {
            break;
        }
    }
    let stats = Transition {
        accept: if nuts.leapfrogs > 0 {
            nuts.sum_accept / nuts.leapfrogs as f64
        } else {
            0.0
        },
        divergent: nuts.divergent,
        leapfrogs: nuts.leapfrogs,
        depth,
    };
    point.q = sample.q;
    point.u = sample.u;
    point.g = sample.g;
    stats
}

/// One static HMC transition: `steps` leapfrog steps of a step size jittered by ±10 %, then a
/// Metropolis accept or reject.
pub fn static_hmc<P: Potential>(
    pot: &mut P,
    point: &mut Point,
    eps: f64,
    steps: usize,
    rng: &mut Stream,
) -> Transition {
    let n = point.q.len();
    let p0: Vec<f64> = (0..n).map(|_| rng.normal()).collect();
    let h0 = point.u + kinetic(&p0);
    let eps = eps * (0.9 + 0.2 * rng.uniform());
    let mut s = State {
        q: point.q.clone(),
        p: p0,
        g: point.g.clone(),
        u: point.u,
    };
    let mut divergent = false;
    let mut done = 0;
    for _ in 0..steps.max(1) {
        leapfrog(pot, &mut s, eps);
        done += 1;
        if !(s.u + kinetic(&s.p) - h0 <= MAX_DELTA_H) {
            divergent = true;
            break;
        }
    }
    let h = s.u + kinetic(&s.p);
    let log_a = if divergent || h.is_nan() {
        f64::NEG_INFINITY
    } else {
        h0 - h
    };
    let accept = if log_a > 0.0 { 1.0 } else { exp(log_a) };
    if rng.uniform() < accept {
        point.q = s.q;
        point.u = s.u;
        point.g = s.g;
    }
    Transition {
        accept,
        divergent,
        leapfrogs: done,
        depth: 0,
    }
}

/// Dual averaging of the log step size towards a target acceptance
/// (Hoffman & Gelman 2014, algorithm 5; γ = 0.05, t0 = 10, κ = 0.75).
#[derive(Clone, Debug)]
pub struct DualAveraging {
    mu: f64,
    target: f64,
    h_bar: f64,
    log_eps_bar: f64,
    t: f64,
    pub log_eps: f64,
}

impl DualAveraging {
    pub fn new(eps0: f64, target: f64) -> DualAveraging {
        DualAveraging {
            mu: ln(10.0 * eps0),
            target,
            h_bar: 0.0,
            log_eps_bar: ln(eps0),
            t: 0.0,
            log_eps: ln(eps0),
        }
    }
    /// Records one transition's acceptance; returns the next step size to use.
    pub fn update(&mut self, accept: f64) -> f64 {
        let (gamma, t0, kappa) = (0.05, 10.0, 0.75);
        self.t += 1.0;
        let w = 1.0 / (self.t + t0);
        let a = if accept.is_finite() {
            accept.clamp(0.0, 1.0)
        } else {
            0.0
        };
        self.h_bar = (1.0 - w) * self.h_bar + w * (self.target - a);
        self.log_eps = self.mu - sqrt(self.t) / gamma * self.h_bar;
        let eta = crate::common::maths::pow(self.t, -kappa);
        self.log_eps_bar = eta * self.log_eps + (1.0 - eta) * self.log_eps_bar;
        exp(self.log_eps)
    }
    /// The averaged step size, used once adaptation stops.
    pub fn final_eps(&self) -> f64 {
        exp(self.log_eps_bar)
    }
}

/// A step size at which one leapfrog step has acceptance near 1/2 (Hoffman & Gelman 2014,
/// algorithm 4), starting from `eps`.
pub fn initial_step_size<P: Potential>(
    pot: &mut P,
    point: &Point,
    mut eps: f64,
    rng: &mut Stream,
) -> f64 {
    let n = point.q.len();
    let p0: Vec<f64> = (0..n).map(|_| rng.normal()).collect();
    let h0 = point.u + kinetic(&p0);
    let log_accept = |pot: &mut P, eps: f64| {
        let mut s = State {
            q: point.q.clone(),
            p: p0.clone(),
            g: point.g.clone(),
            u: point.u,
        };
        leapfrog(pot, &mut s, eps);
        let h = s.u + kinetic(&s.p);
        if h.is_finite() {
            h0 - h
        } else {
            f64::NEG_INFINITY
        }
    };
    let la = log_accept(pot, eps);
    let up = la > ln(0.5);
    for _ in 0..60 {
        let la = log_accept(pot, eps);
        if up && la <= ln(0.5) {
            break;
        }
        if !up && la > ln(0.5) {
            break;
        }
        eps = if up { eps * 2.0 } else { eps * 0.5 };
        if !(1e-10..=1e3).contains(&eps) {
            break;
        }
    }
    eps.clamp(1e-10, 1e3)
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::common::rng::Purpose;

    /// U(q) = ½ Σ q_i² / s_i²: a normal with standard deviations s.
    struct Normal(Vec<f64>);
    impl Potential for Normal {
        fn dim(&self) -> usize {
            self.0.len()
        }
        fn value_grad(&mut self, q: &[f64], g: &mut [f64]) -> f64 {
            let mut u = 0.0;
            for i in 0..q.len() {
                let s2 = self.0[i] * self.0[i];
                u += 0.5 * q[i] * q[i] / s2;
                g[i] = q[i] / s2;
            }
            u
        }
    }

    fn moments(use_nuts: bool) -> (Vec<f64>, Vec<f64>, f64) {
        // Exact: mean 0 and variance s² per coordinate.
        let mut pot = Normal(vec![1.0, 2.0, 0.5]);
        let mut rng = Stream::new(3, Purpose::Check, 0);
        let mut pt = Point::at(&mut pot, vec![0.1, -0.2, 0.3]);
        let mut da = DualAveraging::new(0.5, 0.8);
        let mut eps = 0.5;
        let (mut sum, mut sq) = (vec![0.0; 3], vec![0.0; 3]);
        let n = 20_000;
        let mut acc = 0.0;
        for it in 0..(n + 1000) {
            let t = if use_nuts {
                nuts(&mut pot, &mut pt, eps, 10, &mut rng)
            } else {
                static_hmc(&mut pot, &mut pt, eps, 8, &mut rng)
            };
            if it < 1000 {
                eps = da.update(t.accept);
                if it == 999 {
                    eps = da.final_eps();
                }
                continue;
            }
            acc += t.accept;
            for i in 0..3 {
                sum[i] += pt.q[i];
                sq[i] += pt.q[i] * pt.q[i];
            }
        }
        let mean: Vec<f64> = sum.iter().map(|s| s / n as f64).collect();
        let var: Vec<f64> = (0..3)
            .map(|i| sq[i] / n as f64 - mean[i] * mean[i])
            .collect();
        (mean, var, acc / n as f64)
    }

    #[test]
    fn nuts_samples_a_normal_and_adapts_to_the_target_acceptance() {
        let (mean, var, acc) = moments(true);
        let sd = [1.0, 2.0, 0.5];
        for i in 0..3 {
            assert!(mean[i].abs() < 0.05 * sd[i] * 2.0, "mean {mean:?}");
            assert!((var[i] / (sd[i] * sd[i]) - 1.0).abs() < 0.06, "var {var:?}");
        }
        assert!((acc - 0.8).abs() < 0.08, "acceptance {acc}");
    }

    #[test]
    fn static_hmc_samples_a_normal() {
        let (mean, var, _) = moments(false);
        let sd = [1.0, 2.0, 0.5];
        for i in 0..3 {
            assert!(mean[i].abs() < 0.15 * sd[i], "mean {mean:?}");
            assert!((var[i] / (sd[i] * sd[i]) - 1.0).abs() < 0.12, "var {var:?}");
        }
    }
}
