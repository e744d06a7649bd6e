//! One chain of the tempered sampler and the moves it makes in an iteration.
//!
//! Owns: [`Chain`] (its generator, evaluator, position, β and step size), the potential it moves
//! on in whitened coordinates, an iteration (Hamiltonian move with probability p, independence
//! move from the defensive proposal of [`heavy_tails`], exact β draw), and running all chains
//! for a step on every core ([`run_chains`]).
//! Must not: change the plan (that happens between steps, in `stepper` and `warmup`).

use super::hmc::{initial_step_size, nuts, static_hmc, DualAveraging, Point, Potential};
use super::options::{Integrator, Method};
use super::plan::{Plan, Record};
use super::tempering::{u_prior_energy, Evaluated, Tempered};
use crate::common::error::KilnError;
use crate::common::gaussian::{Gaussian, Mixture, MixtureScratch};
use crate::common::maths::{ln, log_add_exp, logistic};
use crate::common::rng::{Purpose, Stream};
use crate::model::target::Target;

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
    pub(super) eps: f64,
    pub(super) adapt: DualAveraging,
    ev: Evaluated,
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
        self.plan.metric.to_z(&q[..d], &mut z);
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
        self.plan.metric.grad_to_q(&gz, &mut grad[..d]);
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
    pub(super) fn refresh(&mut self, plan: &Plan) {
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

    pub(super) fn joint(plan: &Plan) -> bool {
        plan.options.method == Method::Joint && plan.is_tempered()
    }

    fn position(&self, plan: &Plan) -> Vec<f64> {
        let mut q = plan.metric.to_q(&self.z);
        if Self::joint(plan) {
            q.push(self.u / plan.u_scale);
        }
        q
    }

    /// Restarts step-size adaptation from a fresh initial step size.
    pub(super) fn restart_adaptation(&mut self, plan: &Plan) {
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
        let cheap_moves = plan.is_tempered() && plan.options.independence;
        if cheap_moves {
            rec.proposal_log_w.reserve(iterations);
        }
        let mut q = self.position(plan);
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
                        Integrator::Nuts => nuts(
                            &mut pot,
                            &mut point,
                            self.eps,
                            plan.options.max_depth,
                            &mut self.rng,
                        ),
                        Integrator::Hmc => {
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
                plan.metric.to_z(&q[..d], &mut self.z);
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
                    // log f(x′) − log q′(x′) = log ζ − Δ′ + log q(x′) − log q′(x′).
                    let log_w = plan.base.log_zeta - dp + ratio_p;
                    rec.proposal_log_w.push(if log_w.is_nan() {
                        f64::NEG_INFINITY
                    } else {
                        log_w
                    });
                    let log_a =
                        (ratio_p - self.beta * dp) - (self.log_ratio - self.beta * self.delta);
                    if dp.is_finite() && ratio_p.is_finite() && ln(self.rng.uniform()) < log_a {
                        self.z = zp;
                        self.delta = dp;
                        self.log_ratio = ratio_p;
                        rec.independence_accepted += 1;
                        let qz = plan.metric.to_q(&self.z);
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

    pub(super) fn set_base(&mut self, plan: &Plan) {
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

#[cfg(test)]
mod tests {
    use super::*;

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
}
