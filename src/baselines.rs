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

use crate::gaussian::{cholesky, Mixture};
use crate::hmc::{
    initial_step_size, nuts, static_hmc, DualAveraging, Point, Potential, Transition,
};
use crate::maths::{exp, ln, log_sum_exp, pow, sqrt};
use crate::rng::{Purpose, Stream};
use crate::target::{Target, TargetEval};
use crate::tempering::{Base, Evaluated, Tempered};

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
pub struct Outcome {
    /// NaN for a method without a log Z estimate (plain NUTS).
    pub log_z: f64,
    pub log_z_se: f64,
    /// Energy evaluations used (with or without gradient), warm-up included.
    pub evaluations: u64,
    pub draws: Draws,
    /// How the run was tuned (temperatures, runs, rungs, step sizes).
    pub tuning: String,
}

/// Whitening by the base's within-mode covariance Σ_k w_k Σ_k: z = L q.
#[derive(Clone, Debug)]
pub struct Whitening {
    d: usize,
    l: Vec<f64>,
}

impl Whitening {
    pub fn new(q: &Mixture) -> Whitening {
        let d = q.dim;
        let w = q.weights();
        let mut c = vec![0.0; d * d];
        for (k, comp) in q.components.iter().enumerate() {
            let s = comp.scale_matrix();
            for ij in 0..d * d {
                c[ij] += w[k] * s[ij];
            }
        }
        let l = cholesky(&c, d).unwrap_or_else(|| {
            let mut eye = vec![0.0; d * d];
            for i in 0..d {
                eye[i * d + i] = 1.0;
            }
            eye
        });
        Whitening { d, l }
    }

    /// z = L q.
    fn to_z(&self, q: &[f64], z: &mut [f64]) {
        let d = self.d;
        for i in 0..d {
            z[i] = (0..=i).map(|k| self.l[i * d + k] * q[k]).sum();
        }
    }

    /// q = L⁻¹ z (forward substitution).
    fn to_q(&self, z: &[f64]) -> Vec<f64> {
        let d = self.d;
        let mut q = vec![0.0; d];
        for i in 0..d {
            let mut s = z[i];
            for k in 0..i {
                s -= self.l[i * d + k] * q[k];
            }
            q[i] = s / self.l[i * d + i];
        }
        q
    }

    /// ∂U/∂q = Lᵀ ∂U/∂z.
    fn grad_to_q(&self, gz: &[f64], gq: &mut [f64]) {
        let d = self.d;
        for k in 0..d {
            gq[k] = (k..d).map(|i| self.l[i * d + k] * gz[i]).sum();
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
        self.w.d
    }
    fn value_grad(&mut self, q: &[f64], grad: &mut [f64]) -> f64 {
        self.w.to_z(q, &mut self.z);
        self.tempered.eval(&self.z, &mut self.ev);
        let d = self.w.d;
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
    fn new(target: &Target, base: &Base) -> PathPotential {
        let tempered = Tempered::new(target.evaluator(), base.clone());
        let d = target.dim();
        let ev = tempered.new_evaluated();
        PathPotential {
            w: Whitening::new(&base.q),
            log_zeta: base.log_zeta,
            beta: 1.0,
            ev,
            z: vec![0.0; d],
            gz: vec![0.0; d],
            seen: Vec::new(),
            used: 0,
            tempered,
        }
    }

    fn evaluations(&self) -> u64 {
        self.tempered.target.evaluations
    }

    /// An exact draw from q, evaluated with gradients (one evaluation).
    fn draw_base(&mut self, rng: &mut Stream) -> State {
        let d = self.w.d;
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
// Importance sampling.

/// Importance sampling from the base: `budget` draws, one energy evaluation each.
pub fn importance_sampling(target: &Target, base: &Base, budget: u64, seed: u64) -> Outcome {
    let mut tempered = Tempered::new(target.evaluator(), base.clone());
    let mut rng = stream(seed, 1, 0);
    let d = target.dim();
    let mut z = vec![0.0; d];
    let mut draws = Draws::new(d);
    for _ in 0..budget {
        tempered.draw_base(&mut rng, &mut z);
        let (delta, _) = tempered.delta(&z);
        draws.push(target, &z, -delta);
    }
    let log_z = base.log_zeta + log_mean_exp(&draws.log_w);
    Outcome {
        log_z,
        log_z_se: log_mean_se(&draws.log_w),
        evaluations: tempered.target.evaluations,
        tuning: format!("{budget} draws from q"),
        draws,
    }
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
) -> Outcome {
    let mut pot = PathPotential::new(target, base);
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
    Outcome {
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
pub fn parallel_tempering(target: &Target, base: &Base, budget: u64, seed: u64) -> Outcome {
    let mut pot = PathPotential::new(target, base);
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
    Outcome {
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
        self.w.d
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
pub fn plain_nuts(target: &Target, base: &Base, budget: u64, seed: u64) -> Outcome {
    let d = target.dim();
    let mut pot = TargetPotential {
        ev: target.evaluator(),
        w: Whitening::new(&base.q),
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
    Outcome {
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

#[cfg(test)]
mod tests {
    use super::*;

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

    #[test]
    fn whitening_round_trips() {
        let g =
            crate::gaussian::Gaussian::new(&[0.0, 0.0], &[vec![2.0, 0.6], vec![0.6, 1.0]]).unwrap();
        let w = Whitening::new(&Mixture::new(vec![g], &[1.0]));
        let z = [0.7, -1.3];
        let q = w.to_q(&z);
        let mut back = [0.0; 2];
        w.to_z(&q, &mut back);
        assert!((back[0] - z[0]).abs() < 1e-12 && (back[1] - z[1]).abs() < 1e-12);
    }
}
