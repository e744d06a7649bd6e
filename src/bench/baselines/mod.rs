//! Baselines for `kiln bench`: the published methods Kiln is measured against, run in Kiln's own
//! engine on the same target, the same base approximation q (the Laplace mixture at the modes,
//! with log ζ) and the same unit of cost (energy evaluations, with or without gradient, as counted
//! by `TargetEval::evaluations`).
//!
//! Owns:
//! - importance sampling from q: `log Z = log ζ + log mean exp(−Δ)` (Δ = E + log ζ − ψ);
//! - annealed importance sampling (Neal 2001, "Annealed importance sampling", Statistics and
//!   Computing 11, 125–139) along the geometric path `π_β ∝ q^{1−β} f^β`, with static HMC
//!   transitions, per-temperature step sizes by dual averaging and a schedule of equal
//!   thermodynamic length learned in warm-up runs;
//! - parallel tempering (replica exchange: Swendsen & Wang 1986, "Replica Monte Carlo simulation
//!   of spin-glasses", Physical Review Letters 57, 2607; Geyer 1991, "Markov chain Monte Carlo
//!   maximum likelihood", Computing Science and Statistics 23, 156) on a β ladder along the same
//!   path, NUTS on every rung above β = 0 and exact draws from q at β = 0, with the
//!   stepping-stone estimator of log Z (Xie, Lewis, Fan, Kuo & Chen 2011, "Improving marginal
//!   likelihood estimation for Bayesian phylogenetic model selection", Systematic Biology 60,
//!   150–160);
//! - plain NUTS at β = 1 (mode masses from the shares of its draws; no log Z).
//!
//! The thermodynamic length `Λ = ∫₀¹ sd_β(Δ) dβ` sets both the AIS schedule and the PT ladder:
//! spacing temperatures so that `Δβ · sd_β(Δ)` is constant minimises the variance of the log
//! weights along a path (Gelman & Meng 1998, "Simulating normalizing constants: from importance
//! sampling to bridge sampling to path sampling", Statistical Science 13, 163–185) and gives
//! equal swap acceptance between neighbouring replicas.
//!
//! Every method moves in the same whitened coordinates as Kiln's chains (z = L q with L Lᵀ the
//! within-mode covariance of the base), with the same dual averaging towards acceptance 0.8, and
//! never lets warm-up draws into its estimate.
//! Must not: change the base, search for modes, or know which benchmark it is in.

//!
//! Files: this one holds what the methods share (draws, the result of a run, the path between
//! the base and the target as a potential, log-mean-exp helpers); `is`, `ais`, `pt` and `nuts`
//! hold one method each.

pub mod ais;
pub mod is;
pub mod nuts;
pub mod pt;

pub use ais::annealed_importance_sampling;
pub use is::importance_sampling;
pub use nuts::plain_nuts;
pub use pt::parallel_tempering;

use crate::common::gaussian::Whitening;
use crate::common::maths::{exp, ln, log_sum_exp, pow, sqrt};
use crate::common::rng::{Purpose, Stream};
use crate::model::target::{Target, TargetEval};
use crate::sample::hmc::initial_step_size;
use crate::sample::hmc::nuts;
use crate::sample::hmc::static_hmc;
use crate::sample::hmc::Transition;
use crate::sample::hmc::{Point, Potential};
use crate::sample::tempering::{Base, Evaluated, Tempered};

/// Target acceptance of every step-size adaptation (Kiln's default).
pub const TARGET_ACCEPT: f64 = 0.8;
/// Maximum NUTS tree depth (Kiln's default).
pub const MAX_DEPTH: usize = 10;
/// Share of the budget spent in warm-up by the MCMC methods (PT, plain NUTS); Kiln's default
/// run is 1000 warm-up and 2000 kept iterations, the same share.
pub const WARMUP_SHARE: f64 = 1.0 / 3.0;
/// Share of the budget spent in AIS warm-up runs (their weights are discarded).
pub const AIS_WARMUP_SHARE: f64 = 0.1;
/// Leapfrog steps of one AIS transition.
pub const AIS_LEAPFROGS: usize = 5;
/// Step-size bins of AIS, equal in β^0.3.
pub const AIS_BINS: usize = 12;
/// Fewest AIS runs in the scored phase.
pub const AIS_MIN_RUNS: usize = 16;
/// PT ladder: first ladder, and the bounds on the number of rungs.
pub const PT_START_RUNGS: usize = 8;
pub const PT_MIN_RUNGS: usize = 4;
pub const PT_MAX_RUNGS: usize = 32;
/// PT keeps at least this many scored iterations when choosing its number of rungs.
pub const PT_MIN_ITERATIONS: f64 = 200.0;
/// Chains of plain NUTS (Kiln's default).
pub const NUTS_CHAINS: usize = 4;
/// β_k = (k/K)^{1/0.3}: evenly spaced quantiles of Beta(0.3, 1), the ladder of Xie et al. 2011.
pub const BETA_POWER: f64 = 1.0 / 0.3;

/// Weighted draws in the user's coordinates (`dim` values per draw) with log weights.
#[derive(Clone, Debug, Default)]
pub struct Draws {
    pub dim: usize,
    pub x: Vec<f64>,
    pub log_w: Vec<f64>,
}

impl Draws {
    fn new(dim: usize) -> Draws {
        Draws {
            dim,
            ..Draws::default()
        }
    }

    fn push(&mut self, target: &Target, z: &[f64], log_w: f64) {
        self.x.extend(target.to_user(z));
        self.log_w.push(log_w);
    }

    pub fn len(&self) -> usize {
        self.log_w.len()
    }

    pub fn is_empty(&self) -> bool {
        self.log_w.is_empty()
    }
}

/// What one baseline run gives.
#[derive(Clone, Debug)]
pub struct BaselineRun {
    /// NaN for a method without a log Z estimate (plain NUTS).
    pub log_z: f64,
    pub log_z_se: f64,
    /// Energy evaluations used (with or without gradient), warm-up included.
    pub evaluations: u64,
    pub draws: Draws,
    /// How the run was tuned (temperatures, runs, rungs, step sizes).
    pub tuning: String,
}

impl BaselineRun {
    /// A run that could not start: no estimate, nothing spent. Kiln's own run fails the same
    /// way on the same base (see `sample::Plan::metric_of`).
    fn without_metric(dim: usize) -> BaselineRun {
        BaselineRun {
            log_z: f64::NAN,
            log_z_se: f64::NAN,
            evaluations: 0,
            draws: Draws::new(dim),
            tuning: "not run: the base's covariance is not positive definite".into(),
        }
    }
}

/// A point on the path with everything needed to move it to another β without evaluating again.
#[derive(Clone, Debug)]
struct State {
    q: Vec<f64>,
    z: Vec<f64>,
    e: f64,
    psi: f64,
    ge: Vec<f64>,
    gpsi: Vec<f64>,
}

/// U_β = (1 − β) ψ + β (E + log ζ): the potential of π_β ∝ q^{1−β} f^β up to a constant.
fn path_value(beta: f64, e: f64, psi: f64, log_zeta: f64) -> f64 {
    let v = if beta >= 1.0 {
        e + log_zeta
    } else if beta <= 0.0 {
        psi
    } else if !e.is_finite() || !psi.is_finite() {
        f64::INFINITY
    } else {
        (1.0 - beta) * psi + beta * (e + log_zeta)
    };
    if v.is_nan() {
        f64::INFINITY
    } else {
        v
    }
}

impl State {
    fn delta(&self, log_zeta: f64) -> f64 {
        let d = self.e + log_zeta - self.psi;
        if d.is_nan() {
            f64::INFINITY
        } else {
            d
        }
    }

    fn point(&self, beta: f64, log_zeta: f64, w: &Whitening) -> Point {
        let d = self.q.len();
        let gz: Vec<f64> = (0..d)
            .map(|i| path_grad(beta, self.ge[i], self.gpsi[i]))
            .collect();
        let mut g = vec![0.0; d];
        w.grad_to_q(&gz, &mut g);
        Point {
            q: self.q.clone(),
            u: path_value(beta, self.e, self.psi, log_zeta),
            g,
        }
    }
}

fn path_grad(beta: f64, ge: f64, gpsi: f64) -> f64 {
    if beta >= 1.0 {
        ge
    } else if beta <= 0.0 {
        gpsi
    } else {
        (1.0 - beta) * gpsi + beta * ge
    }
}

/// The potential U_β in whitened coordinates; remembers every point it evaluated during one
/// transition so that the chosen point's E and ψ come without another evaluation.
struct PathPotential {
    tempered: Tempered,
    w: Whitening,
    log_zeta: f64,
    beta: f64,
    ev: Evaluated,
    z: Vec<f64>,
    gz: Vec<f64>,
    seen: Vec<State>,
    used: usize,
}

impl Potential for PathPotential {
    fn dim(&self) -> usize {
        self.w.dim()
    }
    fn value_grad(&mut self, q: &[f64], grad: &mut [f64]) -> f64 {
        self.w.to_z(q, &mut self.z);
        self.tempered.eval(&self.z, &mut self.ev);
        let d = self.w.dim();
        for i in 0..d {
            self.gz[i] = path_grad(self.beta, self.ev.grad_e[i], self.ev.grad_psi[i]);
        }
        self.w.grad_to_q(&self.gz, grad);
        if self.used == self.seen.len() {
            self.seen.push(State {
                q: q.to_vec(),
                z: self.z.clone(),
                e: self.ev.e,
                psi: self.ev.psi,
                ge: self.ev.grad_e.clone(),
                gpsi: self.ev.grad_psi.clone(),
            });
        } else {
            let s = &mut self.seen[self.used];
            s.q.copy_from_slice(q);
            s.z.copy_from_slice(&self.z);
            s.e = self.ev.e;
            s.psi = self.ev.psi;
            s.ge.copy_from_slice(&self.ev.grad_e);
            s.gpsi.copy_from_slice(&self.ev.grad_psi);
        }
        self.used += 1;
        path_value(self.beta, self.ev.e, self.ev.psi, self.log_zeta)
    }
}

#[derive(Clone, Copy)]
enum Move {
    Nuts,
    Hmc(usize),
}

impl PathPotential {
    /// `None` when the base has no whitening (see [`BaselineRun::without_metric`]).
    fn new(target: &Target, base: &Base) -> Option<PathPotential> {
        let tempered = Tempered::new(target.evaluator(), base.clone());
        let d = target.dim();
        let ev = tempered.new_evaluated();
        Some(PathPotential {
            w: Whitening::new(&base.q)?,
            log_zeta: base.log_zeta,
            beta: 1.0,
            ev,
            z: vec![0.0; d],
            gz: vec![0.0; d],
            seen: Vec::new(),
            used: 0,
            tempered,
        })
    }

    fn evaluations(&self) -> u64 {
        self.tempered.target.evaluations
    }

    /// An exact draw from q, evaluated with gradients (one evaluation).
    fn draw_base(&mut self, rng: &mut Stream) -> State {
        let d = self.w.dim();
        let mut z = vec![0.0; d];
        self.tempered.draw_base(rng, &mut z);
        let q = self.w.to_q(&z);
        self.state_at(q)
    }

    fn state_at(&mut self, q: Vec<f64>) -> State {
        let mut g = vec![0.0; q.len()];
        self.used = 0;
        self.value_grad(&q, &mut g);
        self.seen[0].clone()
    }

    /// One NUTS or static HMC transition of `cur` at the potential's β.
    fn transition(&mut self, cur: &mut State, eps: f64, how: Move, rng: &mut Stream) -> Transition {
        let mut point = cur.point(self.beta, self.log_zeta, &self.w);
        self.used = 0;
        let t = match how {
            Move::Nuts => nuts(self, &mut point, eps, MAX_DEPTH, rng),
            Move::Hmc(steps) => static_hmc(self, &mut point, eps, steps, rng),
        };
        if let Some(s) = self.seen[..self.used].iter().rev().find(|s| s.q == point.q) {
            cur.clone_from(s);
        }
        t
    }

    /// A starting step size at `cur` for the current β (Hoffman & Gelman's heuristic).
    fn first_step_size(&mut self, cur: &State, rng: &mut Stream) -> f64 {
        let point = cur.point(self.beta, self.log_zeta, &self.w);
        if !point.u.is_finite() {
            return 0.5;
        }
        self.used = 0;
        initial_step_size(self, &point, 0.5, rng)
    }
}

fn stream(seed: u64, method: u64, index: u64) -> Stream {
    // Purpose::Check streams above 2^40 are used by nothing else in Kiln.
    Stream::new(seed, Purpose::Check, (1 << 40) | (method << 32) | index)
}

/// log mean exp of `v`.
fn log_mean_exp(v: &[f64]) -> f64 {
    if v.is_empty() {
        return f64::NAN;
    }
    log_sum_exp(v) - ln(v.len() as f64)
}

/// Delta-method standard error of log mean(w) from log weights.
fn log_mean_se(lw: &[f64]) -> f64 {
    let n = lw.len() as f64;
    let lse = log_sum_exp(lw);
    if !lse.is_finite() || n < 2.0 {
        return f64::NAN;
    }
    let sum_sq: f64 = lw.iter().map(|l| exp(2.0 * (l - lse))).sum();
    sqrt((sum_sq * n - 1.0).max(0.0) / (n - 1.0))
}

// ---------------------------------------------------------------------------------------------
// Thermodynamic length.

/// Cumulative thermodynamic length on a grid of β values with the sd of Δ at each (trapezoid).
fn cumulative_length(betas: &[f64], sds: &[f64]) -> Vec<f64> {
    let mut lam = vec![0.0; betas.len()];
    for k in 1..betas.len() {
        lam[k] = lam[k - 1] + 0.5 * (sds[k] + sds[k - 1]) * (betas[k] - betas[k - 1]);
    }
    lam
}

/// `n + 1` temperatures from 0 to 1 of equal thermodynamic length (linear interpolation of the
/// cumulative length between grid points); evenly spaced when the length is zero.
fn equal_length_schedule(betas: &[f64], lam: &[f64], n: usize) -> Vec<f64> {
    let n = n.max(1);
    let total = *lam.last().unwrap_or(&0.0);
    if !(total > 1e-12) || !total.is_finite() {
        return (0..=n).map(|t| t as f64 / n as f64).collect();
    }
    let mut out = Vec::with_capacity(n + 1);
    out.push(0.0);
    let mut k = 1;
    for t in 1..n {
        let want = total * t as f64 / n as f64;
        while k + 1 < lam.len() && lam[k] < want {
            k += 1;
        }
        let (l0, l1) = (lam[k - 1], lam[k]);
        let f = if l1 > l0 {
            (want - l0) / (l1 - l0)
        } else {
            0.0
        };
        let b = betas[k - 1] + f * (betas[k] - betas[k - 1]);
        out.push(b.max(*out.last().unwrap_or(&0.0)));
    }
    out.push(1.0);
    out
}

fn power_schedule(n: usize) -> Vec<f64> {
    (0..=n)
        .map(|t| pow(t as f64 / n as f64, BETA_POWER))
        .collect()
}

/// Running mean and variance (Welford).
#[derive(Clone, Copy, Debug, Default)]
struct Moments {
    n: f64,
    mean: f64,
    m2: f64,
}

impl Moments {
    fn add(&mut self, x: f64) {
        if !x.is_finite() {
            return;
        }
        self.n += 1.0;
        let d = x - self.mean;
        self.mean += d / self.n;
        self.m2 += d * (x - self.mean);
    }
    fn sd(&self) -> Option<f64> {
        (self.n >= 2.0).then(|| sqrt(self.m2 / (self.n - 1.0)))
    }
}

// ---------------------------------------------------------------------------------------------
// Annealed importance sampling.

fn ais_bin(beta: f64) -> usize {
    ((pow(beta.max(0.0), 1.0 / BETA_POWER) * AIS_BINS as f64) as usize).min(AIS_BINS - 1)
}

fn ais_bin_edges() -> Vec<f64> {
    (0..=AIS_BINS)
        .map(|b| pow(b as f64 / AIS_BINS as f64, BETA_POWER))
        .collect()
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::common::gaussian::Mixture;

    #[test]
    fn whitening_round_trips() {
        let g =
            crate::common::gaussian::Gaussian::new(&[0.0, 0.0], &[vec![2.0, 0.6], vec![0.6, 1.0]])
                .unwrap();
        let w = Whitening::new(&Mixture::new(vec![g], &[1.0])).unwrap();
        let z = [0.7, -1.3];
        let q = w.to_q(&z);
        let mut back = [0.0; 2];
        w.to_z(&q, &mut back);
        assert!((back[0] - z[0]).abs() < 1e-12 && (back[1] - z[1]).abs() < 1e-12);
    }

    #[test]
    fn equal_length_schedule_follows_the_length() {
        // sd = 1 on [0, 0.5], 3 on [0.5, 1]: a quarter of the length lies below β = 0.5.
        let betas = [0.0, 0.5, 0.5 + 1e-12, 1.0];
        let sds = [1.0, 1.0, 3.0, 3.0];
        let lam = cumulative_length(&betas, &sds);
        let s = equal_length_schedule(&betas, &lam, 4);
        assert_eq!(s.len(), 5);
        assert!((s[1] - 0.5).abs() < 1e-9, "{s:?}");
        assert!((s[2] - (0.5 + 1.0 / 6.0)).abs() < 1e-9, "{s:?}");
        assert_eq!(s[4], 1.0);
        // No length: evenly spaced.
        let flat = equal_length_schedule(&[0.0, 1.0], &[0.0, 0.0], 4);
        assert_eq!(flat, vec![0.0, 0.25, 0.5, 0.75, 1.0]);
    }
}
