//! Is a converged point a real, normalisable mode, and how wide is it?
//!
//! Owns: probing the energy along the Hessian's eigenvectors (the rise to 1/2), replacing
//! eigenvalues that disagree with the measured curvature (non-Gaussian modes), rejecting
//! saddles, and the plain-words diagnosis of densities that are not normalisable.
//! Must not: search for modes.

use super::optimiser::{axpy, beyond_edge};
use crate::common::error::KilnError;
use crate::common::format::num;
use crate::common::maths::sqrt;
use crate::model::target::{Target, TargetEval, Transform};
use nalgebra::{DMatrix, SymmetricEigen};

/// What probing the energy along one direction found.
pub(super) enum Probe {
    /// Distance at which the energy has risen by 1/2 (in units of the direction vector).
    Rise(f64),
    /// The energy fell below the mode's: not a minimum.
    Lower(Vec<f64>),
    /// No rise out to the edge: flat or falling for ever.
    Flat,
}

pub(super) fn probe(
    ev: &mut TargetEval,
    z: &[f64],
    f0: f64,
    v: &[f64],
    guess: f64,
    transforms: &[Transform],
) -> Probe {
    let rise = |ev: &mut TargetEval, t: f64| -> (f64, Vec<f64>) {
        let p = axpy(z, t, v);
        (ev.energy(&p) - f0, p)
    };
    let tol = 1e-7 * (1.0 + f0.abs());
    // A lower point past the edge of the space means the energy falls for ever that way.
    let lower = |p: Vec<f64>| {
        if beyond_edge(&p, transforms) {
            Probe::Flat
        } else {
            Probe::Lower(p)
        }
    };
    let mut t = guess.clamp(1e-12, 1e12);
    let (r, p) = rise(ev, t);
    if r < -tol {
        return lower(p);
    }
    // Expand until the rise exceeds 1/2, or shrink until it is below.
    let (mut lo, mut hi);
    if r < 0.5 {
        lo = t;
        loop {
            t *= 2.0;
            let (rr, p) = rise(ev, t);
            if rr < -tol {
                return lower(p);
            }
            if rr >= 0.5 {
                hi = t;
                break;
            }
            lo = t;
            if t > 1e13 || beyond_edge(&p, transforms) {
                return Probe::Flat;
            }
        }
    } else {
        hi = t;
        loop {
            t *= 0.5;
            let (rr, p) = rise(ev, t);
            if rr < -tol {
                return lower(p);
            }
            if rr < 0.5 {
                lo = t;
                break;
            }
            hi = t;
            if t < 1e-300 {
                return Probe::Rise(t);
            }
        }
    }
    for _ in 0..30 {
        let mid = 0.5 * (lo + hi);
        let (rr, p) = rise(ev, mid);
        if rr < -tol {
            return lower(p);
        }
        if rr >= 0.5 {
            hi = mid;
        } else {
            lo = mid;
        }
        if hi - lo < 1e-3 * hi {
            break;
        }
    }
    Probe::Rise(0.5 * (lo + hi))
}

/// The result of checking a Hessian against the energy's actual rise along its eigenvectors.
pub(super) enum Curvature {
    Ok {
        hessian: Vec<f64>,
        non_quadratic: bool,
    },
    NotMinimum(Vec<f64>),
    Flat {
        direction: Vec<f64>,
    },
}

/// Checks the Hessian at a candidate mode. Along each eigenvector the energy's rise to 1/2 is
/// measured; where the eigenvalue disagrees with that measured curvature by more than a factor
/// of 10 (a flat-topped or cusped mode, or a near-singular Hessian) the measured curvature
/// replaces it, so that the Laplace mass stays sensible. For a normal density the two agree
/// and the Hessian is used unchanged, as the method requires.
pub(super) fn curvature_check(
    ev: &mut TargetEval,
    z: &[f64],
    f0: f64,
    h: &[f64],
    transforms: &[Transform],
) -> Curvature {
    let d = z.len();
    let m = DMatrix::from_row_slice(d, d, h);
    let eig = SymmetricEigen::new(m);
    let mut lambdas = eig.eigenvalues.as_slice().to_vec();
    let vectors = eig.eigenvectors;
    let mut changed = false;
    for k in 0..d {
        let v: Vec<f64> = vectors.column(k).iter().copied().collect();
        let lam = lambdas[k];
        let guess = if lam > 0.0 && lam.is_finite() {
            1.0 / sqrt(lam)
        } else {
            1.0
        };
        let mut measured = Vec::new();
        for sign in [1.0, -1.0] {
            let dir: Vec<f64> = v.iter().map(|c| sign * c).collect();
            match probe(ev, z, f0, &dir, guess, transforms) {
                Probe::Rise(t) => measured.push(t),
                Probe::Lower(p) => return Curvature::NotMinimum(p),
                Probe::Flat => return Curvature::Flat { direction: dir },
            }
        }
        let t = 0.5 * (measured[0] + measured[1]);
        // E rises by 1/2 at distance t when the curvature is 1/t².
        let secant = 1.0 / (t * t);
        if !(lam > 0.1 * secant && lam < 10.0 * secant) {
            lambdas[k] = secant;
            changed = true;
        }
    }
    if !changed {
        return Curvature::Ok {
            hessian: h.to_vec(),
            non_quadratic: false,
        };
    }
    let l = DMatrix::from_diagonal(&nalgebra::DVector::from_vec(lambdas));
    let rebuilt = &vectors * l * vectors.transpose();
    let mut out = vec![0.0; d * d];
    for i in 0..d {
        for j in 0..d {
            out[i * d + j] = 0.5 * (rebuilt[(i, j)] + rebuilt[(j, i)]);
        }
    }
    Curvature::Ok {
        hessian: out,
        non_quadratic: true,
    }
}

pub(super) fn escape_variable(from: &[f64], to: &[f64], names: &[String]) -> String {
    let i = (0..from.len())
        .max_by(|&a, &b| (to[a] - from[a]).abs().total_cmp(&(to[b] - from[b]).abs()))
        .unwrap_or(0);
    names.get(i).cloned().unwrap_or_default()
}

pub(super) fn describe_point(target: &Target, z: &[f64]) -> String {
    let x = target.to_user(z);
    target
        .names
        .iter()
        .zip(&x)
        .map(|(n, v)| format!("{n} = {}", num(*v)))
        .collect::<Vec<_>>()
        .join(", ")
}

pub(super) fn improper(target: &Target, name: &str, z: &[f64]) -> KilnError {
    KilnError::density(format!("the density does not seem to be normalisable along `{name}`"))
        .with_hint(format!(
            "the energy stays flat or keeps falling as `{name}` moves away (seen near {}); bound `{name}` or add a term that makes the energy rise, such as a prior",
            describe_point(target, z)
        ))
}
