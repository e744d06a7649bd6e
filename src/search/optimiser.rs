//! Local minimisation of the energy: BFGS with a strong-Wolfe line search (Nocedal & Wright
//! 2006, "Numerical Optimization", algorithms 3.5–3.6 and 6.1), the edge of the space, and the
//! central-difference Hessian of the exact gradient.
//!
//! Owns: [`minimize`] and its [`Descent`], the edges of the unconstrained space, [`hessian`].
//! Must not: decide what is a mode (that is `modes`).

use crate::common::maths::sqrt;
use crate::model::target::{TargetEval, Transform};

/// Outcome of one minimisation.
pub enum Descent {
    Converged {
        z: Vec<f64>,
        f: f64,
        inv_hessian_diag: Vec<f64>,
    },
    /// The energy kept falling while coordinate `along` ran off towards the edge of the space.
    Escaped { z: Vec<f64>, along: usize },
    /// The energy was −∞ here.
    Infinite { z: Vec<f64> },
    /// The start itself had no finite energy (or, with `gradient_only`, a non-finite gradient).
    BadStart { energy: f64, gradient_only: bool },
}

/// How far out `z` may go before we call it an escape.
pub(super) fn coordinate_beyond_edge(z: f64, t: &Transform) -> bool {
    match t {
        Transform::Free => z.abs() > 1e12,
        Transform::Lower(_) | Transform::Upper(_) => !(-60.0..=300.0).contains(&z),
        Transform::Interval(..) => z.abs() > 60.0,
    }
}

pub(super) fn beyond_edge(z: &[f64], transforms: &[Transform]) -> bool {
    z.iter()
        .zip(transforms)
        .any(|(z, t)| coordinate_beyond_edge(*z, t))
}

/// The first coordinate that is past the edge of the space with the energy still falling
/// outwards along it (gradient pointing back inwards), if any.
pub(super) fn falling_outwards(z: &[f64], g: &[f64], transforms: &[Transform]) -> Option<usize> {
    (0..z.len())
        .find(|&i| coordinate_beyond_edge(z[i], &transforms[i]) && g[i] * z[i].signum() < 0.0)
}

struct Objective<'a> {
    ev: &'a mut TargetEval,
    g: Vec<f64>,
}

impl<'a> Objective<'a> {
    fn eval(&mut self, z: &[f64]) -> (f64, Vec<f64>) {
        let f = self.ev.energy_grad(z, &mut self.g);
        (f, self.g.clone())
    }
}

pub(super) fn dot(a: &[f64], b: &[f64]) -> f64 {
    a.iter().zip(b).map(|(x, y)| x * y).sum()
}

pub(super) fn axpy(z: &[f64], a: f64, p: &[f64]) -> Vec<f64> {
    z.iter().zip(p).map(|(z, p)| z + a * p).collect()
}

/// Strong-Wolfe line search along `p` from `z` (Nocedal & Wright, algorithms 3.5 and 3.6).
/// Returns (step, f, g) or `None` if no acceptable step was found.
fn line_search(
    obj: &mut Objective,
    z: &[f64],
    f0: f64,
    g0: &[f64],
    p: &[f64],
    a_max: f64,
) -> Option<(f64, f64, Vec<f64>)> {
    let (c1, c2) = (1e-4, 0.9);
    let d0 = dot(g0, p);
    if !(d0 < 0.0) {
        return None;
    }
    let mut a_prev = 0.0;
    let mut f_prev = f0;
    let mut d_prev = d0;
    let mut a = a_max.min(1.0);
    for i in 0..40 {
        let (f, g) = obj.eval(&axpy(z, a, p));
        if f == f64::NEG_INFINITY {
            return Some((a, f, g));
        }
        if !f.is_finite() || f > f0 + c1 * a * d0 || (i > 0 && f >= f_prev) {
            return zoom(obj, z, f0, d0, p, a_prev, f_prev, d_prev, a);
        }
        let d = dot(&g, p);
        if d.abs() <= -c2 * d0 {
            return Some((a, f, g));
        }
        if d >= 0.0 {
            return zoom(obj, z, f0, d0, p, a, f, d, a_prev);
        }
        if a >= a_max {
            // Still falling at the longest step allowed: take it; the caller watches for escapes.
            return Some((a, f, g));
        }
        a_prev = a;
        f_prev = f;
        d_prev = d;
        a = (4.0 * a).min(a_max);
    }
    let (f, g) = obj.eval(&axpy(z, a_prev, p));
    Some((a_prev, f, g))
}

#[allow(clippy::too_many_arguments)]
fn zoom(
    obj: &mut Objective,
    z: &[f64],
    f0: f64,
    d0: f64,
    p: &[f64],
    mut lo: f64,
    mut f_lo: f64,
    mut d_lo: f64,
    mut hi: f64,
) -> Option<(f64, f64, Vec<f64>)> {
    let (c1, c2) = (1e-4, 0.9);
    let mut f_hi = f64::NAN;
    for _ in 0..60 {
        // Minimiser of the quadratic through (lo, f_lo, d_lo) and (hi, f_hi), kept well inside
        // the bracket; bisection otherwise.
        let w = hi - lo;
        let mut a = lo + 0.5 * w;
        if f_hi.is_finite() {
            let c = (f_hi - f_lo - d_lo * w) / (w * w);
            if c > 0.0 {
                let q = lo - d_lo / (2.0 * c);
                let t = (q - lo) / w;
                if t.is_finite() && t > 0.1 && t < 0.9 {
                    a = q;
                }
            }
        }
        let (f, g) = obj.eval(&axpy(z, a, p));
        if f == f64::NEG_INFINITY {
            return Some((a, f, g));
        }
        if !f.is_finite() || f > f0 + c1 * a * d0 || f >= f_lo {
            hi = a;
            f_hi = f;
        } else {
            let d = dot(&g, p);
            if d.abs() <= -c2 * d0 {
                return Some((a, f, g));
            }
            if d * (hi - lo) >= 0.0 {
                hi = lo;
                f_hi = f_lo;
            }
            lo = a;
            f_lo = f;
            d_lo = d;
        }
        if (hi - lo).abs() <= 1e-15 * lo.abs().max(hi.abs()) {
            break;
        }
    }
    if lo > 0.0 && f_lo < f0 {
        let (f, g) = obj.eval(&axpy(z, lo, p));
        return Some((lo, f, g));
    }
    None
}

/// BFGS from `z0`.
pub(super) fn minimize(ev: &mut TargetEval, z0: Vec<f64>, transforms: &[Transform]) -> Descent {
    let d = z0.len();
    let mut obj = Objective {
        ev,
        g: vec![0.0; d],
    };
    let (mut f, mut g) = obj.eval(&z0);
    if f == f64::NEG_INFINITY {
        return Descent::Infinite { z: z0 };
    }
    if !f.is_finite() || g.iter().any(|v| !v.is_finite()) {
        return Descent::BadStart {
            energy: f,
            gradient_only: f.is_finite(),
        };
    }
    let mut z = z0.clone();
    let mut h: Vec<f64> = vec![0.0; d * d];
    for i in 0..d {
        h[i * d + i] = 1.0;
    }
    let mut first = true;
    let mut stalls = 0;
    let mut outside = 0;
    for _iter in 0..2000 {
        // Converged when the gradient, measured in the current standard deviations, is tiny.
        let scaled = (0..d)
            .map(|i| (g[i] * sqrt(h[i * d + i].abs())).abs())
            .fold(0.0, f64::max);
        if !first && scaled < 1e-7 {
            break;
        }
        let mut p: Vec<f64> = (0..d)
            .map(|i| -(0..d).map(|j| h[i * d + j] * g[j]).sum::<f64>())
            .collect();
        if first {
            let n = sqrt(dot(&g, &g));
            if n > 0.0 {
                p = g.iter().map(|v| -v / n).collect();
            }
        }
        if dot(&p, &g) >= 0.0 {
            // Lost descent: restart from steepest descent.
            for i in 0..d {
                for j in 0..d {
                    h[i * d + j] = if i == j { 1.0 } else { 0.0 };
                }
            }
            p = g.iter().map(|v| -v).collect();
        }
        // Longest step: 10 units, or twice the distance from the origin, in the max norm.
        let p_max = p.iter().fold(0.0f64, |m, v| m.max(v.abs()));
        let z_max = z.iter().fold(0.0f64, |m, v| m.max(v.abs()));
        let a_max = if p_max > 0.0 {
            (10.0f64).max(2.0 * z_max) / p_max
        } else {
            1.0
        };
        let Some((a, f_new, g_new)) = line_search(&mut obj, &z, f, &g, &p, a_max) else {
            break;
        };
        let z_new = axpy(&z, a, &p);
        if f_new == f64::NEG_INFINITY {
            // −∞ because a coordinate ran off to infinity is an escape, not a singularity.
            if let Some(i) = (0..d).find(|&i| coordinate_beyond_edge(z_new[i], &transforms[i])) {
                return Descent::Escaped { z: z_new, along: i };
            }
            return Descent::Infinite { z: z_new };
        }
        // Past the edge along a coordinate and still falling outwards along it, several steps
        // running: escaped.
        match falling_outwards(&z_new, &g_new, transforms) {
            Some(i) => {
                outside += 1;
                if outside >= 3 {
                    return Descent::Escaped { z: z_new, along: i };
                }
            }
            None => outside = 0,
        }
        let s: Vec<f64> = (0..d).map(|i| z_new[i] - z[i]).collect();
        let y: Vec<f64> = (0..d).map(|i| g_new[i] - g[i]).collect();
        let sy = dot(&s, &y);
        if first && sy > 0.0 {
            let scale = sy / dot(&y, &y);
            for v in h.iter_mut() {
                *v *= scale;
            }
        }
        if sy > 1e-300 {
            // H ← (I − ρ s yᵀ) H (I − ρ y sᵀ) + ρ s sᵀ
            let rho = 1.0 / sy;
            let hy: Vec<f64> = (0..d)
                .map(|i| (0..d).map(|j| h[i * d + j] * y[j]).sum())
                .collect();
            let yhy = dot(&y, &hy);
            for i in 0..d {
                for j in 0..d {
                    h[i * d + j] += -rho * (hy[i] * s[j] + s[i] * hy[j])
                        + (rho * rho * yhy + rho) * s[i] * s[j];
                }
            }
        }
        let rel = (f - f_new).abs() / (1.0 + f.abs());
        stalls = if rel < 1e-15 { stalls + 1 } else { 0 };
        z = z_new;
        f = f_new;
        g = g_new;
        first = false;
        if stalls >= 3 {
            break;
        }
    }
    let inv_hessian_diag = (0..d).map(|i| h[i * d + i].abs()).collect();
    Descent::Converged {
        z,
        f,
        inv_hessian_diag,
    }
}

/// Central-difference Hessian of the exact gradient, symmetrised. `steps[i]`: step along z_i.
pub(super) fn hessian(ev: &mut TargetEval, z: &[f64], steps: &[f64]) -> Vec<f64> {
    let d = z.len();
    let mut h = vec![0.0; d * d];
    let mut gp = vec![0.0; d];
    let mut gm = vec![0.0; d];
    let mut zz = z.to_vec();
    for i in 0..d {
        zz[i] = z[i] + steps[i];
        ev.energy_grad(&zz, &mut gp);
        zz[i] = z[i] - steps[i];
        ev.energy_grad(&zz, &mut gm);
        zz[i] = z[i];
        for j in 0..d {
            h[j * d + i] = (gp[j] - gm[j]) / (2.0 * steps[i]);
        }
    }
    for i in 0..d {
        for j in 0..i {
            let m = 0.5 * (h[i * d + j] + h[j * d + i]);
            h[i * d + j] = m;
            h[j * d + i] = m;
        }
    }
    h
}
