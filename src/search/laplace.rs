//! modes → the base approximation q and its normaliser estimate log ζ.
//!
//! Owns: the Laplace mixture of the method note: for each mode m_k with Hessian H_k,
//! `L_k = exp(−E(m_k)) (2π)^{D/2} det(H_k)^{−1/2}`, `ζ = Σ_k L_k`, and
//! `q = Σ_k (L_k/ζ) N(m_k, H_k⁻¹)`, all in unconstrained coordinates.
//! Must not: search for modes, sample, or decide which estimate to trust.

use crate::common::error::KilnError;
use crate::common::gaussian::{Gaussian, Mixture};
use crate::common::maths::{exp, log_sum_exp, LN_2PI};
use crate::search::modes::Mode;
use nalgebra::DMatrix;

/// The Laplace approximation at a set of modes.
#[derive(Clone, Debug)]
pub struct Laplace {
    /// log ζ = log Σ_k L_k, the Laplace estimate of log Z.
    pub log_zeta: f64,
    /// log L_k per mode, in the order of the modes given.
    pub log_l: Vec<f64>,
    /// q: the normalised mixture Σ (L_k/ζ) N(m_k, H_k⁻¹).
    pub base: Mixture,
}

impl Laplace {
    pub fn from_modes(modes: &[Mode]) -> Result<Laplace, KilnError> {
        if modes.is_empty() {
            return Err(KilnError::density(
                "no mode was found, so there is nothing to approximate",
            ));
        }
        let d = modes[0].z.len();
        let mut log_l = Vec::with_capacity(modes.len());
        let mut comps = Vec::with_capacity(modes.len());
        for m in modes {
            let h = DMatrix::from_row_slice(d, d, &m.hessian);
            let chol = h.clone().cholesky().ok_or_else(|| {
                KilnError::density("a mode's Hessian is not positive definite")
                    .with_hint("the density may be flat or not normalisable near a mode")
            })?;
            let log_det_h: f64 = 2.0
                * chol
                    .l()
                    .diagonal()
                    .iter()
                    .map(|v| crate::common::maths::ln(*v))
                    .sum::<f64>();
            let cov = chol.inverse();
            let flat: Vec<f64> = (0..d)
                .flat_map(|i| (0..d).map(move |j| (i, j)))
                .map(|(i, j)| 0.5 * (cov[(i, j)] + cov[(j, i)]))
                .collect();
            let g = Gaussian::from_flat(m.z.clone(), &flat, f64::INFINITY).ok_or_else(|| {
                KilnError::density("a mode's covariance is not positive definite")
            })?;
            log_l.push(-m.energy + 0.5 * d as f64 * LN_2PI - 0.5 * log_det_h);
            comps.push(g);
        }
        let log_zeta = log_sum_exp(&log_l);
        let weights: Vec<f64> = log_l.iter().map(|l| exp(l - log_zeta)).collect();
        Ok(Laplace {
            log_zeta,
            log_l: log_l.clone(),
            base: Mixture::new(comps, &weights),
        })
    }

    /// The Laplace mass of each mode, L_k / ζ.
    pub fn masses(&self) -> Vec<f64> {
        self.log_l.iter().map(|l| exp(l - self.log_zeta)).collect()
    }

    /// Marginal standard deviations of component k (unconstrained coordinates).
    pub fn component_sd(&self, k: usize) -> Vec<f64> {
        let c = &self.base.components[k];
        let s = c.scale_matrix();
        (0..c.dim)
            .map(|i| crate::common::maths::sqrt(s[i * c.dim + i]))
            .collect()
    }
}
