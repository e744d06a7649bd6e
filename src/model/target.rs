//! validated spec → target density on the real line.
//!
//! Owns: [`Target`], which puts the pieces together: the compiled formula with the spec's
//! priors added to its log density (or the user's Gaussian mixture), the maps of bounded unknowns to the real line (logit for two bounds, log
//! for one) with their log-Jacobians, and the sign convention (energy or log density). Every
//! later stage works in these unconstrained coordinates `z`; because the log-Jacobian is part of
//! the energy, log Z and every reported number are in the user's coordinates. Non-finite energy
//! (NaN or +∞) means zero density there.
//! Must not: search for modes or sample.

use crate::common::error::KilnError;
use crate::common::gaussian::{Gaussian, Mixture, MixtureScratch};
use crate::common::maths::{exp, ln, logistic, softplus};
use crate::formula::resolve::{resolve, AddedTerm, Inputs};
use crate::formula::syntax::parse;
use crate::formula::tape::{DataTable, Evaluator, Tape};
use crate::model::spec::{Bounds, Model, Spec};
use std::sync::Arc;

/// How one unknown is mapped from the real line `z` to the user's coordinate `x`.
#[derive(Clone, Copy, Debug, PartialEq)]
pub enum Transform {
    Free,
    /// x = lower + e^z
    Lower(f64),
    /// x = upper − e^z
    Upper(f64),
    /// x = lower + (upper − lower) σ(z)
    Interval(f64, f64),
}

impl Transform {
    pub fn from_bounds(b: Bounds) -> Transform {
        match (b.lower, b.upper) {
            (None, None) => Transform::Free,
            (Some(l), None) => Transform::Lower(l),
            (None, Some(u)) => Transform::Upper(u),
            (Some(l), Some(u)) => Transform::Interval(l, u),
        }
    }

    /// x(z).
    #[inline]
    pub fn to_user(self, z: f64) -> f64 {
        match self {
            Transform::Free => z,
            Transform::Lower(l) => l + exp(z),
            Transform::Upper(u) => u - exp(z),
            Transform::Interval(l, u) => {
                // Measure from the nearer end so that x stays inside the interval.
                if z < 0.0 {
                    l + (u - l) * logistic(z)
                } else {
                    u - (u - l) * logistic(-z)
                }
            }
        }
    }

    /// (x, dx/dz, log|dx/dz|, d log|dx/dz| / dz).
    #[inline]
    pub fn with_jacobian(self, z: f64) -> (f64, f64, f64, f64) {
        match self {
            Transform::Free => (z, 1.0, 0.0, 0.0),
            Transform::Lower(l) => {
                let e = exp(z);
                (l + e, e, z, 1.0)
            }
            Transform::Upper(u) => {
                let e = exp(z);
                (u - e, -e, z, 1.0)
            }
            Transform::Interval(l, u) => {
                let s = logistic(z);
                let t = logistic(-z);
                let x = if z < 0.0 {
                    l + (u - l) * s
                } else {
                    u - (u - l) * t
                };
                let log_jac = ln(u - l) - softplus(-z) - softplus(z);
                (x, (u - l) * s * t, log_jac, t - s)
            }
        }
    }

    /// z(x); `None` outside the support.
    pub fn to_unconstrained(self, x: f64) -> Option<f64> {
        let z = match self {
            Transform::Free => x,
            Transform::Lower(l) => ln(x - l),
            Transform::Upper(u) => ln(u - x),
            Transform::Interval(l, u) => {
                let p = (x - l) / (u - l);
                ln(p) - ln(1.0 - p)
            }
        };
        z.is_finite().then_some(z)
    }
}

#[derive(Clone, Debug)]
enum Kind {
    Formula {
        tape: Arc<Tape>,
        sign: f64,
    },
    Mixture {
        mixture: Arc<Mixture>,
        total_weight: f64,
    },
}

/// A density over the unknowns, ready to evaluate in unconstrained coordinates.
#[derive(Clone, Debug)]
pub struct Target {
    pub names: Vec<String>,
    pub transforms: Vec<Transform>,
    pub data_rows: usize,
    kind: Kind,
}

/// The priors of a spec as terms to add: (source for messages, text, the unknowns it is a
/// prior of), one per variable entry (a vector's elements share theirs).
pub fn prior_terms(spec: &Spec) -> Vec<(String, String, Vec<u32>)> {
    let mut out: Vec<(String, String, Vec<u32>)> = Vec::new();
    let mut i = 0;
    while i < spec.variables.len() {
        let v = &spec.variables[i];
        let vector = spec.vectors.iter().find(|w| w.first as usize == i);
        let (name, len) = match vector {
            Some(w) => (w.name.clone(), w.len as usize),
            None => (v.name.clone(), 1),
        };
        if let Some(p) = &v.prior {
            out.push((
                format!("prior of `{name}`"),
                p.clone(),
                (i as u32..(i + len) as u32).collect(),
            ));
        }
        i += len;
    }
    out
}

/// Exact answers for a mixture target.
#[derive(Clone, Debug)]
pub struct MixtureTruth {
    pub log_z: f64,
    pub mean: Vec<f64>,
    /// Row-major covariance.
    pub cov: Vec<f64>,
    /// Component masses (weights / total weight).
    pub masses: Vec<f64>,
    pub means: Vec<Vec<f64>>,
}

impl Target {
    /// Parses, checks and compiles the spec's model.
    pub fn from_spec(spec: &Spec) -> Result<Target, KilnError> {
        let names = spec.names();
        let transforms = spec
            .variables
            .iter()
            .map(|v| Transform::from_bounds(v.bounds))
            .collect();
        let kind = match &spec.model {
            Model::Energy(text) | Model::LogDensity(text) => {
                let field = spec.model.field();
                let program = parse(field, text)?;
                let data_names: Vec<String> = spec.data.iter().map(|(n, _)| n.clone()).collect();
                let columns: Vec<Vec<f64>> = spec.data.iter().map(|(_, c)| c.clone()).collect();
                let table = DataTable {
                    columns: &columns,
                    rows: spec.data_rows,
                };
                let sign = if matches!(spec.model, Model::Energy(_)) {
                    1.0
                } else {
                    -1.0
                };
                let inputs = Inputs {
                    unknowns: &names,
                    vectors: &spec.vectors,
                    data_names: &data_names,
                    data: &table,
                };
                let priors = prior_terms(spec);
                // A prior is a log density: subtracted from an energy, added to a log density.
                let added: Vec<AddedTerm> = priors
                    .iter()
                    .map(|(source, text, subjects)| AddedTerm {
                        source,
                        text,
                        subjects: subjects.clone(),
                        coefficient: -sign,
                    })
                    .collect();
                let graph = resolve(field, text, &program, &inputs, &added)?;
                let tape = Tape::compile(&graph, names.len(), &table);
                Kind::Formula {
                    tape: Arc::new(tape),
                    sign,
                }
            }
            Model::Mixture(comps) => {
                let gs: Vec<Gaussian> = comps
                    .iter()
                    .map(|c| {
                        Gaussian::new(&c.mean, &c.cov).ok_or_else(|| {
                            KilnError::spec("a mixture covariance is not positive definite")
                        })
                    })
                    .collect::<Result<_, _>>()?;
                let weights: Vec<f64> = comps.iter().map(|c| c.weight).collect();
                let total_weight = weights.iter().sum();
                Kind::Mixture {
                    mixture: Arc::new(Mixture::new(gs, &weights)),
                    total_weight,
                }
            }
        };
        Ok(Target {
            names,
            transforms,
            data_rows: spec.data_rows,
            kind,
        })
    }

    pub fn dim(&self) -> usize {
        self.names.len()
    }

    /// The exact answers, for a mixture target.
    pub fn mixture_truth(&self) -> Option<MixtureTruth> {
        match &self.kind {
            Kind::Mixture {
                mixture,
                total_weight,
            } => {
                let (mean, cov) = mixture.moments();
                Some(MixtureTruth {
                    log_z: ln(*total_weight),
                    mean,
                    cov,
                    masses: mixture.weights(),
                    means: mixture.components.iter().map(|c| c.mean.clone()).collect(),
                })
            }
            Kind::Formula { .. } => None,
        }
    }

    /// The unknowns' values in the user's coordinates.
    pub fn to_user(&self, z: &[f64]) -> Vec<f64> {
        z.iter()
            .zip(&self.transforms)
            .map(|(z, t)| t.to_user(*z))
            .collect()
    }

    /// z for user coordinates `x`; `None` outside the support.
    pub fn to_unconstrained(&self, x: &[f64]) -> Option<Vec<f64>> {
        x.iter()
            .zip(&self.transforms)
            .map(|(x, t)| t.to_unconstrained(*x))
            .collect()
    }

    /// Whether every unknown has both bounds.
    pub fn is_box(&self) -> bool {
        self.transforms
            .iter()
            .all(|t| matches!(t, Transform::Interval(..)))
    }

    pub fn evaluator(&self) -> TargetEval {
        let d = self.dim();
        let inner = match &self.kind {
            Kind::Formula { tape, sign } => Inner::Formula(Evaluator::new(tape.clone()), *sign),
            Kind::Mixture {
                mixture,
                total_weight,
            } => Inner::Mixture(mixture.clone(), mixture.scratch(), ln(*total_weight)),
        };
        TargetEval {
            transforms: self.transforms.clone(),
            inner,
            x: vec![0.0; d],
            gx: vec![0.0; d],
            evaluations: 0,
        }
    }
}

#[derive(Clone)]
enum Inner {
    Formula(Evaluator, f64),
    Mixture(Arc<Mixture>, MixtureScratch, f64),
}

/// Evaluates a [`Target`]; each thread or chain owns one.
#[derive(Clone)]
pub struct TargetEval {
    transforms: Vec<Transform>,
    inner: Inner,
    x: Vec<f64>,
    gx: Vec<f64>,
    /// Energy evaluations so far, with or without gradient (the unit of cost).
    pub evaluations: u64,
}

/// Non-finite energies mean zero density, except −∞, which is kept so callers can report it.
#[inline]
fn clean(e: f64) -> f64 {
    if e.is_nan() {
        f64::INFINITY
    } else {
        e
    }
}

impl TargetEval {
    pub fn dim(&self) -> usize {
        self.transforms.len()
    }

    /// The energy in the user's coordinates (the formula as the user wrote it, sign applied).
    pub fn user_energy(&mut self, x: &[f64]) -> f64 {
        clean(match &mut self.inner {
            Inner::Formula(ev, sign) => *sign * ev.value(x),
            Inner::Mixture(m, s, log_w) => -(m.log_density(x, s) + *log_w),
        })
    }

    /// The energy in unconstrained coordinates: user energy − log-Jacobian.
    pub fn energy(&mut self, z: &[f64]) -> f64 {
        self.evaluations += 1;
        let mut log_jac = 0.0;
        for i in 0..z.len() {
            let (x, _, lj, _) = self.transforms[i].with_jacobian(z[i]);
            self.x[i] = x;
            log_jac += lj;
        }
        let x = std::mem::take(&mut self.x);
        let e = self.user_energy(&x);
        self.x = x;
        clean(e - log_jac)
    }

    /// The energy in unconstrained coordinates and its gradient (written to `grad`).
    pub fn energy_grad(&mut self, z: &[f64], grad: &mut [f64]) -> f64 {
        self.evaluations += 1;
        let d = z.len();
        let mut log_jac = 0.0;
        for i in 0..d {
            let (x, _, lj, _) = self.transforms[i].with_jacobian(z[i]);
            self.x[i] = x;
            log_jac += lj;
        }
        let e = match &mut self.inner {
            Inner::Formula(ev, sign) => {
                let v = ev.value_grad(&self.x, &mut self.gx);
                if *sign < 0.0 {
                    for g in self.gx.iter_mut() {
                        *g = -*g;
                    }
                }
                *sign * v
            }
            Inner::Mixture(m, s, log_w) => {
                let v = m.log_density_grad(&self.x, &mut self.gx, s);
                for g in self.gx.iter_mut() {
                    *g = -*g;
                }
                -(v + *log_w)
            }
        };
        for i in 0..d {
            let (_, dxdz, _, dlj) = self.transforms[i].with_jacobian(z[i]);
            // An unknown the formula does not depend on has zero slope even where dx/dz overflows.
            grad[i] = if self.gx[i] == 0.0 {
                -dlj
            } else {
                self.gx[i] * dxdz - dlj
            };
        }
        clean(e - log_jac)
    }
}

impl Target {
    /// Tape instructions per evaluation (data rows counted); a cost measure for budgets.
    pub fn evaluator_work(&self) -> usize {
        match &self.kind {
            Kind::Formula { tape, .. } => tape.work_per_call().max(1),
            Kind::Mixture { mixture, .. } => {
                mixture.components.len() * (self.dim() + 2) * (self.dim() + 2)
            }
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn transforms_round_trip_and_have_the_right_jacobian() {
        for t in [
            Transform::Free,
            Transform::Lower(2.0),
            Transform::Upper(-1.0),
            Transform::Interval(-3.0, 5.0),
        ] {
            for &z in &[-3.0, -0.2, 0.0, 0.7, 4.0] {
                let (x, dxdz, lj, dlj) = t.with_jacobian(z);
                assert!(
                    (t.to_unconstrained(x).unwrap() - z).abs() < 1e-9,
                    "{t:?} {z}"
                );
                let h = 1e-6;
                let fd = (t.to_user(z + h) - t.to_user(z - h)) / (2.0 * h);
                assert!((fd - dxdz).abs() < 1e-6 * dxdz.abs().max(1.0));
                assert!((ln(dxdz.abs()) - lj).abs() < 1e-9);
                let fd2 = (t.with_jacobian(z + h).2 - t.with_jacobian(z - h).2) / (2.0 * h);
                assert!((fd2 - dlj).abs() < 1e-6);
            }
        }
        // Far out, an interval stays strictly inside its bounds.
        let t = Transform::Interval(0.0, 1.0);
        assert!(t.to_user(30.0) < 1.0 && t.to_user(-30.0) > 0.0);
    }
}
