//! Stage 5a: target → its modes.
//!
//! Owns: multi-start quasi-Newton minimisation of the energy (BFGS with a strong-Wolfe line
//! search, Nocedal & Wright 2006, "Numerical Optimization", algorithms 3.5–3.6 and 6.1), the
//! spread of starting points, the Hessian at each mode (central differences of the exact
//! gradient), deduplication by Mahalanobis distance, and the plain-words diagnosis of densities
//! that are not normalisable.
//! Must not: build the approximation from the modes (that is `approx`) or sample.

use crate::error::KilnError;
use crate::maths::{ln, sqrt};
use crate::rng::{Purpose, Stream};
use crate::target::{Target, TargetEval, Transform};
use nalgebra::{DMatrix, SymmetricEigen};

/// A local minimum of the energy in unconstrained coordinates.
#[derive(Clone, Debug)]
pub struct Mode {
    /// Location in unconstrained coordinates.
    pub z: Vec<f64>,
    /// Location in the user's coordinates.
    pub x: Vec<f64>,
    /// Energy at `z` in unconstrained coordinates (the log-Jacobian included).
    pub energy: f64,
    /// The user's energy at `x` (the formula as written; −log density for a log density).
    pub user_energy: f64,
    /// Hessian of the energy at `z`, row-major, as used for the Laplace approximation.
    pub hessian: Vec<f64>,
    /// How many optimiser runs ended here.
    pub hits: usize,
    /// True when the finite-difference Hessian was replaced by curvatures measured along its
    /// eigenvectors because the mode is far from quadratic (see [`curvature_check`]).
    pub non_quadratic: bool,
}

/// Everything the mode search found.
#[derive(Clone, Debug)]
pub struct ModeSearch {
    /// Distinct modes, lowest energy first.
    pub modes: Vec<Mode>,
    /// Optimiser starts made.
    pub starts: usize,
    /// Energy-and-gradient evaluations spent.
    pub evaluations: u64,
    /// Plain-words remarks for the report.
    pub notes: Vec<String>,
}

#[derive(Clone, Copy, Debug)]
pub struct SearchOptions {
    /// Most starts.
    pub max_starts: usize,
    /// Stop before `max_starts` once the latter half of the starts found no new mode.
    pub early_stop: bool,
    pub seed: u64,
}

impl SearchOptions {
    /// Default: 40 + 40 D starts, at most 2000.
    pub fn default_for(dim: usize, seed: u64) -> SearchOptions {
        SearchOptions {
            max_starts: (40 + 40 * dim).min(2000),
            early_stop: true,
            seed,
        }
    }
}

const FIRST_PRIMES: [u32; 64] = [
    2, 3, 5, 7, 11, 13, 17, 19, 23, 29, 31, 37, 41, 43, 47, 53, 59, 61, 67, 71, 73, 79, 83, 89, 97,
    101, 103, 107, 109, 113, 127, 131, 137, 139, 149, 151, 157, 163, 167, 173, 179, 181, 191, 193,
    197, 199, 211, 223, 227, 229, 233, 239, 241, 251, 257, 263, 269, 271, 277, 281, 283, 293, 307,
    311,
];

fn radical_inverse(mut i: u64, base: u64) -> f64 {
    let mut f = 1.0;
    let mut r = 0.0;
    while i > 0 {
        f /= base as f64;
        r += f * (i % base) as f64;
        i /= base;
    }
    r
}

/// The k-th starting point in unconstrained coordinates: a randomly shifted Halton point,
/// mapped per unknown (inside the bounds; log-spread for one bound; for unbounded unknowns
/// uniform on ±s with a scale s log-uniform on [1, 100], drawn from one more Halton axis so
/// that scale and position are not correlated).
fn start_point(k: usize, transforms: &[Transform], shift: &[f64]) -> Vec<f64> {
    let d = transforms.len();
    let halton = |axis: usize| -> f64 {
        if k == 0 {
            0.5
        } else {
            (radical_inverse(k as u64, FIRST_PRIMES[axis % FIRST_PRIMES.len()] as u64)
                + shift[axis])
                .fract()
        }
    };
    let scale = crate::maths::exp(ln(100.0) * halton(d));
    transforms
        .iter()
        .enumerate()
        .map(|(i, t)| {
            let u = 0.005 + 0.99 * halton(i);
            match t {
                Transform::Free => scale * (2.0 * u - 1.0),
                Transform::Lower(_) | Transform::Upper(_) => 12.0 * (u - 0.5),
                Transform::Interval(..) => ln(u) - ln(1.0 - u),
            }
        })
        .collect()
}

/// Outcome of one minimisation.
enum Outcome {
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
fn coordinate_beyond_edge(z: f64, t: &Transform) -> bool {
    match t {
        Transform::Free => z.abs() > 1e12,
        Transform::Lower(_) | Transform::Upper(_) => !(-60.0..=300.0).contains(&z),
        Transform::Interval(..) => z.abs() > 60.0,
    }
}

fn beyond_edge(z: &[f64], transforms: &[Transform]) -> bool {
    z.iter()
        .zip(transforms)
        .any(|(z, t)| coordinate_beyond_edge(*z, t))
}

/// The first coordinate that is past the edge of the space with the energy still falling
/// outwards along it (gradient pointing back inwards), if any.
fn falling_outwards(z: &[f64], g: &[f64], transforms: &[Transform]) -> Option<usize> {
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

fn dot(a: &[f64], b: &[f64]) -> f64 {
    a.iter().zip(b).map(|(x, y)| x * y).sum()
}

fn axpy(z: &[f64], a: f64, p: &[f64]) -> Vec<f64> {
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
fn minimize(ev: &mut TargetEval, z0: Vec<f64>, transforms: &[Transform]) -> Outcome {
    let d = z0.len();
    let mut obj = Objective {
        ev,
        g: vec![0.0; d],
    };
    let (mut f, mut g) = obj.eval(&z0);
    if f == f64::NEG_INFINITY {
        return Outcome::Infinite { z: z0 };
    }
    if !f.is_finite() || g.iter().any(|v| !v.is_finite()) {
        return Outcome::BadStart {
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
                return Outcome::Escaped { z: z_new, along: i };
            }
            return Outcome::Infinite { z: z_new };
        }
        // Past the edge along a coordinate and still falling outwards along it, several steps
        // running: escaped.
        match falling_outwards(&z_new, &g_new, transforms) {
            Some(i) => {
                outside += 1;
                if outside >= 3 {
                    return Outcome::Escaped { z: z_new, along: i };
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
    Outcome::Converged {
        z,
        f,
        inv_hessian_diag,
    }
}

/// Central-difference Hessian of the exact gradient, symmetrised. `steps[i]`: step along z_i.
fn hessian(ev: &mut TargetEval, z: &[f64], steps: &[f64]) -> Vec<f64> {
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

/// What probing the energy along one direction found.
enum Probe {
    /// Distance at which the energy has risen by 1/2 (in units of the direction vector).
    Rise(f64),
    /// The energy fell below the mode's: not a minimum.
    Lower(Vec<f64>),
    /// No rise out to the edge: flat or falling for ever.
    Flat,
}

fn probe(
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
enum Curvature {
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
fn curvature_check(
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

/// Squared Mahalanobis distance (a − b)ᵀ H (a − b).
pub fn mahalanobis2(a: &[f64], b: &[f64], h: &[f64]) -> f64 {
    let d = a.len();
    let diff: Vec<f64> = (0..d).map(|i| a[i] - b[i]).collect();
    (0..d)
        .map(|i| diff[i] * (0..d).map(|j| h[i * d + j] * diff[j]).sum::<f64>())
        .sum()
}

fn escape_variable(from: &[f64], to: &[f64], names: &[String]) -> String {
    let i = (0..from.len())
        .max_by(|&a, &b| (to[a] - from[a]).abs().total_cmp(&(to[b] - from[b]).abs()))
        .unwrap_or(0);
    names.get(i).cloned().unwrap_or_default()
}

fn describe_point(target: &Target, z: &[f64]) -> String {
    let x = target.to_user(z);
    target
        .names
        .iter()
        .zip(&x)
        .map(|(n, v)| format!("{n} = {}", crate::report::num(*v)))
        .collect::<Vec<_>>()
        .join(", ")
}

fn improper(target: &Target, name: &str, z: &[f64]) -> KilnError {
    KilnError::density(format!("the density does not seem to be normalisable along `{name}`"))
        .with_hint(format!(
            "the energy stays flat or keeps falling as `{name}` moves away (seen near {}); bound `{name}` or add a term that makes the energy rise, such as a prior",
            describe_point(target, z)
        ))
}

/// Polishes a converged point with Newton steps on the finite-difference Hessian and checks it.
/// Returns a mode, or a better starting point if this was not a minimum.
fn settle(
    ev: &mut TargetEval,
    target: &Target,
    mut z: Vec<f64>,
    mut f: f64,
    sd_guess: &[f64],
) -> Result<Result<Mode, Vec<f64>>, KilnError> {
    let d = z.len();
    let transforms = &target.transforms;
    let mut steps: Vec<f64> = (0..d)
        .map(|i| (1e-3 * sd_guess[i]).clamp(1e-10 * (1.0 + z[i].abs()), 1e-2 * (1.0 + z[i].abs())))
        .collect();
    let mut g = vec![0.0; d];
    for round in 0..4 {
        let h = hessian(ev, &z, &steps);
        let (h, non_quadratic) = match curvature_check(ev, &z, f, &h, transforms) {
            Curvature::Ok {
                hessian,
                non_quadratic,
            } => (hessian, non_quadratic),
            Curvature::NotMinimum(p) => return Ok(Err(p)),
            Curvature::Flat { direction } => {
                let far = axpy(&z, 1e6, &direction);
                let name = escape_variable(&z, &far, &target.names);
                return Err(improper(target, &name, &z));
            }
        };
        // Newton step from the Hessian; take it if it is worth taking and lowers the energy.
        f = ev.energy_grad(&z, &mut g);
        let hm = DMatrix::from_row_slice(d, d, &h);
        let step = hm
            .clone()
            .cholesky()
            .map(|c| c.solve(&nalgebra::DVector::from_column_slice(&g)));
        let mut moved = false;
        if let Some(step) = step {
            let s: Vec<f64> = step.iter().map(|v| -v).collect();
            let size2 = mahalanobis2(&s, &vec![0.0; d], &h);
            if size2 > 1e-10 && round < 3 {
                let zn = axpy(&z, 1.0, &s);
                let fn_ = ev.energy(&zn);
                if fn_ < f {
                    z = zn;
                    f = fn_;
                    moved = true;
                }
            }
        }
        // Steps for the next round: a thousandth of a standard deviation.
        if let Some(inv) = hm.clone().try_inverse() {
            for i in 0..d {
                let sd = sqrt(inv[(i, i)].abs());
                if sd.is_finite() && sd > 0.0 {
                    steps[i] = (1e-3 * sd).max(1e-12 * (1.0 + z[i].abs()));
                }
            }
        }
        if !moved {
            let x = target.to_user(&z);
            let user_energy = ev.user_energy(&x);
            return Ok(Ok(Mode {
                z,
                x,
                energy: f,
                user_energy,
                hessian: h,
                hits: 1,
                non_quadratic,
            }));
        }
    }
    let h = hessian(ev, &z, &steps);
    let x = target.to_user(&z);
    let user_energy = ev.user_energy(&x);
    Ok(Ok(Mode {
        z,
        x,
        energy: f,
        user_energy,
        hessian: h,
        hits: 1,
        non_quadratic: false,
    }))
}

/// Adds `m` to `modes` unless it is within one standard deviation of a known mode.
/// Returns true if it was new.
pub fn merge_mode(modes: &mut Vec<Mode>, m: Mode) -> bool {
    for known in modes.iter_mut() {
        let near = mahalanobis2(&m.z, &known.z, &known.hessian) < 1.0
            || mahalanobis2(&m.z, &known.z, &m.hessian) < 1.0;
        if near {
            known.hits += m.hits;
            if m.energy < known.energy {
                let hits = known.hits;
                *known = m;
                known.hits = hits;
            }
            return false;
        }
    }
    modes.push(m);
    true
}

/// Finds the modes of `target` by multi-start BFGS.
pub fn find_modes(target: &Target, opts: SearchOptions) -> Result<ModeSearch, KilnError> {
    let d = target.dim();
    let mut ev = target.evaluator();
    let mut rng = Stream::new(opts.seed, Purpose::ModeSearch, 0);
    let shift: Vec<f64> = (0..=d).map(|_| rng.uniform()).collect();
    let mut modes: Vec<Mode> = Vec::new();
    let mut notes = Vec::new();
    let mut bad_starts = 0;
    let mut bad_gradients = 0;
    let mut bad_example: Option<(Vec<f64>, f64)> = None;
    let mut last_new = 0;
    let mut starts = 0;
    for k in 0..opts.max_starts {
        // Stop early once new starts have long stopped finding new modes.
        if opts.early_stop && k >= 64 && k - last_new > k / 2 && !modes.is_empty() {
            break;
        }
        starts += 1;
        let mut z0 = start_point(k, &target.transforms, &shift);
        let mut tries = 0;
        loop {
            tries += 1;
            match minimize(&mut ev, z0.clone(), &target.transforms) {
                Outcome::BadStart {
                    energy,
                    gradient_only,
                } => {
                    if gradient_only {
                        bad_gradients += 1;
                    } else {
                        bad_starts += 1;
                        if bad_example.is_none() {
                            bad_example = Some((z0.clone(), energy));
                        }
                    }
                    break;
                }
                Outcome::Infinite { z } => {
                    return Err(KilnError::density(format!(
                        "the energy is −∞ (infinite density) at {}",
                        describe_point(target, &z)
                    ))
                    .with_hint("an infinite density cannot be normalised; check for log(0) or division by zero with the sign flipped"));
                }
                Outcome::Escaped { z, along } => {
                    return Err(improper(target, &target.names[along], &z));
                }
                Outcome::Converged {
                    z,
                    f,
                    inv_hessian_diag,
                } => {
                    let sd: Vec<f64> = inv_hessian_diag.iter().map(|v| sqrt(*v)).collect();
                    match settle(&mut ev, target, z, f, &sd)? {
                        Ok(mode) => {
                            if merge_mode(&mut modes, mode) {
                                last_new = k;
                            }
                            break;
                        }
                        Err(lower) if tries < 4 => z0 = lower,
                        Err(_) => break,
                    }
                }
            }
        }
    }
    if modes.is_empty() {
        let detail = match bad_example {
            Some((z, e)) => format!(
                " (for example at {} the energy is {})",
                describe_point(target, &z),
                if e.is_nan() || e == f64::INFINITY {
                    "not finite".to_string()
                } else {
                    crate::report::num(e)
                }
            ),
            None => String::new(),
        };
        return Err(KilnError::density(format!(
            "the energy is not finite at any of the {starts} starting points{detail}"
        ))
        .with_hint("check the formula's domain (log of a negative number, division by zero), or give bounds that keep the unknowns where it is defined"));
    }
    if bad_starts > 0 {
        notes.push(format!(
            "{bad_starts} of {starts} starting points had non-finite energy (zero density there) and were skipped"
        ));
    }
    if bad_gradients > 0 {
        notes.push(format!(
            "{bad_gradients} of {starts} starting points had a finite energy but a non-finite gradient (for example sqrt at 0) and were skipped"
        ));
    }
    modes.sort_by(|a, b| a.energy.total_cmp(&b.energy));
    let before = modes.len();
    let mut hops = hop_search(target, &mut ev, &mut modes, opts.max_starts * 4)?;
    hops += lattice_search(target, &mut ev, &mut modes, opts.max_starts * 8)?;
    if modes.len() > before {
        notes.push(format!(
            "{} of the {} modes were found from known modes, by crossing barriers and by repeating the steps between neighbouring modes ({hops} optimiser runs)",
            modes.len() - before,
            modes.len()
        ));
    }
    if modes.iter().any(|m| m.non_quadratic) {
        notes.push("some modes are far from Gaussian; their Laplace masses use the measured width instead of the Hessian".to_string());
    }
    modes.sort_by(|a, b| a.energy.total_cmp(&b.energy));
    Ok(ModeSearch {
        modes,
        starts,
        evaluations: ev.evaluations,
        notes,
    })
}

/// Optimises from `z0` (for instance a draw in a region no start reached) and returns the mode
/// it ends in, if it ends in one.
pub fn mode_from(
    target: &Target,
    ev: &mut TargetEval,
    z0: &[f64],
) -> Result<Option<Mode>, KilnError> {
    let mut z = z0.to_vec();
    for _ in 0..4 {
        match minimize(ev, z.clone(), &target.transforms) {
            Outcome::Converged {
                z: zc,
                f,
                inv_hessian_diag,
            } => {
                let sd: Vec<f64> = inv_hessian_diag.iter().map(|v| sqrt(*v)).collect();
                match settle(ev, target, zc, f, &sd)? {
                    Ok(m) => return Ok(Some(m)),
                    Err(lower) => z = lower,
                }
            }
            Outcome::Escaped { z, along } => {
                return Err(improper(target, &target.names[along], &z));
            }
            Outcome::Infinite { .. } | Outcome::BadStart { .. } => return Ok(None),
        }
    }
    Ok(None)
}

/// Optimises from `start` unless it already lies inside a known mode (squared Mahalanobis
/// distance below 9); a new mode is merged into `modes`. Returns the optimiser runs made (0/1).
fn optimise_if_unexplored(
    target: &Target,
    ev: &mut TargetEval,
    modes: &mut Vec<Mode>,
    start: &[f64],
) -> Result<usize, KilnError> {
    if modes
        .iter()
        .any(|known| mahalanobis2(start, &known.z, &known.hessian) < 9.0)
    {
        return Ok(0);
    }
    if let Some(found) = mode_from(target, ev, start)? {
        merge_mode(modes, found);
    }
    Ok(1)
}

/// Most modes whose neighbourhoods the barrier-crossing search explores.
const MAX_HOP_MODES: usize = 600;

/// Barrier crossing: from each known mode, scan the energy along both directions of every
/// Hessian eigenvector in doubling steps (1, 2, 4, … standard deviations); where the energy
/// has passed a maximum and falls again, follow it down the line and, unless that point already
/// lies inside a known mode, optimise from there. Neighbouring modes of products and lattices
/// of modes, which scattered starts find only by luck in several dimensions, are found this
/// way. `max_runs` bounds the optimiser runs. Returns the number of runs made.
fn hop_search(
    target: &Target,
    ev: &mut TargetEval,
    modes: &mut Vec<Mode>,
    max_runs: usize,
) -> Result<usize, KilnError> {
    let d = target.dim();
    let mut runs = 0;
    let mut next = 0;
    while next < modes.len() && next < MAX_HOP_MODES && runs < max_runs {
        let m = modes[next].clone();
        next += 1;
        let eig = SymmetricEigen::new(DMatrix::from_row_slice(d, d, &m.hessian));
        for k in 0..d {
            let lam = eig.eigenvalues[k];
            if !(lam > 0.0) {
                continue;
            }
            let sd = 1.0 / sqrt(lam);
            let v: Vec<f64> = eig.eigenvectors.column(k).iter().copied().collect();
            for sign in [1.0, -1.0] {
                if runs >= max_runs {
                    break;
                }
                let Some(start) = cross_barrier(ev, target, &m, &v, sign * sd) else {
                    continue;
                };
                runs += optimise_if_unexplored(target, ev, modes, &start)?;
            }
        }
    }
    Ok(runs)
}

/// Scans from mode `m` along `step` (one standard deviation along an eigenvector) for a point
/// past an energy barrier, at the bottom of the descent beyond it.
fn cross_barrier(
    ev: &mut TargetEval,
    target: &Target,
    m: &Mode,
    v: &[f64],
    step: f64,
) -> Option<Vec<f64>> {
    let at = |t: f64| -> Vec<f64> { m.z.iter().zip(v).map(|(z, c)| z + t * step * c).collect() };
    let mut prev = m.energy;
    let mut t = 1.0;
    for _ in 0..12 {
        let p = at(t);
        if beyond_edge(&p, &target.transforms) {
            return None;
        }
        let e = ev.energy(&p);
        if !e.is_finite() {
            return None;
        }
        if e >= prev {
            // Still climbing out of the mode.
            prev = e;
            t *= 2.0;
            continue;
        }
        // Descending: walk on in steps of a quarter of the distance so far until it rises.
        let dt = 0.25 * t;
        let mut best = (t, e);
        for _ in 0..16 {
            let tn = best.0 + dt;
            let pn = at(tn);
            if beyond_edge(&pn, &target.transforms) {
                break;
            }
            let en = ev.energy(&pn);
            if !(en < best.1) {
                break;
            }
            best = (tn, en);
        }
        return Some(at(best.0));
    }
    None
}

/// Lattice completion: the steps between neighbouring modes (each mode to its two nearest) are
/// collected, and every known mode is moved by every such step (both ways); where that lands
/// outside all known modes, the optimiser starts there. Modes arranged like a product or a
/// lattice (for example 2^D modes of independent two-mode factors, rotated) are completed from
/// a partial set this way, even when their Hessians are isotropic and their eigenvectors say
/// nothing about where the neighbours are. `max_runs` bounds the optimiser runs.
fn lattice_search(
    target: &Target,
    ev: &mut TargetEval,
    modes: &mut Vec<Mode>,
    max_runs: usize,
) -> Result<usize, KilnError> {
    let d = target.dim();
    if modes.len() < 2 {
        return Ok(0);
    }
    let dist = |a: &[f64], b: &[f64]| -> f64 {
        a.iter().zip(b).map(|(x, y)| (x - y) * (x - y)).sum::<f64>()
    };
    // Steps between each mode and its two nearest neighbours, merged when nearly equal.
    let mut steps: Vec<(Vec<f64>, usize)> = Vec::new();
    for i in 0..modes.len().min(MAX_HOP_MODES) {
        let mut near: Vec<(f64, usize)> = (0..modes.len())
            .filter(|&j| j != i)
            .map(|j| (dist(&modes[i].z, &modes[j].z), j))
            .collect();
        near.sort_by(|a, b| a.0.total_cmp(&b.0));
        for &(_, j) in near.iter().take(2) {
            let e: Vec<f64> = (0..d).map(|k| modes[j].z[k] - modes[i].z[k]).collect();
            let norm = sqrt(dist(&e, &vec![0.0; d]));
            let same = steps.iter_mut().find(|(f, _)| {
                let neg: Vec<f64> = f.iter().map(|v| -v).collect();
                sqrt(dist(f, &e)) < 0.1 * norm || sqrt(dist(&neg, &e)) < 0.1 * norm
            });
            match same {
                Some((_, count)) => *count += 1,
                None => steps.push((e, 1)),
            }
        }
    }
    steps.sort_by_key(|s| std::cmp::Reverse(s.1));
    steps.truncate(4 * d);
    let mut runs = 0;
    let mut i = 0;
    while i < modes.len() && i < MAX_HOP_MODES && runs < max_runs {
        let base = modes[i].z.clone();
        i += 1;
        for (e, _) in &steps {
            for sign in [1.0, -1.0] {
                if runs >= max_runs {
                    break;
                }
                let c: Vec<f64> = base.iter().zip(e).map(|(z, v)| z + sign * v).collect();
                if beyond_edge(&c, &target.transforms) {
                    continue;
                }
                runs += optimise_if_unexplored(target, ev, modes, &c)?;
            }
        }
    }
    Ok(runs)
}
