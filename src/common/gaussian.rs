//! Multivariate normal and Student-t densities and their mixtures, on flat arrays.
//!
//! Owns: Cholesky factors, log densities with gradients, exact draws, and the moments of a
//! mixture. Used twice: by mixture targets (the user's Gaussian mixture) and by the base
//! approximation q of the sampler (a Laplace mixture, possibly refitted).
//! Must not: know about specs, formulas or samplers.

use crate::common::maths::{exp, lgamma, ln, log_sum_exp, LN_2PI};
use crate::common::rng::Stream;

/// A multivariate normal (or, with finite `nu`, Student-t) component with a dense covariance.
#[derive(Clone, Debug)]
pub struct Gaussian {
    pub dim: usize,
    pub mean: Vec<f64>,
    /// Lower Cholesky factor of the covariance (or scale matrix), row-major `dim × dim`.
    pub chol: Vec<f64>,
    /// log det of the covariance.
    pub log_det: f64,
    /// Degrees of freedom; `f64::INFINITY` for a normal.
    pub nu: f64,
    /// Normalising constant of the log density.
    log_norm: f64,
}

/// Lower Cholesky factor of a symmetric matrix (row-major), or `None` if not positive definite.
pub fn cholesky(a: &[f64], d: usize) -> Option<Vec<f64>> {
    let mut l = vec![0.0; d * d];
    for i in 0..d {
        for j in 0..=i {
            let mut s = a[i * d + j];
            for k in 0..j {
                s -= l[i * d + k] * l[j * d + k];
            }
            if i == j {
                if !(s > 0.0) || !s.is_finite() {
                    return None;
                }
                l[i * d + i] = crate::common::maths::sqrt(s);
            } else {
                l[i * d + j] = s / l[j * d + j];
            }
        }
    }
    Some(l)
}

impl Gaussian {
    /// A normal from a mean and a covariance given as rows; `None` if not positive definite.
    pub fn new(mean: &[f64], cov: &[Vec<f64>]) -> Option<Gaussian> {
        let d = mean.len();
        let flat: Vec<f64> = cov.iter().flat_map(|r| r.iter().copied()).collect();
        if flat.len() != d * d {
            return None;
        }
        Gaussian::from_flat(mean.to_vec(), &flat, f64::INFINITY)
    }

    /// From a mean and a row-major covariance; finite `nu` gives a Student-t.
    pub fn from_flat(mean: Vec<f64>, cov: &[f64], nu: f64) -> Option<Gaussian> {
        let d = mean.len();
        let chol = cholesky(cov, d)?;
        let log_det = 2.0 * (0..d).map(|i| ln(chol[i * d + i])).sum::<f64>();
        let df = d as f64;
        let log_norm = if nu.is_finite() {
            lgamma(0.5 * (nu + df))
                - lgamma(0.5 * nu)
                - 0.5 * df * ln(nu * crate::common::maths::PI)
                - 0.5 * log_det
        } else {
            -0.5 * df * LN_2PI - 0.5 * log_det
        };
        if !log_norm.is_finite() {
            return None;
        }
        Some(Gaussian {
            dim: d,
            mean,
            chol,
            log_det,
            nu,
            log_norm,
        })
    }

    /// Solves L y = x − mean into `y`; returns |y|².
    fn whiten(&self, x: &[f64], y: &mut [f64]) -> f64 {
        // With no limit the partial sum never passes it (a NaN sum is not greater either).
        self.whiten_until(x, y, f64::INFINITY)
            .unwrap_or(f64::INFINITY)
    }

    /// Log density at `x`. `scratch` needs `dim` entries; it is left holding the whitened
    /// coordinates L⁻¹(x − mean).
    pub fn log_density(&self, x: &[f64], scratch: &mut [f64]) -> f64 {
        let q = self.whiten(x, scratch);
        self.log_norm + self.shape(q)
    }

    /// Like `whiten`, but gives up (`None`) as soon as the partial sum of squares passes
    /// `q_max` (it only grows with each coordinate).
    fn whiten_until(&self, x: &[f64], y: &mut [f64], q_max: f64) -> Option<f64> {
        let d = self.dim;
        let mut q = 0.0;
        for i in 0..d {
            let mut s = x[i] - self.mean[i];
            for k in 0..i {
                s -= self.chol[i * d + k] * y[k];
            }
            y[i] = s / self.chol[i * d + i];
            q += y[i] * y[i];
            if q > q_max {
                return None;
            }
        }
        Some(q)
    }

    /// The squared whitened distance beyond which the log density falls more than `gap` below
    /// its value at the mean (∞ if it never does). For a Student-t, from the bound
    /// log(1 + u) ≥ u/(1 + u), which needs no transcendental function.
    fn q_limit(&self, gap: f64) -> f64 {
        if !(gap < f64::INFINITY) {
            return f64::INFINITY;
        }
        if !self.nu.is_finite() {
            return 2.0 * gap.max(0.0);
        }
        let c = 2.0 * gap.max(0.0) / (self.nu + self.dim as f64);
        if c >= 1.0 {
            f64::INFINITY
        } else {
            self.nu * c / (1.0 - c)
        }
    }

    fn shape(&self, q: f64) -> f64 {
        if self.nu.is_finite() {
            -0.5 * (self.nu + self.dim as f64) * crate::common::maths::ln_1p(q / self.nu)
        } else {
            -0.5 * q
        }
    }

    /// Log density at `x`, and its gradient (∂/∂x) written to `grad`. `scratch`: `dim` entries.
    pub fn log_density_grad(&self, x: &[f64], grad: &mut [f64], scratch: &mut [f64]) -> f64 {
        let d = self.dim;
        let q = self.whiten(x, scratch);
        // Σ⁻¹(x − m) = L⁻ᵀ y: back substitution.
        for i in (0..d).rev() {
            let mut s = scratch[i];
            for k in i + 1..d {
                s -= self.chol[k * d + i] * grad[k];
            }
            grad[i] = s / self.chol[i * d + i];
        }
        let factor = if self.nu.is_finite() {
            (self.nu + d as f64) / (self.nu + q)
        } else {
            1.0
        };
        for g in grad.iter_mut().take(d) {
            *g *= -factor;
        }
        self.log_norm + self.shape(q)
    }

    /// An exact draw, written to `out`.
    pub fn sample(&self, rng: &mut Stream, out: &mut [f64], scratch: &mut [f64]) {
        let d = self.dim;
        for s in scratch.iter_mut().take(d) {
            *s = rng.normal();
        }
        let scale = if self.nu.is_finite() {
            crate::common::maths::sqrt(self.nu / rng.chi_square(self.nu))
        } else {
            1.0
        };
        for i in 0..d {
            let mut v = 0.0;
            for k in 0..=i {
                v += self.chol[i * d + k] * scratch[k];
            }
            out[i] = self.mean[i] + scale * v;
        }
    }

    /// The covariance (Σ = L Lᵀ; for a Student-t, the scale matrix), row-major.
    pub fn scale_matrix(&self) -> Vec<f64> {
        let d = self.dim;
        let mut c = vec![0.0; d * d];
        for i in 0..d {
            for j in 0..d {
                c[i * d + j] = (0..=i.min(j))
                    .map(|k| self.chol[i * d + k] * self.chol[j * d + k])
                    .sum();
            }
        }
        c
    }
}

/// A component more than this many nats below the mixture's largest term is left out of its
/// log density (see `Mixture::log_terms`).
pub const NEGLIGIBLE: f64 = 50.0;

/// A weighted mixture; weights are kept as normalised log weights.
#[derive(Clone, Debug)]
pub struct Mixture {
    pub dim: usize,
    pub components: Vec<Gaussian>,
    pub log_weights: Vec<f64>,
}

/// Scratch memory for mixture evaluation, so calls do not allocate.
#[derive(Clone, Debug)]
pub struct MixtureScratch {
    y: Vec<f64>,
    g: Vec<f64>,
    terms: Vec<f64>,
}

impl Mixture {
    /// From components and positive (unnormalised) weights.
    pub fn new(components: Vec<Gaussian>, weights: &[f64]) -> Mixture {
        let logs: Vec<f64> = weights.iter().map(|w| ln(*w)).collect();
        let total = log_sum_exp(&logs);
        Mixture {
            dim: components.first().map_or(0, |c| c.dim),
            components,
            log_weights: logs.iter().map(|l| l - total).collect(),
        }
    }

    pub fn scratch(&self) -> MixtureScratch {
        MixtureScratch {
            y: vec![0.0; self.dim],
            g: vec![0.0; self.dim],
            terms: vec![0.0; self.components.len()],
        }
    }

    pub fn weights(&self) -> Vec<f64> {
        self.log_weights.iter().map(|l| exp(*l)).collect()
    }

    pub fn log_density(&self, x: &[f64], s: &mut MixtureScratch) -> f64 {
        self.log_terms(x, s);
        log_sum_exp(&s.terms)
    }

    /// log(w_k q_k(x)) for every component into `s.terms`, except that a component whose term
    /// is certainly more than [`NEGLIGIBLE`] nats below the largest term so far is set to −∞
    /// without finishing its whitening (it changes the mixture's log density by less than
    /// e^−50 relative, below rounding). With many components, most are far from any given
    /// point and this skips most of the work.
    fn log_terms(&self, x: &[f64], s: &mut MixtureScratch) {
        let mut best = f64::NEG_INFINITY;
        for (k, c) in self.components.iter().enumerate() {
            let top = self.log_weights[k] + c.log_norm;
            let floor = best - NEGLIGIBLE;
            if top < floor {
                s.terms[k] = f64::NEG_INFINITY;
                continue;
            }
            s.terms[k] = match c.whiten_until(x, &mut s.y, c.q_limit(top - floor)) {
                Some(q) => top + c.shape(q),
                None => f64::NEG_INFINITY,
            };
            if s.terms[k] > best {
                best = s.terms[k];
            }
        }
    }

    /// Log density and its gradient.
    pub fn log_density_grad(&self, x: &[f64], grad: &mut [f64], s: &mut MixtureScratch) -> f64 {
        let d = self.dim;
        for g in grad.iter_mut().take(d) {
            *g = 0.0;
        }
        if self.components.len() == 1 {
            return self.log_weights[0] + self.components[0].log_density_grad(x, grad, &mut s.y);
        }
        self.log_terms(x, s);
        let total = log_sum_exp(&s.terms);
        for k in 0..self.components.len() {
            let r = exp(s.terms[k] - total);
            if r < 1e-300 {
                continue;
            }
            self.components[k].log_density_grad(x, &mut s.g, &mut s.y);
            for i in 0..d {
                grad[i] += r * s.g[i];
            }
        }
        total
    }

    /// log p(component k | x) for every k, written to `out`.
    pub fn responsibilities(&self, x: &[f64], out: &mut [f64], s: &mut MixtureScratch) {
        self.log_terms(x, s);
        let total = log_sum_exp(&s.terms);
        for k in 0..self.components.len() {
            out[k] = s.terms[k] - total;
        }
    }

    /// An exact draw; returns the component it came from.
    pub fn sample(&self, rng: &mut Stream, out: &mut [f64], s: &mut MixtureScratch) -> usize {
        let u = rng.uniform();
        let mut acc = 0.0;
        let mut pick = self.components.len() - 1;
        for (k, lw) in self.log_weights.iter().enumerate() {
            acc += exp(*lw);
            if u < acc {
                pick = k;
                break;
            }
        }
        self.components[pick].sample(rng, out, &mut s.y);
        pick
    }

    /// Exact mean and covariance (row-major) of a mixture of normals.
    pub fn moments(&self) -> (Vec<f64>, Vec<f64>) {
        let d = self.dim;
        let w = self.weights();
        let mut mean = vec![0.0; d];
        for (k, c) in self.components.iter().enumerate() {
            for i in 0..d {
                mean[i] += w[k] * c.mean[i];
            }
        }
        let mut cov = vec![0.0; d * d];
        for (k, c) in self.components.iter().enumerate() {
            let s = c.scale_matrix();
            for i in 0..d {
                for j in 0..d {
                    cov[i * d + j] +=
                        w[k] * (s[i * d + j] + (c.mean[i] - mean[i]) * (c.mean[j] - mean[j]));
                }
            }
        }
        (mean, cov)
    }
}

/// Whitening by a mixture's within-mode covariance Σ_k w_k Σ_k = L Lᵀ: z = L q. The chains'
/// dense metric and every benchmark baseline move in these coordinates (one implementation, so
/// that the comparison is between methods, not between metrics).
#[derive(Clone, Debug)]
pub struct Whitening {
    d: usize,
    /// L, row-major lower triangle.
    l: Vec<f64>,
    /// L⁻¹, row-major.
    l_inv: Vec<f64>,
}

impl Whitening {
    /// `None` when the within-mode covariance is not positive definite.
    pub fn new(q: &Mixture) -> Option<Whitening> {
        let d = q.dim;
        let w = q.weights();
        let total: f64 = w.iter().sum();
        let mut c = vec![0.0; d * d];
        for (k, comp) in q.components.iter().enumerate() {
            let s = comp.scale_matrix();
            for ij in 0..d * d {
                c[ij] += w[k] / total * s[ij];
            }
        }
        let l = cholesky(&c, d)?;
        let l_inv = lower_inverse(&l, d);
        Some(Whitening { d, l, l_inv })
    }

    pub fn dim(&self) -> usize {
        self.d
    }

    /// z = L q.
    pub fn to_z(&self, q: &[f64], z: &mut [f64]) {
        let d = self.d;
        for i in 0..d {
            z[i] = (0..=i).map(|k| self.l[i * d + k] * q[k]).sum();
        }
    }

    /// q = L⁻¹ z.
    pub fn to_q(&self, z: &[f64]) -> Vec<f64> {
        let d = self.d;
        (0..d)
            .map(|i| (0..=i).map(|k| self.l_inv[i * d + k] * z[k]).sum())
            .collect()
    }

    /// ∂U/∂q = Lᵀ ∂U/∂z.
    pub fn grad_to_q(&self, gz: &[f64], gq: &mut [f64]) {
        let d = self.d;
        for k in 0..d {
            gq[k] = (k..d).map(|i| self.l[i * d + k] * gz[i]).sum();
        }
    }
}

/// The inverse of a lower-triangular matrix (row-major), column by column.
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

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn normal_log_density_and_gradient() {
        let g = Gaussian::new(&[1.0, -1.0], &[vec![2.0, 0.6], vec![0.6, 1.0]]).unwrap();
        let x = [0.3, 0.4];
        let mut s = [0.0; 2];
        let mut grad = [0.0; 2];
        let v = g.log_density_grad(&x, &mut grad, &mut s);
        // By hand: Σ⁻¹ = [[1, −0.6], [−0.6, 2]] / 1.64.
        let (dx, dy) = (x[0] - 1.0, x[1] + 1.0);
        let det: f64 = 2.0 - 0.36;
        let q = (dx * dx * 1.0 - 2.0 * 0.6 * dx * dy + 2.0 * dy * dy) / det;
        let want = -0.5 * q - LN_2PI - 0.5 * ln(det);
        assert!((v - want).abs() < 1e-13);
        let gx = -(1.0 * dx - 0.6 * dy) / det;
        let gy = -(-0.6 * dx + 2.0 * dy) / det;
        assert!((grad[0] - gx).abs() < 1e-13 && (grad[1] - gy).abs() < 1e-13);
    }

    #[test]
    fn mixture_moments_are_exact() {
        let a = Gaussian::new(&[-2.0], &[vec![0.25]]).unwrap();
        let b = Gaussian::new(&[3.0], &[vec![1.0]]).unwrap();
        let m = Mixture::new(vec![a, b], &[1.0, 3.0]);
        let (mean, cov) = m.moments();
        // mean = 0.25·(−2) + 0.75·3; var = Σ w (σ² + (μ − mean)²).
        let mu = 0.25 * -2.0 + 0.75 * 3.0;
        assert!((mean[0] - mu).abs() < 1e-15);
        let var =
            0.25 * (0.25 + (-2.0 - mu) * (-2.0 - mu)) + 0.75 * (1.0 + (3.0 - mu) * (3.0 - mu));
        assert!((cov[0] - var).abs() < 1e-14);
    }

    #[test]
    fn skipping_negligible_components_keeps_the_mixture_density() {
        // 60 components (normal and Student-t) spread over a wide box: the mixture's log density
        // and its gradient, computed with the skip, against the plain log-sum-exp over every
        // component's own log density (the definition).
        let mut rng = crate::common::rng::Stream::new(3, crate::common::rng::Purpose::Check, 0);
        let d = 3;
        let mut comps = Vec::new();
        let mut ws = Vec::new();
        for k in 0..60 {
            let mean: Vec<f64> = (0..d).map(|_| 40.0 * (rng.uniform() - 0.5)).collect();
            let s = 0.3 + rng.uniform();
            let mut cov = vec![0.0; d * d];
            for i in 0..d {
                cov[i * d + i] = s * s;
            }
            cov[1] = 0.2 * s * s;
            cov[d] = 0.2 * s * s;
            let nu = if k % 3 == 0 { 3.0 } else { f64::INFINITY };
            comps.push(Gaussian::from_flat(mean, &cov, nu).unwrap());
            ws.push(0.1 + rng.uniform());
        }
        let m = Mixture::new(comps, &ws);
        let mut sc = m.scratch();
        let mut y = vec![0.0; d];
        for _ in 0..500 {
            let x: Vec<f64> = (0..d).map(|_| 50.0 * (rng.uniform() - 0.5)).collect();
            let terms: Vec<f64> = m
                .components
                .iter()
                .zip(&m.log_weights)
                .map(|(c, lw)| lw + c.log_density(&x, &mut y))
                .collect();
            let full = log_sum_exp(&terms);
            let got = m.log_density(&x, &mut sc);
            assert!(
                (got - full).abs() <= 1e-14 * (1.0 + full.abs()),
                "{got} vs {full}"
            );
            let mut g = vec![0.0; d];
            let got2 = m.log_density_grad(&x, &mut g, &mut sc);
            assert!((got2 - full).abs() <= 1e-14 * (1.0 + full.abs()));
        }
    }
}
