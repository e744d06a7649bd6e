//! Stage 6c: chains of continuously tempered HMC, warm-up and sampling.
//!
//! Owns: the chain state machine, the warm-up schedule and what is learned in it (step size by
//! dual averaging; the bias g(β) that flattens the β marginal, by the Rao-Blackwellised update
//! of Carlson et al. 2016; the choice among candidate bases on held-out draws; modes found by the
//! chains; how often to make a Hamiltonian move), and the sampling phase in which all of that is
//! frozen, so that the kept draws come from one fixed Markov chain.
//!
//! One iteration (method note, "Two ways to move"):
//! - with probability p (see [`gradient_probability`] and [`TRIAL_WINDOW`]), a Hamiltonian move:
//!   alternating, HMC or NUTS on `x | β` with potential `ψ + βΔ`; joint, HMC or NUTS on (x, u),
//!   β = σ(u), potential `ψ + βΔ − g(β) − log σ(u) − log(1 − σ(u))`;
//! - an independence move, proposing from the defensive mixture q′ of [`heavy_tails`];
//! - the exact draw of `β | x` (in the joint method, only after an iteration without a
//!   Hamiltonian move, as a Gibbs update of u).
//!
//! Coordinates are whitened, z = L q with L L' the within-mode covariance of the base
//! (Σ_k w_k Σ_k), which is the dense metric; the joint variant's u is scaled by the standard
//! deviation of u, its own mass. The joint variant uses the same piecewise-linear g as the
//! alternating one: its gradient in u jumps at the knots, which the leapfrog integrator
//! tolerates (the potential is continuous, so the chain stays exact), and the closed forms of
//! `tempering` stay available for the estimator.
//!
//! Chains are independent between synchronisation points (the ends of warm-up windows), where
//! their records are merged in chain order; results therefore do not depend on how many
//! threads or workers run the chains.
//! Must not: estimate log Z, masses or diagnostics for the report (that is `estimates`).

use crate::approx::Laplace;
use crate::error::KilnError;
use crate::gaussian::{cholesky, Gaussian, Mixture, MixtureScratch};
use crate::hmc::{initial_step_size, nuts, static_hmc, DualAveraging, Point, Potential};
use crate::maths::{exp, ln, log_add_exp, log_sum_exp, logistic, sqrt};
use crate::modes::{mahalanobis2, merge_mode, mode_from, Mode};
use crate::rng::{Purpose, Stream};
use crate::target::Target;
use crate::tempering::{u_prior_energy, Base, Bias, Evaluated, Tempered};
use std::sync::Arc;

/// The two ways to move of the method note.
///
/// Alternating is the default, by measurement (`kiln run --json` at default settings, seeds
/// 1–6, error against the scipy references in tests/reference/; the figure is RMSE × √(energy
/// evaluations), lower is better, alternating vs joint): egg-crate 11.8 vs 6.9, two shells
/// 7.5 vs 10.5, parabolic ridge 4.2 vs 9.6, tilted double well 1.3 vs 1.8, heavy-tailed
/// location 1.3 vs 2.0. Alternating wins on four of five and never loses badly; its exact β
/// draw also removes the mass of u from the tuning.
#[derive(Clone, Copy, Debug, PartialEq, Eq, serde::Serialize)]
#[serde(rename_all = "lowercase")]
pub enum Method {
    Joint,
    Alternating,
}

#[derive(Clone, Copy, Debug, PartialEq, Eq, serde::Serialize)]
#[serde(rename_all = "lowercase")]
pub enum Integrator {
    Nuts,
    Hmc,
}

/// When to refit the base in warm-up.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum RefitPolicy {
    /// When a candidate refit lowers the held-out variance of the log Z series below
    /// [`SWITCH_RATIO`] times the current base's, or the chains found new modes.
    Auto,
    Never,
    /// The best candidate other than the current base, at the first refit point.
    Always,
}

/// Per-mode candidate bases are tried only when at most this share of the target's weight in
/// the warm-up draws lies far from every known mode (the threshold of the report's warning).
pub const MODE_LIKE_FAR: f64 = 0.01;

/// Per-draw variance of the log Z series above which the base counts as poor: the global fit is
/// then taken without the held-out comparison (see `Plan::refit_base`).
pub const POOR_SPREAD: f64 = 1.0;

/// A candidate base replaces the current one when its held-out per-draw variance of the log Z
/// series is below this share of the current base's (a margin against noise in the check and
/// against the cost of restarting the adaptation).
pub const SWITCH_RATIO: f64 = 0.8;
/// Least share of the evaluations that Hamiltonian moves keep once independence moves carry
/// the chains (see [`gradient_probability`]).
pub const MIN_HAMILTONIAN_SHARE: f64 = 0.1;
/// Most draws an EM fit of a candidate base sees in `d` dimensions (a systematic subsample
/// beyond): enough for the components a mode can carry, and a bounded cost.
pub fn max_fit_draws(d: usize) -> usize {
    2000 + 1000 * d
}

/// Share of independence proposals drawn from the heavy-tailed mixture [`heavy_tails`].
pub const DEFENSIVE_SHARE: f64 = 0.1;
/// Degrees of freedom and scale factor of the heavy-tailed proposal components.
pub const HEAVY_NU: f64 = 3.0;
pub const HEAVY_SCALE: f64 = 2.0;

/// The base's components as Student-t components with [`HEAVY_NU`] degrees of freedom and
/// [`HEAVY_SCALE`] times their scale, with the base's weights: the heavy-tailed part of the
/// independence proposal q′ = (1 − ε) q + ε q_heavy, a defensive mixture (Hesterberg 1995,
/// "Weighted average importance sampling and defensive mixture distributions", Technometrics
/// 37, 185). The base q itself stays as fitted (it enters Δ and the estimates); only where the
/// chains propose from changes. Where the target has mass the base lacks (a heavier tail, the
/// far end of a curved ridge, a mode on a bound seen through the log or logit map), proposals
/// from q alone almost never land, and a chain that gets there by a Hamiltonian move stays stuck
/// because f/q is large there; q′ reaches those regions and keeps f/q′ bounded. It costs about
/// ε of the proposals where the target is negligible.
pub fn heavy_tails(q: &Mixture) -> Mixture {
    let comps: Vec<Gaussian> = q
        .components
        .iter()
        .filter_map(|c| {
            let s: Vec<f64> = c
                .scale_matrix()
                .iter()
                .map(|v| v * HEAVY_SCALE * HEAVY_SCALE)
                .collect();
            Gaussian::from_flat(c.mean.clone(), &s, HEAVY_NU)
        })
        .collect();
    if comps.len() != q.components.len() {
        return q.clone();
    }
    Mixture::new(comps, &q.weights())
}

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

#[derive(Clone, Debug)]
pub struct SamplerOptions {
    pub chains: usize,
    pub warmup: usize,
    pub draws: usize,
    pub method: Method,
    pub integrator: Integrator,
    pub target_accept: f64,
    pub seed: u64,
    pub max_depth: usize,
    /// Independence moves from the base after every transition.
    pub independence: bool,
    /// Learn the bias g(β) in warm-up (false: the plain method, g = 0).
    pub learn_bias: bool,
    pub refit: RefitPolicy,
    /// Knots of g: equal segments on [0, 1].
    pub knots: usize,
    /// `Some(b)`: no tempering, β fixed at b (b = 1 is plain HMC on the target).
    pub fixed_beta: Option<f64>,
}

impl SamplerOptions {
    pub fn new(seed: u64) -> SamplerOptions {
        SamplerOptions {
            chains: 4,
            warmup: 1000,
            draws: 2000,
            method: Method::Alternating,
            integrator: Integrator::Nuts,
            target_accept: 0.8,
            seed,
            max_depth: 10,
            independence: true,
            learn_bias: true,
            refit: RefitPolicy::Auto,
            knots: 16,
            fixed_beta: None,
        }
    }
}

/// What all chains share in a phase; changed only at synchronisation points.
#[derive(Clone, Debug)]
pub struct Plan {
    pub base: Base,
    /// The heavy-tailed part of the independence proposal (see [`heavy_tails`]).
    pub heavy: Arc<Mixture>,
    pub bias: Bias,
    /// Whitening: z = L q, row-major lower triangle.
    pub chol: Vec<f64>,
    /// Inverse of `chol`, row-major.
    pub chol_inv: Vec<f64>,
    pub u_scale: f64,
    pub options: SamplerOptions,
    /// Known modes (the optimiser's, and any the chains found).
    pub modes: Vec<Mode>,
    /// The Laplace approximation at the known modes (for assigning draws to modes).
    pub laplace: Laplace,
    pub refitted: bool,
    /// Modes the chains found that the optimiser had not.
    pub new_modes: usize,
    /// Gradient evaluations spent optimising from draws.
    pub discovery_evaluations: u64,
    /// Probability that an iteration makes a Hamiltonian move before the independence move
    /// and the β draw (1 until warm-up has measured the moves; see [`gradient_probability`]).
    pub p_gradient: f64,
    /// Q₊ = the base's mass where the target's density is not zero, and its standard error,
    /// measured from base draws when warm-up ends (see [`Plan::measure_support`]).
    pub support: (f64, f64),
    pub notes: Vec<String>,
}

/// One chain's record of a phase.
#[derive(Clone, Debug, Default, serde::Serialize, serde::Deserialize)]
pub struct Record {
    /// Which chain (0-based).
    pub chain: usize,
    /// The chain's energy evaluations so far (a running total, not per phase).
    pub evaluations: u64,
    /// The step size the chain used in this phase.
    pub eps: f64,
    /// Unconstrained positions, `dim` per iteration.
    pub z: Vec<f64>,
    pub beta: Vec<f64>,
    pub delta: Vec<f64>,
    pub accept: f64,
    pub divergences: usize,
    pub leapfrogs: u64,
    pub max_depth_hits: usize,
    pub independence_accepted: usize,
    pub iterations: usize,
    /// Iterations that made a Hamiltonian move (the others made only the independence move and
    /// the β draw); `accept` is the mean over these.
    #[serde(default)]
    pub transitions: usize,
}

/// A chain: its generator, its evaluator, its position and its step size.
#[derive(Clone)]
pub struct Chain {
    pub index: usize,
    rng: Stream,
    tempered: Tempered,
    /// Current position, unconstrained.
    z: Vec<f64>,
    /// Current β (alternating) or σ(u) (joint).
    beta: f64,
    u: f64,
    delta: f64,
    /// log q(x) − log q′(x) at the current position, q′ the independence proposal.
    log_ratio: f64,
    /// Scratch for the proposal's heavy-tailed part.
    heavy_scratch: MixtureScratch,
    eps: f64,
    adapt: DualAveraging,
    ev: Evaluated,
}

fn lower_inverse(l: &[f64], d: usize) -> Vec<f64> {
    let mut inv = vec![0.0; d * d];
    for col in 0..d {
        for i in 0..d {
            let mut s = if i == col { 1.0 } else { 0.0 };
            for k in 0..i {
                s -= l[i * d + k] * inv[k * d + col];
            }
            inv[i * d + col] = s / l[i * d + i];
        }
    }
    inv
}

/// Within-mode covariance Σ_k w_k Σ_k of the components listed.
fn within_cov(q: &Mixture, skip_last: bool) -> Vec<f64> {
    let d = q.dim;
    let w = q.weights();
    let n = if skip_last && q.components.len() > 1 {
        q.components.len() - 1
    } else {
        q.components.len()
    };
    let total: f64 = w[..n].iter().sum();
    let mut c = vec![0.0; d * d];
    for k in 0..n {
        let s = q.components[k].scale_matrix();
        for ij in 0..d * d {
            c[ij] += w[k] / total * s[ij];
        }
    }
    c
}

impl Plan {
    pub fn new(
        target: &Target,
        modes: Vec<Mode>,
        laplace: Laplace,
        options: SamplerOptions,
    ) -> Result<Plan, KilnError> {
        let base = Base {
            q: Arc::new(laplace.base.clone()),
            log_zeta: laplace.log_zeta,
        };
        let heavy = Arc::new(heavy_tails(&base.q));
        let mut plan = Plan {
            base,
            heavy,
            bias: Bias::flat(options.knots),
            chol: Vec::new(),
            chol_inv: Vec::new(),
            u_scale: 1.8,
            options,
            modes,
            laplace,
            refitted: false,
            new_modes: 0,
            discovery_evaluations: 0,
            p_gradient: 1.0,
            support: (1.0, 0.0),
            notes: Vec::new(),
        };
        plan.set_metric(target.dim(), false)?;
        Ok(plan)
    }

    fn set_metric(&mut self, d: usize, skip_last: bool) -> Result<(), KilnError> {
        let c = within_cov(&self.base.q, skip_last);
        let l = cholesky(&c, d)
            .ok_or_else(|| KilnError::density("the base's covariance is not positive definite"))?;
        self.chol_inv = lower_inverse(&l, d);
        self.chol = l;
        Ok(())
    }

    fn dim(&self) -> usize {
        self.base.q.dim
    }

    /// z = L q
    fn to_z(&self, q: &[f64], z: &mut [f64]) {
        let d = self.dim();
        for i in 0..d {
            z[i] = (0..=i).map(|k| self.chol[i * d + k] * q[k]).sum();
        }
    }

    /// q = L⁻¹ z
    fn to_q(&self, z: &[f64]) -> Vec<f64> {
        let d = self.dim();
        (0..d)
            .map(|i| (0..=i).map(|k| self.chol_inv[i * d + k] * z[k]).sum())
            .collect()
    }

    pub fn is_tempered(&self) -> bool {
        self.options.fixed_beta.is_none()
    }
}

/// The potential a chain moves on, in whitened coordinates.
struct ChainPotential<'a> {
    plan: &'a Plan,
    tempered: &'a mut Tempered,
    ev: &'a mut Evaluated,
    z: Vec<f64>,
    beta: f64,
    joint: bool,
}

impl<'a> Potential for ChainPotential<'a> {
    fn dim(&self) -> usize {
        self.plan.dim() + usize::from(self.joint)
    }
    fn value_grad(&mut self, q: &[f64], grad: &mut [f64]) -> f64 {
        let d = self.plan.dim();
        let mut z = std::mem::take(&mut self.z);
        self.plan.to_z(&q[..d], &mut z);
        self.tempered.eval(&z, self.ev);
        self.z = z;
        let ev = &*self.ev;
        let (beta, u) = if self.joint {
            let u = self.plan.u_scale * q[d];
            (logistic(u), u)
        } else {
            (self.beta, 0.0)
        };
        if beta > 0.0 && !ev.e.is_finite() {
            return f64::INFINITY;
        }
        let e_term = if beta > 0.0 {
            beta * (ev.e + self.plan.base.log_zeta)
        } else {
            0.0
        };
        let mut value = (1.0 - beta) * ev.psi + e_term;
        // ∂U/∂z, then Lᵀ to whitened coordinates.
        let mut gz = vec![0.0; d];
        for i in 0..d {
            gz[i] =
                (1.0 - beta) * ev.grad_psi[i] + if beta > 0.0 { beta * ev.grad_e[i] } else { 0.0 };
        }
        for k in 0..d {
            grad[k] = (k..d).map(|i| self.plan.chol[i * d + k] * gz[i]).sum();
        }
        if self.joint {
            let bias = &self.plan.bias;
            value += -bias.at(beta) + u_prior_energy(u);
            let du = beta * (1.0 - beta) * (ev.delta - bias.slope(beta)) + 2.0 * beta - 1.0;
            grad[d] = self.plan.u_scale * du;
        }
        value
    }
}

impl Chain {
    /// A chain started from a draw of the base.
    pub fn new(index: usize, target: &Target, plan: &Plan) -> Result<Chain, KilnError> {
        let opts = &plan.options;
        let mut rng = Stream::new(opts.seed, Purpose::Chain, index as u64);
        let mut tempered = Tempered::new(target.evaluator(), plan.base.clone());
        let d = target.dim();
        let mut z = vec![0.0; d];
        let mut delta = f64::INFINITY;
        for _ in 0..1000 {
            tempered.draw_base(&mut rng, &mut z);
            delta = tempered.delta(&z).0;
            if delta.is_finite() {
                break;
            }
        }
        if !delta.is_finite() {
            return Err(KilnError::density(
                "the energy is not finite at any of 1000 draws from the approximation around the modes",
            )
            .with_hint("the density may be zero almost everywhere near its modes; check the formula's domain"));
        }
        let beta = match opts.fixed_beta {
            Some(b) => b,
            None => rng.uniform(),
        };
        let u = ln(beta) - ln(1.0 - beta);
        let ev = tempered.new_evaluated();
        let heavy_scratch = plan.heavy.scratch();
        let mut chain = Chain {
            index,
            rng,
            tempered,
            z,
            beta,
            u,
            delta,
            log_ratio: 0.0,
            heavy_scratch,
            eps: 0.5,
            adapt: DualAveraging::new(0.5, opts.target_accept),
            ev,
        };
        chain.refresh(plan);
        Ok(chain)
    }

    /// Recomputes Δ and the proposal's log ratio at the current position.
    fn refresh(&mut self, plan: &Plan) {
        let (delta, log_q) = self.tempered.delta_log_q(&self.z);
        self.delta = delta;
        self.log_ratio = self.proposal_log_ratio(plan, &self.z.clone(), log_q);
    }

    /// log q(x) − log q′(x) for the independence proposal q′ = (1 − ε) q + ε q_heavy.
    fn proposal_log_ratio(&mut self, plan: &Plan, z: &[f64], log_q: f64) -> f64 {
        let log_heavy = plan.heavy.log_density(z, &mut self.heavy_scratch);
        let log_prop = log_add_exp(
            ln(1.0 - DEFENSIVE_SHARE) + log_q,
            ln(DEFENSIVE_SHARE) + log_heavy,
        );
        let r = log_q - log_prop;
        if r.is_nan() {
            f64::NEG_INFINITY
        } else {
            r
        }
    }

    fn joint(plan: &Plan) -> bool {
        plan.options.method == Method::Joint && plan.is_tempered()
    }

    fn position(&self, plan: &Plan) -> Vec<f64> {
        let mut q = plan.to_q(&self.z);
        if Self::joint(plan) {
            q.push(self.u / plan.u_scale);
        }
        q
    }

    /// Restarts step-size adaptation from a fresh initial step size.
    fn restart_adaptation(&mut self, plan: &Plan) {
        let q = self.position(plan);
        let joint = Self::joint(plan);
        let beta = self.beta;
        let mut pot = ChainPotential {
            plan,
            tempered: &mut self.tempered,
            ev: &mut self.ev,
            z: vec![0.0; plan.dim()],
            beta,
            joint,
        };
        let point = Point::at(&mut pot, q);
        let eps = if point.u.is_finite() {
            initial_step_size(&mut pot, &point, 0.5, &mut self.rng)
        } else {
            0.5
        };
        self.eps = eps;
        self.adapt = DualAveraging::new(eps, plan.options.target_accept);
    }

    /// Runs `iterations` transitions; adapts the step size when `adapt`.
    pub fn run(&mut self, plan: &Plan, iterations: usize, adapt: bool) -> Record {
        let d = plan.dim();
        let joint = Self::joint(plan);
        let mut rec = Record {
            iterations,
            chain: self.index,
            ..Record::default()
        };
        rec.z.reserve(iterations * d);
        let mut q = self.position(plan);
        let cheap_moves = plan.is_tempered() && plan.options.independence;
        for _ in 0..iterations {
            // 1. Hamiltonian move (in every iteration, or with probability p_gradient when the
            //    independence move and the β draw can carry the chain on their own).
            let hamiltonian = !cheap_moves || self.rng.uniform() < plan.p_gradient;
            if hamiltonian {
                let beta = self.beta;
                let t = {
                    let mut pot = ChainPotential {
                        plan,
                        tempered: &mut self.tempered,
                        ev: &mut self.ev,
                        z: vec![0.0; d],
                        beta,
                        joint,
                    };
                    let mut point = Point::at(&mut pot, q.clone());
                    let t = match plan.options.integrator {
                        crate::sampler::Integrator::Nuts => nuts(
                            &mut pot,
                            &mut point,
                            self.eps,
                            plan.options.max_depth,
                            &mut self.rng,
                        ),
                        crate::sampler::Integrator::Hmc => {
                            let steps = ((2.0 / self.eps).ceil() as usize).clamp(1, 1024);
                            static_hmc(&mut pot, &mut point, self.eps, steps, &mut self.rng)
                        }
                    };
                    q = point.q;
                    t
                };
                rec.accept += t.accept;
                rec.transitions += 1;
                rec.divergences += usize::from(t.divergent);
                rec.leapfrogs += t.leapfrogs as u64 + 1;
                rec.max_depth_hits += usize::from(t.depth >= plan.options.max_depth);
                if adapt {
                    self.eps = self.adapt.update(t.accept);
                }
                plan.to_z(&q[..d], &mut self.z);
                if joint {
                    self.u = plan.u_scale * q[d];
                    self.beta = logistic(self.u);
                }
                self.refresh(plan);
            }

            if plan.is_tempered() {
                // 2. Independence move: propose x′ from q′ = (1 − ε) q + ε q_heavy (a defensive
                //    mixture, whose heavy tails reach where the target has mass the base lacks),
                //    accept with min(1, [q(x′) e^{−βΔ(x′)}/q′(x′)] / [q(x) e^{−βΔ(x)}/q′(x)]).
                //    With q′ = q this is the method note's min(1, exp(−β(Δ′ − Δ))).
                if plan.options.independence {
                    let mut zp = vec![0.0; d];
                    if self.rng.uniform() < DEFENSIVE_SHARE {
                        plan.heavy
                            .sample(&mut self.rng, &mut zp, &mut self.heavy_scratch);
                    } else {
                        self.tempered.draw_base(&mut self.rng, &mut zp);
                    }
                    let (dp, log_qp) = self.tempered.delta_log_q(&zp);
                    let ratio_p = self.proposal_log_ratio(plan, &zp, log_qp);
                    let log_a =
                        (ratio_p - self.beta * dp) - (self.log_ratio - self.beta * self.delta);
                    if dp.is_finite() && ratio_p.is_finite() && ln(self.rng.uniform()) < log_a {
                        self.z = zp;
                        self.delta = dp;
                        self.log_ratio = ratio_p;
                        rec.independence_accepted += 1;
                        let qz = plan.to_q(&self.z);
                        q[..d].copy_from_slice(&qz);
                    }
                }
                // 3. Exact β | x: always in the alternating method; in the joint method after an
                //    iteration without a Hamiltonian move (a Gibbs update of u = logit β, which
                //    leaves the joint density invariant).
                if !joint || !hamiltonian {
                    let mut s = vec![0.0; plan.bias.knots.len()];
                    self.beta = plan.bias.draw_beta(self.delta, &mut self.rng, &mut s);
                    if joint {
                        self.u = ln(self.beta) - ln(1.0 - self.beta);
                        if self.u.is_finite() {
                            q[d] = self.u / plan.u_scale;
                        } else {
                            // β exactly 0 or 1 has no finite u: keep the previous β.
                            self.u = plan.u_scale * q[d];
                            self.beta = logistic(self.u);
                        }
                    }
                }
            }
            rec.z.extend_from_slice(&self.z);
            rec.beta.push(self.beta);
            rec.delta.push(self.delta);
        }
        if rec.transitions > 0 {
            rec.accept /= rec.transitions as f64;
        }
        rec.evaluations = self.gradient_evaluations();
        rec.eps = self.eps;
        rec
    }

    pub fn step_size(&self) -> f64 {
        self.eps
    }

    pub fn gradient_evaluations(&self) -> u64 {
        self.tempered.target.evaluations
    }

    fn set_base(&mut self, plan: &Plan) {
        self.tempered = Tempered::new(self.tempered.target.clone(), plan.base.clone());
        self.heavy_scratch = plan.heavy.scratch();
        self.refresh(plan);
    }
}

/// Runs every chain for `iterations`, in parallel where the platform has threads.
pub fn run_chains(
    chains: &mut [Chain],
    plan: &Plan,
    iterations: usize,
    adapt: bool,
) -> Vec<Record> {
    #[cfg(not(target_arch = "wasm32"))]
    {
        let threads = std::thread::available_parallelism().map_or(1, |n| n.get());
        if threads > 1 && chains.len() > 1 {
            let mut out: Vec<Option<Record>> = vec![None; chains.len()];
            let per = chains.len().div_ceil(threads);
            std::thread::scope(|s| {
                for (cs, os) in chains.chunks_mut(per).zip(out.chunks_mut(per)) {
                    s.spawn(move || {
                        for (c, o) in cs.iter_mut().zip(os.iter_mut()) {
                            *o = Some(c.run(plan, iterations, adapt));
                        }
                    });
                }
            });
            return out.into_iter().map(|r| r.unwrap_or_default()).collect();
        }
    }
    chains
        .iter_mut()
        .map(|c| c.run(plan, iterations, adapt))
        .collect()
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

/// Pooled log p(b_j | x) averaged over records: log of the Rao-Blackwellised β marginal at the knots.
pub fn log_marginal_at_knots(bias: &Bias, records: &[Record]) -> Vec<f64> {
    let k = bias.knots.len();
    let mut acc = vec![Vec::new(); k];
    let mut s = vec![0.0; k];
    let mut lp = vec![0.0; k];
    for r in records {
        for &delta in &r.delta {
            bias.log_p_knots(delta, &mut lp, &mut s);
            for j in 0..k {
                acc[j].push(lp[j]);
            }
        }
    }
    acc.iter()
        .map(|v| log_sum_exp(v) - ln(v.len().max(1) as f64))
        .collect()
}

/// The log Z estimate of the method note from records made with `bias` and `base`.
pub fn log_z_from(bias: &Bias, base: &Base, records: &[Record]) -> f64 {
    let mut l1 = Vec::new();
    let mut l0 = Vec::new();
    let mut s = vec![0.0; bias.knots.len()];
    for r in records {
        for &delta in &r.delta {
            let (a, b) = bias.log_p1_p0(delta, &mut s);
            l1.push(a);
            l0.push(b);
        }
    }
    let g0 = bias.values[0];
    let g1 = bias.values[bias.values.len() - 1];
    base.log_zeta + g0 - g1 + log_sum_exp(&l1) - log_sum_exp(&l0)
}

/// Variance of z_i = p1_i/mean(p1) − p0_i/mean(p0) over the records (the per-draw noise of
/// the log Z estimate).
pub fn log_z_series_variance(bias: &Bias, records: &[Record]) -> f64 {
    let mut s = vec![0.0; bias.knots.len()];
    let (mut l1, mut l0) = (Vec::new(), Vec::new());
    for r in records {
        for &delta in &r.delta {
            let (a, b) = bias.log_p1_p0(delta, &mut s);
            l1.push(a);
            l0.push(b);
        }
    }
    let n = l1.len() as f64;
    if n == 0.0 {
        return 0.0;
    }
    let (m1, m0) = (log_sum_exp(&l1), log_sum_exp(&l0));
    l1.iter()
        .zip(&l0)
        .map(|(a, b)| exp(a - m1 + ln(n)) - exp(b - m0 + ln(n)))
        .map(|z| z * z)
        .sum::<f64>()
        / n
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
    let mut s = vec![0.0; bias.knots.len()];
    let series: Vec<Vec<(f64, f64)>> = records
        .iter()
        .map(|r| r.delta.iter().map(|&d| bias.log_p1_p0(d, &mut s)).collect())
        .collect();
    let all: Vec<&(f64, f64)> = series.iter().flatten().collect();
    let n = all.len() as f64;
    if n < 4.0 {
        return (0.0, f64::INFINITY);
    }
    let l1: Vec<f64> = all.iter().map(|p| p.0).collect();
    let l0: Vec<f64> = all.iter().map(|p| p.1).collect();
    let (m1, m0) = (log_sum_exp(&l1) - ln(n), log_sum_exp(&l0) - ln(n));
    let zs: Vec<Vec<f64>> = series
        .iter()
        .map(|c| c.iter().map(|p| exp(p.0 - m1) - exp(p.1 - m0)).collect())
        .collect();
    let refs: Vec<&[f64]> = zs.iter().map(|c| c.as_slice()).collect();
    let evaluations: u64 = records
        .iter()
        .map(|r| r.leapfrogs + r.iterations as u64)
        .sum();
    let weight: f64 = l1.iter().map(|a| exp(a - m1)).sum();
    let under: f64 = records
        .iter()
        .flat_map(|r| r.delta.iter())
        .zip(&l1)
        .filter(|(d, _)| **d < -2.0)
        .map(|(_, a)| exp(a - m1))
        .sum();
    (
        crate::estimates::ess(&refs) / evaluations.max(1) as f64,
        // An empty sum is −0.0; print it as 0 the same way on every platform.
        if under > 0.0 { under / weight } else { 0.0 },
    )
}

/// Learning rate of the bias update after warm-up window `w` (counted from the last reset).
fn bias_step(w: usize) -> f64 {
    [1.0, 1.0, 0.8, 0.6, 0.5, 0.4, 0.3][w.min(6)]
}

/// Base draws used to measure the base's mass on the target's support.
pub const SUPPORT_DRAWS: usize = 4000;

impl Plan {
    /// Measures Q₊, the base's mass where the target's density is not zero.
    ///
    /// Where the target is zero (energy NaN or +∞), Δ = ∞: such points have zero marginal
    /// probability in the tempered family, yet they carry the δ-like share Q₋ = 1 − Q₊ of
    /// E[p(0|x)] (p(x) p(0|x) = q(x)/C for every x). A chain can never draw them, so the chain
    /// average of p(0|x) estimates Q₊/C rather than 1/C, and log Z must gain + log Q₊. Q₊ is
    /// the share of finite energies among independent base draws; its binomial standard error
    /// enters the SE of log Z.
    pub fn measure_support(&mut self, target: &Target) {
        let d = self.dim();
        let mut rng = Stream::new(self.options.seed, Purpose::Check, 1);
        let mut ev = target.evaluator();
        let mut scratch = self.base.q.scratch();
        let mut z = vec![0.0; d];
        let mut inside = 0usize;
        let mut drawn = 0usize;
        // A first batch; if any draw falls outside the support, ten times more for precision.
        for batch in [SUPPORT_DRAWS, 9 * SUPPORT_DRAWS] {
            for _ in 0..batch {
                self.base.q.sample(&mut rng, &mut z, &mut scratch);
                if ev.energy(&z).is_finite() {
                    inside += 1;
                }
            }
            drawn += batch;
            if inside == drawn {
                break;
            }
        }
        self.discovery_evaluations += ev.evaluations;
        let n = drawn as f64;
        let q = inside as f64 / n;
        if inside == drawn {
            self.support = (1.0, 0.0);
        } else if inside == 0 {
            self.support = (f64::NAN, f64::NAN);
        } else {
            self.support = (q, sqrt(q * (1.0 - q) / n));
            self.notes.push(format!(
                "{:.1}% of the base approximation lies where the density is zero; log Z includes the correction log Q₊ = {:.4} for it",
                100.0 * (1.0 - q),
                ln(q)
            ));
        }
    }

    /// g ← g − γ log p̂(b), normalised so that g(0) = 0.
    fn update_bias(&mut self, records: &[Record], step: f64) {
        let lm = log_marginal_at_knots(&self.bias, records);
        for j in 0..self.bias.values.len() {
            let upd = if lm[j].is_finite() { lm[j] } else { 30.0 };
            self.bias.values[j] -= step * upd.clamp(-30.0, 30.0);
        }
        let g0 = self.bias.values[0];
        for v in self.bias.values.iter_mut() {
            *v -= g0;
        }
    }

    /// Looks for regions the chains visit near β = 1 that no known mode covers, and
    /// optimises from them. Returns how many new modes were added.
    pub(crate) fn discover_modes(
        &mut self,
        target: &Target,
        records: &[Record],
    ) -> Result<usize, KilnError> {
        let d = self.dim();
        let threshold = 30.0 + 4.0 * d as f64;
        let mut candidates: Vec<(f64, Vec<f64>)> = Vec::new();
        for r in records {
            for (i, &beta) in r.beta.iter().enumerate() {
                if beta < 0.5 {
                    continue;
                }
                let z = &r.z[i * d..(i + 1) * d];
                let near = self
                    .modes
                    .iter()
                    .map(|m| mahalanobis2(z, &m.z, &m.hessian))
                    .fold(f64::INFINITY, f64::min);
                if near > threshold {
                    candidates.push((near, z.to_vec()));
                }
            }
        }
        candidates.sort_by(|a, b| a.0.total_cmp(&b.0));
        let mut ev = target.evaluator();
        let mut added = 0;
        let mut tried: Vec<Vec<f64>> = Vec::new();
        for (_, z) in candidates.into_iter().rev() {
            if tried.len() >= 20 {
                break;
            }
            if tried
                .iter()
                .any(|t| t.iter().zip(&z).all(|(a, b)| (a - b).abs() < 1e-9))
            {
                continue;
            }
            // Skip draws a mode found in this round already covers.
            if self
                .modes
                .iter()
                .any(|m| mahalanobis2(&z, &m.z, &m.hessian) <= threshold)
            {
                continue;
            }
            tried.push(z.clone());
            if let Some(m) = mode_from(target, &mut ev, &z)? {
                if merge_mode(&mut self.modes, m) {
                    added += 1;
                }
            }
        }
        self.discovery_evaluations += ev.evaluations;
        if added > 0 {
            self.laplace = Laplace::from_modes(&self.modes)?;
        }
        Ok(added)
    }

    /// Weighted draws for fitting: every draw of the windows given, weighted by p(1|x) under the
    /// bias it was drawn with, weights normalised within each window (so that each window
    /// counts by its number of draws).
    fn fit_draws(&self, history: &[(Bias, Vec<Record>)]) -> (Vec<Vec<f64>>, Vec<f64>) {
        let d = self.dim();
        let mut points = Vec::new();
        let mut w = Vec::new();
        for (used, records) in history {
            let mut s = vec![0.0; used.knots.len()];
            let mut lw = Vec::new();
            let mut pts = Vec::new();
            for r in records {
                for (i, &delta) in r.delta.iter().enumerate() {
                    let (l1, _) = used.log_p1_p0(delta, &mut s);
                    if l1.is_finite() {
                        pts.push(r.z[i * d..(i + 1) * d].to_vec());
                        lw.push(l1);
                    }
                }
            }
            let m = log_sum_exp(&lw) - ln(lw.len().max(1) as f64);
            w.extend(lw.iter().map(|l| exp(l - m)));
            points.extend(pts);
        }
        let cap = max_fit_draws(d);
        if points.len() > cap {
            // A systematic subsample keeps the fits' cost bounded.
            let step = points.len() as f64 / cap as f64;
            let keep: Vec<usize> = (0..cap)
                .map(|i| ((i as f64 + 0.5) * step) as usize)
                .collect();
            points = keep.iter().map(|&i| points[i].clone()).collect();
            w = keep.iter().map(|&i| w[i]).collect();
        }
        (points, w)
    }

    /// The kinds of candidate base tried at a refit point (see `refit`).
    fn candidate_kinds(&self, n_points: usize, far: f64) -> Vec<Candidate> {
        let mut out = vec![Candidate::Laplace];
        let modes = self.laplace.base.components.len();
        if modes > 1 {
            out.push(Candidate::Reweighted);
        }
        // Per-mode fits describe the target as a set of modes; with much of its weight far from
        // every mode (a ridge, a shell), their light tails along the target's extent would be
        // judged only where the held-out draws reach, which is not where they fail.
        if far <= MODE_LIKE_FAR {
            out.push(Candidate::PerMode);
        }
        // One EM over all draws with extra free components: its cost grows with the number of
        // components, so it is left out when there are very many modes.
        let d = self.dim();
        let cost = n_points as f64
            * global_components(modes) as f64
            * (d * d) as f64
            * crate::refit::GLOBAL_EM_ITERATIONS as f64;
        if cost <= 2e9 {
            out.push(Candidate::Global);
        }
        out
    }

    /// Fits one kind of candidate base to weighted draws.
    fn fit_candidate(
        &self,
        kind: Candidate,
        points: &[Vec<f64>],
        w: &[f64],
        mode_of: &[usize],
        shapes: &[crate::refit::ModeShape],
        rng: &mut Stream,
    ) -> Option<Mixture> {
        let laplace = &self.laplace.base;
        match kind {
            Candidate::Laplace => Some(laplace.clone()),
            Candidate::Reweighted => crate::refit::reweight(w, mode_of, laplace),
            Candidate::PerMode => crate::refit::per_mode(points, w, mode_of, laplace, shapes),
            Candidate::Global => {
                let seeds = &laplace.components;
                crate::refit::refit(points, w, seeds, global_components(seeds.len()), rng)
            }
        }
    }

    /// Share of the weighted draws' weight far from every known mode (squared Mahalanobis
    /// distance under the mode's Hessian above 30 + 4D, as in the report's warning).
    fn far_share(&self, points: &[Vec<f64>], w: &[f64]) -> f64 {
        let d = self.dim();
        let limit = 30.0 + 4.0 * d as f64;
        let total: f64 = w.iter().sum();
        if !(total > 0.0) {
            return 0.0;
        }
        let far: f64 = points
            .iter()
            .zip(w)
            .filter(|(z, _)| {
                self.modes
                    .iter()
                    .all(|m| mahalanobis2(z, &m.z, &m.hessian) > limit)
            })
            .map(|(_, wi)| wi)
            .sum();
        if far > 0.0 {
            far / total
        } else {
            0.0
        }
    }

    /// Chooses the base for the rest of warm-up from candidates fitted to the windows since the
    /// last change, checked on held-out draws (the last window), and re-estimates log ζ.
    /// Returns a description of the change, or `None` when the base stays.
    fn refit_base(
        &mut self,
        target: &Target,
        history: &[(Bias, Vec<Record>)],
        must_change: bool,
        rng: &mut Stream,
    ) -> Result<Option<String>, KilnError> {
        // `must_change`: the current base is not a candidate (new modes, or a forced refit).
        let Some((last_bias, last_records)) = history.last() else {
            return Ok(None);
        };
        let log_zeta = log_z_from(last_bias, &self.base, last_records);
        if !log_zeta.is_finite() {
            return Ok(None);
        }
        let held = HeldOut::new(&self.base, last_bias, last_records);
        // Fit on the earlier windows, judge on the last one; the winner is then refitted to all.
        let train = if history.len() > 1 {
            &history[..history.len() - 1]
        } else {
            history
        };
        let current = if must_change {
            f64::INFINITY
        } else {
            held.variance(&self.base.q, log_zeta)
                .unwrap_or(f64::INFINITY)
        };
        let (points, w) = self.fit_draws(train);
        if points.len() < 10 {
            return Ok(None);
        }
        let mode_of = crate::refit::assign_modes(&points, &self.laplace.base);
        // Each mode's shape (components, tails) by the likelihood of its held-out draws.
        let (valid, valid_w) = self.fit_draws(&history[history.len() - 1..]);
        let valid_mode = crate::refit::assign_modes(&valid, &self.laplace.base);
        let shapes = crate::refit::choose_shapes(
            &points,
            &w,
            &mode_of,
            &valid,
            &valid_w,
            &valid_mode,
            &self.laplace.base,
        );
        let far = self.far_share(&points, &w);
        let kinds = self.candidate_kinds(points.len(), far);
        // A poor base (its own series, measured directly on the last window, varies by more
        // than POOR_SPREAD per draw) makes the reweighted comparison unreliable: held-out draws
        // made under it cover the candidates' regions badly. Then the free-form global fit is
        // taken, as it is for targets that are not a set of modes, when it can be afforded.
        let own = log_z_series_variance(last_bias, last_records);
        let poor = own > POOR_SPREAD || far > MODE_LIKE_FAR;
        let (kind, v) = if poor && kinds.contains(&Candidate::Global) {
            (Candidate::Global, f64::NAN)
        } else {
            let mut best: Option<(Candidate, f64)> = None;
            for kind in kinds {
                let Some(q) = self.fit_candidate(kind, &points, &w, &mode_of, &shapes, rng) else {
                    continue;
                };
                if let Some(v) = held.variance(&q, log_zeta) {
                    if best.is_none_or(|b| v < b.1) {
                        best = Some((kind, v));
                    }
                }
            }
            let Some((kind, v)) = best else {
                return Ok(None);
            };
            if !(v < SWITCH_RATIO * current) && !must_change {
                return Ok(None);
            }
            (kind, v)
        };
        let (points, w) = self.fit_draws(history);
        let mode_of = crate::refit::assign_modes(&points, &self.laplace.base);
        let Some(fit) = self.fit_candidate(kind, &points, &w, &mode_of, &shapes, rng) else {
            return Ok(None);
        };
        let name = kind.describe(fit.components.len(), &shapes);
        self.base = Base {
            q: Arc::new(fit),
            log_zeta,
        };
        self.heavy = Arc::new(heavy_tails(&self.base.q));
        self.bias = Bias::flat(self.options.knots);
        self.set_metric(target.dim(), false)?;
        self.refitted = true;
        if v.is_nan() {
            return Ok(Some(format!(
                "{name} (the base was poor: variance of the log Z series per draw {own:.2e}, {:.1}% of the target's weight far from every mode)",
                100.0 * far
            )));
        }
        let before = if current.is_finite() {
            format!("{current:.2e} → ")
        } else {
            String::new()
        };
        Ok(Some(format!(
            "{name}; held-out variance of the log Z series per draw (estimate + 2 SE) {before}{v:.2e}"
        )))
    }
}

/// A kind of candidate base (see `refit`).
#[derive(Clone, Copy, Debug, PartialEq)]
enum Candidate {
    /// The Laplace approximation at the known modes.
    Laplace,
    /// The Laplace components with weights from the draws.
    Reweighted,
    /// Per mode, the shape its held-out draws chose (see `refit::choose_shapes`).
    PerMode,
    /// One Student-t EM over all draws, with extra free components.
    Global,
}

impl Candidate {
    fn describe(self, components: usize, shapes: &[crate::refit::ModeShape]) -> String {
        match self {
            Candidate::Laplace => "the Laplace approximation at the known modes".into(),
            Candidate::Reweighted => "the Laplace components with weights from the draws".into(),
            Candidate::PerMode => {
                let refitted = shapes.iter().filter(|s| s.components > 0).count();
                let most = shapes.iter().map(|s| s.components).max().unwrap_or(0);
                let tails: Vec<String> = {
                    let mut v: Vec<f64> = shapes
                        .iter()
                        .filter(|s| s.components > 0)
                        .map(|s| s.nu)
                        .collect();
                    v.sort_by(|a, b| a.total_cmp(b));
                    v.dedup();
                    v.iter()
                        .map(|nu| {
                            if nu.is_finite() {
                                format!("{nu}")
                            } else {
                                "∞".into()
                            }
                        })
                        .collect()
                };
                format!(
                    "per-mode fits ({refitted} of {} modes refitted, up to {most} component(s) each, ν ∈ {{{}}}; {components} components in all)",
                    shapes.len(),
                    tails.join(", ")
                )
            }
            Candidate::Global => {
                format!("{components} Student-t components fitted to all draws")
            }
        }
    }
}

/// Components of the global fit for `modes` known modes.
fn global_components(modes: usize) -> usize {
    (2 * modes).max(16).min(modes + 32)
}

/// Draws held out to judge a candidate base: for each, its position, its energy and the log
/// of the (unnormalised) density it was drawn from.
///
/// A draw of a window run with base q and bias g has the marginal density
/// m(x) ∝ q(x) C(x). A candidate base q′ with log ζ′ and a flat bias would draw from
/// m′(x) ∝ q′(x) φ(Δ′(x)), φ(a) = (1 − e^{−a})/a. Weighting the held-out draws by m′/m gives
/// the per-draw variance of the log Z series under q′, var(p1/E p1 − p0/E p0), without a single
/// new energy evaluation (E is recovered from the recorded Δ).
struct HeldOut {
    z: Vec<Vec<f64>>,
    e: Vec<f64>,
    log_m: Vec<f64>,
}

impl HeldOut {
    fn new(base: &Base, bias: &Bias, records: &[Record]) -> HeldOut {
        let d = base.q.dim;
        let mut scratch = base.q.scratch();
        let mut s = vec![0.0; bias.knots.len()];
        let mut out = HeldOut {
            z: Vec::new(),
            e: Vec::new(),
            log_m: Vec::new(),
        };
        for r in records {
            for (i, &delta) in r.delta.iter().enumerate() {
                if !delta.is_finite() {
                    continue;
                }
                let z = &r.z[i * d..(i + 1) * d];
                let log_q = base.q.log_density(z, &mut scratch);
                out.e.push(delta - base.log_zeta - log_q);
                out.log_m.push(log_q + bias.log_c(delta, &mut s));
                out.z.push(z.to_vec());
            }
        }
        out
    }

    /// The per-draw variance of the log Z series with base `q` and log ζ, flat bias, plus two
    /// standard errors of that estimate: candidates are judged pessimistically, so that one whose
    /// reweighted draws are few or uneven does not win on a lucky estimate.
    fn variance(&self, q: &Mixture, log_zeta: f64) -> Option<f64> {
        self.estimate(q, log_zeta)
            .map(|(v, se)| v + 2.0 * se)
            .filter(|u| u.is_finite())
    }

    /// The per-draw variance of the log Z series with base `q` and log ζ, flat bias, and the
    /// standard error of that estimate (self-normalised importance sampling); `None` when the
    /// reweighted draws are too few to say (effective size below 5 % or 20).
    fn estimate(&self, q: &Mixture, log_zeta: f64) -> Option<(f64, f64)> {
        let n = self.z.len();
        if n < 20 {
            return None;
        }
        let mut scratch = q.scratch();
        let mut lv = Vec::with_capacity(n);
        let mut p = Vec::with_capacity(n);
        for i in 0..n {
            let log_q = q.log_density(&self.z[i], &mut scratch);
            let delta = self.e[i] + log_zeta + log_q;
            if !delta.is_finite() {
                continue;
            }
            let lphi = crate::tempering::log_phi(delta);
            lv.push(log_q + lphi - self.log_m[i]);
            p.push((exp(-delta - lphi), exp(-lphi)));
        }
        let top = lv.iter().copied().fold(f64::NEG_INFINITY, f64::max);
        if !top.is_finite() {
            return None;
        }
        let v: Vec<f64> = lv.iter().map(|l| exp(l - top)).collect();
        let sv: f64 = v.iter().sum();
        let sv2: f64 = v.iter().map(|x| x * x).sum();
        let ess = sv * sv / sv2;
        if ess < 20.0 || ess < 0.05 * n as f64 {
            return None;
        }
        let m1 = v.iter().zip(&p).map(|(a, b)| a * b.0).sum::<f64>() / sv;
        let m0 = v.iter().zip(&p).map(|(a, b)| a * b.1).sum::<f64>() / sv;
        if !(m1 > 0.0 && m0 > 0.0) {
            return None;
        }
        let z2: Vec<f64> = p
            .iter()
            .map(|b| {
                let z = b.0 / m1 - b.1 / m0;
                z * z
            })
            .collect();
        let var = v.iter().zip(&z2).map(|(a, g)| a * g).sum::<f64>() / sv;
        let se2 = v
            .iter()
            .zip(&z2)
            .map(|(a, g)| a * a * (g - var) * (g - var))
            .sum::<f64>()
            / (sv * sv);
        (var.is_finite() && se2.is_finite()).then_some((var, sqrt(se2)))
    }
}

/// One step of a run: a piece of a warm-up window (the window's last piece is followed by
/// learning from the whole window) or a chunk of kept draws.
#[derive(Clone, Copy, Debug, PartialEq, Eq, serde::Serialize)]
pub enum Step {
    Warmup {
        window: usize,
        iterations: usize,
        last_of_window: bool,
    },
    Sample {
        chunk: usize,
        iterations: usize,
    },
}

/// Most iterations per chain in one step, so that a step stays short (progress is reported and
/// a cancel in the page takes effect between steps; a running WebAssembly call cannot be
/// interrupted).
pub const MAX_STEP_ITERATIONS: usize = 100;

/// Splits `n` iterations into pieces of at most [`MAX_STEP_ITERATIONS`] (at least one piece).
fn pieces(n: usize) -> Vec<usize> {
    let k = n.div_ceil(MAX_STEP_ITERATIONS).max(1);
    (0..k).map(|i| n / k + usize::from(i < n % k)).collect()
}

/// A run as a fixed sequence of steps, for all chains or for a subset of them.
///
/// Each step, the owned chains run (`run_step`) and the records of *all* chains are then
/// handed to `absorb`, which applies what warm-up learns (bias, mode discovery, refit, mass of
/// u) identically wherever it runs. The command line owns every chain; a page worker owns
/// some and exchanges records with the others, and gets the same numbers.
pub struct Stepper {
    pub plan: Plan,
    target: Target,
    /// The owned chains, in increasing chain order.
    chains: Vec<Chain>,
    steps: Vec<Step>,
    at: usize,
    history: Vec<(Bias, Vec<Record>)>,
    since_reset: usize,
    merge_rng: Stream,
    /// Kept draws of every chain, concatenated over sampling chunks (index = chain).
    pub kept: Vec<Record>,
    /// The current warm-up window's records so far, every chain (index = chain).
    window: Vec<Record>,
    /// Effective draws of the log Z series per evaluation in the last window that made a
    /// Hamiltonian move in every iteration (the reference for the trial of cheaper moves).
    full_efficiency: f64,
    /// The trial of cheaper moves was skipped (the base did not cover the target).
    trial_skipped: bool,
}

fn merge_records(into: &mut Record, r: &Record) {
    let n_old = into.transitions as f64;
    let n_new = r.transitions as f64;
    into.z.extend_from_slice(&r.z);
    into.beta.extend_from_slice(&r.beta);
    into.delta.extend_from_slice(&r.delta);
    if n_old + n_new > 0.0 {
        into.accept = (into.accept * n_old + r.accept * n_new) / (n_old + n_new);
    }
    into.divergences += r.divergences;
    into.leapfrogs += r.leapfrogs;
    into.max_depth_hits += r.max_depth_hits;
    into.independence_accepted += r.independence_accepted;
    into.iterations += r.iterations;
    into.transitions += r.transitions;
    into.chain = r.chain;
    into.evaluations = r.evaluations;
    into.eps = r.eps;
}

impl Stepper {
    /// `owned`: the chain indices this stepper runs (`None`: all of them).
    pub fn new(
        target: &Target,
        modes: Vec<Mode>,
        laplace: Laplace,
        options: SamplerOptions,
        owned: Option<&[usize]>,
    ) -> Result<Stepper, KilnError> {
        let plan = Plan::new(target, modes, laplace, options)?;
        let all: Vec<usize> = (0..plan.options.chains).collect();
        let mut owned: Vec<usize> = owned.map(|o| o.to_vec()).unwrap_or(all);
        owned.sort_unstable();
        owned.dedup();
        if let Some(bad) = owned.iter().find(|&&c| c >= plan.options.chains) {
            return Err(KilnError::usage(format!(
                "chain {bad} does not exist: the run has {} chains",
                plan.options.chains
            )));
        }
        let mut chains: Vec<Chain> = owned
            .iter()
            .map(|&c| Chain::new(c, target, &plan))
            .collect::<Result<_, _>>()?;
        for c in chains.iter_mut() {
            c.restart_adaptation(&plan);
        }
        let mut steps: Vec<Step> = Vec::new();
        for (window, len) in window_lengths(plan.options.warmup).into_iter().enumerate() {
            let parts = pieces(len);
            let n = parts.len();
            for (i, iterations) in parts.into_iter().enumerate() {
                steps.push(Step::Warmup {
                    window,
                    iterations,
                    last_of_window: i + 1 == n,
                });
            }
        }
        for (chunk, iterations) in pieces(plan.options.draws).into_iter().enumerate() {
            steps.push(Step::Sample { chunk, iterations });
        }
        let merge_rng = Stream::new(plan.options.seed, Purpose::Resample, 1 << 20);
        let fresh = |c: usize| Record {
            chain: c,
            ..Record::default()
        };
        let kept = (0..plan.options.chains).map(fresh).collect();
        let window = (0..plan.options.chains).map(fresh).collect();
        Ok(Stepper {
            plan,
            target: target.clone(),
            chains,
            steps,
            at: 0,
            history: Vec::new(),
            since_reset: 0,
            merge_rng,
            kept,
            window,
            full_efficiency: 0.0,
            trial_skipped: false,
        })
    }

    /// Splits the sampling steps not yet run into pieces of at most `max` iterations. Kept
    /// draws only accumulate between sampling steps, so the draws are the same; a caller that
    /// stops at a budget of evaluations can then stop closer to it.
    pub fn split_sampling(&mut self, max: usize) {
        let max = max.max(1);
        let at = self.at;
        let first = self.steps[at..]
            .iter()
            .position(|s| matches!(s, Step::Sample { .. }))
            .map_or(self.steps.len(), |i| at + i);
        let left: usize = self.steps[first..]
            .iter()
            .map(|s| match s {
                Step::Sample { iterations, .. } | Step::Warmup { iterations, .. } => *iterations,
            })
            .sum();
        self.steps.truncate(first);
        let done = self
            .steps
            .iter()
            .filter(|s| matches!(s, Step::Sample { .. }))
            .count();
        let k = left.div_ceil(max);
        for i in 0..k {
            let iterations = left / k + usize::from(i < left % k);
            self.steps.push(Step::Sample {
                chunk: done + i,
                iterations,
            });
        }
    }

    /// The current step, or `None` when the run is done.
    pub fn step(&self) -> Option<Step> {
        self.steps.get(self.at).copied()
    }

    pub fn step_index(&self) -> usize {
        self.at
    }

    pub fn step_count(&self) -> usize {
        self.steps.len()
    }

    /// Runs the owned chains through the current step.
    pub fn run_step(&mut self) -> Vec<Record> {
        match self.step() {
            Some(Step::Warmup { iterations, .. }) => {
                run_chains(&mut self.chains, &self.plan, iterations, true)
            }
            Some(Step::Sample { iterations, .. }) => {
                run_chains(&mut self.chains, &self.plan, iterations, false)
            }
            None => Vec::new(),
        }
    }

    /// Takes the records of every chain for the current step and moves to the next.
    pub fn absorb(&mut self, mut records: Vec<Record>) -> Result<(), KilnError> {
        let Some(step) = self.step() else {
            return Ok(());
        };
        records.sort_by_key(|r| r.chain);
        let chains: Vec<usize> = records.iter().map(|r| r.chain).collect();
        let expected: Vec<usize> = (0..self.plan.options.chains).collect();
        if chains != expected {
            return Err(KilnError::usage(format!(
                "step {} needs the records of chains {expected:?}, got {chains:?}",
                self.at
            )));
        }
        match step {
            Step::Warmup {
                window,
                last_of_window,
                ..
            } => {
                for r in &records {
                    merge_records(&mut self.window[r.chain], r);
                }
                if last_of_window {
                    let whole: Vec<Record> = std::mem::take(&mut self.window);
                    self.window = (0..self.plan.options.chains)
                        .map(|c| Record {
                            chain: c,
                            ..Record::default()
                        })
                        .collect();
                    if self.plan.is_tempered() && whole.iter().any(|r| r.iterations > 0) {
                        self.learn(window, &whole)?;
                    }
                }
                // Leaving warm-up: every chain keeps its averaged step size from now on, and the
                // frozen base's mass outside the target's support is measured.
                if !matches!(self.steps.get(self.at + 1), Some(Step::Warmup { .. })) {
                    for c in self.chains.iter_mut() {
                        c.eps = c.adapt.final_eps();
                    }
                    let target = self.target.clone();
                    self.plan.measure_support(&target);
                }
            }
            Step::Sample { .. } => {
                for r in &records {
                    merge_records(&mut self.kept[r.chain], r);
                }
            }
        }
        self.at += 1;
        Ok(())
    }

    /// What warm-up learns from one window of every chain.
    fn learn(&mut self, w: usize, records: &[Record]) -> Result<(), KilnError> {
        let target = self.target.clone();
        let plan = &mut self.plan;
        let used = plan.bias.clone();
        if plan.options.learn_bias {
            plan.update_bias(records, bias_step(self.since_reset));
            self.since_reset += 1;
        }
        self.history.push((used.clone(), records.to_vec()));
        if REFIT_AFTER.contains(&w) {
            let found = plan.discover_modes(&target, records)?;
            plan.new_modes += found;
            let (consider, must_change) = match plan.options.refit {
                RefitPolicy::Always => (true, w == REFIT_AFTER[0] || found > 0),
                RefitPolicy::Never => (false, false),
                RefitPolicy::Auto => (true, found > 0),
            };
            let first_window = w + 1 - self.history.len();
            let change = if consider {
                plan.refit_base(&target, &self.history, must_change, &mut self.merge_rng)?
            } else {
                None
            };
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
        }
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

    /// Energy evaluations of every chain (read from the records, so every worker agrees).
    pub fn chain_evaluations(&self) -> u64 {
        self.kept.iter().map(|r| r.evaluations).sum()
    }

    /// The step size of every chain in the kept draws.
    pub fn step_sizes(&self) -> Vec<f64> {
        self.kept.iter().map(|r| r.eps).collect()
    }

    /// Runs every remaining step with all chains owned.
    pub fn run_to_end(&mut self) -> Result<(), KilnError> {
        while self.step().is_some() {
            let r = self.run_step();
            self.absorb(r)?;
        }
        Ok(())
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    /// A 2-D mixture of a unit mode at the origin and a narrower, lighter one at (c, c), and
    /// the modes the optimiser finds.
    fn two_modes_at(c: f64) -> (Target, crate::modes::ModeSearch) {
        let text = format!(
            r#"{{"mixture": [{{"weight": 1, "mean": [0, 0], "sd": [1, 1]}}, {{"weight": 0.5, "mean": [{c}, {c}], "sd": [0.7, 0.7]}}]}}"#
        );
        let spec = crate::parse_spec("t", &text).unwrap();
        let target = Target::from_spec(&spec).unwrap();
        let search =
            crate::modes::find_modes(&target, crate::modes::SearchOptions::default_for(2, 1))
                .unwrap();
        (target, search)
    }

    #[test]
    fn draws_in_an_unexplored_region_become_a_new_mode() {
        // A mixture whose second component (at (8, 8)) the optimiser is made to miss: keep only
        // the first mode, then hand the plan draws near β = 1 sitting around (8, 8).
        let (target, mut search) = two_modes_at(8.0);
        search.modes.retain(|m| m.x[0] < 4.0);
        assert_eq!(search.modes.len(), 1);
        let laplace = Laplace::from_modes(&search.modes).unwrap();
        let mut plan = Plan::new(&target, search.modes, laplace, SamplerOptions::new(1)).unwrap();
        let mut rng = Stream::new(1, Purpose::Check, 0);
        let mut rec = Record::default();
        for _ in 0..50 {
            rec.z.push(8.0 + 0.7 * rng.normal());
            rec.z.push(8.0 + 0.7 * rng.normal());
            rec.beta.push(0.9);
            rec.delta.push(0.0);
        }
        let added = plan.discover_modes(&target, &[rec]).unwrap();
        assert_eq!(added, 1);
        let new = plan
            .modes
            .iter()
            .find(|m| m.x[0] > 4.0)
            .expect("the new mode is in the list");
        assert!(
            (new.x[0] - 8.0).abs() < 1e-4 && (new.x[1] - 8.0).abs() < 1e-4,
            "{:?}",
            new.x
        );
        assert_eq!(plan.laplace.base.components.len(), 2);
    }

    #[test]
    fn finer_sampling_steps_keep_the_same_draws() {
        // Kept draws only accumulate between sampling steps: splitting them must change nothing.
        let (target, search) = two_modes_at(6.0);
        let laplace = Laplace::from_modes(&search.modes).unwrap();
        let mut opts = SamplerOptions::new(5);
        opts.warmup = 150;
        opts.draws = 230;
        let run = |split: Option<usize>| {
            let mut s = Stepper::new(
                &target,
                search.modes.clone(),
                laplace.clone(),
                opts.clone(),
                None,
            )
            .unwrap();
            let mut sample_steps = 0;
            while let Some(step) = s.step() {
                if matches!(step, Step::Sample { .. }) {
                    if let Some(m) = split.filter(|_| sample_steps == 0) {
                        s.split_sampling(m);
                    }
                    sample_steps += 1;
                }
                let r = s.run_step();
                s.absorb(r).unwrap();
            }
            (s.kept.clone(), sample_steps)
        };
        let (a, na) = run(None);
        let (b, nb) = run(Some(7));
        assert_eq!(na, 3);
        assert_eq!(nb, 230usize.div_ceil(7));
        for (x, y) in a.iter().zip(&b) {
            assert_eq!(x.iterations, 230);
            assert_eq!(x.iterations, y.iterations);
            assert_eq!(x.z, y.z);
            assert_eq!(x.beta, y.beta);
            assert_eq!(x.evaluations, y.evaluations);
        }
    }

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

    #[test]
    fn the_heavy_proposal_widens_each_component() {
        let a = Gaussian::new(&[1.0, -2.0], &[vec![2.0, 0.3], vec![0.3, 0.5]]).unwrap();
        let b = Gaussian::new(&[-3.0, 4.0], &[vec![0.2, 0.0], vec![0.0, 0.7]]).unwrap();
        let q = Mixture::new(vec![a, b], &[1.0, 3.0]);
        let h = heavy_tails(&q);
        assert_eq!(h.components.len(), 2);
        for (c, g) in h.components.iter().zip(&q.components) {
            assert_eq!(c.nu, HEAVY_NU);
            assert_eq!(c.mean, g.mean);
            for (x, y) in c.scale_matrix().iter().zip(g.scale_matrix()) {
                assert!((x - HEAVY_SCALE * HEAVY_SCALE * y).abs() < 1e-12);
            }
        }
        for (x, y) in h.weights().iter().zip(q.weights()) {
            assert!((x - y).abs() < 1e-15);
        }
    }

    /// Records of `n` draws per chain from a 1-D target with the given Δ at each draw.
    fn records_1d(deltas: &[Vec<f64>], zs: &[Vec<f64>]) -> Vec<Record> {
        deltas
            .iter()
            .zip(zs)
            .enumerate()
            .map(|(c, (d, z))| Record {
                chain: c,
                z: z.clone(),
                beta: vec![0.5; d.len()],
                delta: d.clone(),
                iterations: d.len(),
                ..Record::default()
            })
            .collect()
    }

    #[test]
    fn held_out_variance_of_the_current_base_is_the_series_variance() {
        // With a flat bias and the candidate equal to the base the draws were made with, the
        // reweighting is the identity (m′/m = φ(Δ)/C(Δ) = 1), so the held-out variance must equal
        // the plain per-draw variance of the series (an identity).
        let g = Gaussian::new(&[0.0], &[vec![1.0]]).unwrap();
        let q = Mixture::new(vec![g], &[1.0]);
        let base = Base {
            q: Arc::new(q.clone()),
            log_zeta: 0.3,
        };
        let bias = Bias::flat(16);
        let mut rng = Stream::new(4, Purpose::Check, 0);
        let mut zs = vec![Vec::new(), Vec::new()];
        let mut ds = vec![Vec::new(), Vec::new()];
        for c in 0..2 {
            for _ in 0..500 {
                let x = 1.3 * rng.normal();
                zs[c].push(x);
                // Δ of a made-up energy 0.6 x² + 0.1 x⁴ against this base.
                let e = 0.6 * x * x + 0.1 * x * x * x * x;
                let mut s = q.scratch();
                ds[c].push(e + base.log_zeta + q.log_density(&[x], &mut s));
            }
        }
        let recs = records_1d(&ds, &zs);
        let held = HeldOut::new(&base, &bias, &recs);
        let (v, _) = held.estimate(&q, base.log_zeta).unwrap();
        let direct = log_z_series_variance(&bias, &recs);
        assert!(
            (v - direct).abs() < 1e-9 * direct.max(1.0),
            "{v} vs {direct}"
        );
    }
}
