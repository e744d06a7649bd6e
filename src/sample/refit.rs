//! Warm-up only: candidate refits of the base q to weighted draws of the target.
//!
//! Owns three ways to fit a mixture to weighted draws (weights: each draw's p(β=1|x), so that
//! the weighted draws stand for the target):
//! - [`reweight`]: the Laplace components kept as they are, their weights re-estimated from the
//!   share of target weight each mode is responsible for;
//! - [`per_mode`]: each draw assigned to the mode whose Laplace component is most responsible
//!   for it, then, mode by mode, a mixture of `J` normal (or Student-t) components fitted by
//!   weighted EM (Dempster, Laird & Rubin 1977, "Maximum likelihood from incomplete data via
//!   the EM algorithm", JRSS B 39, 1), seeded by splitting the mode's covariance along its
//!   principal axis. A mode with too few effective draws for `J` components gets fewer, and
//!   one with too few for one keeps its Laplace component. This captures skewed or flattened
//!   modes that one Gaussian per mode describes poorly;
//! - [`refit`]: one weighted EM over all draws, seeded at the known modes and, for the
//!   remaining components, by weighted k-means++ picks (Arthur & Vassilvitskii 2007), turned
//!   into Student-t components with [`NU`] degrees of freedom and the fitted covariance as
//!   scale matrix. This covers targets that are not a set of separated bumps (ridges, shells).
//!
//! Heavier tails than the target's keep the log Z estimate's variance finite (where q is much
//! lighter than the target, p(β=1|x) grows like |Δ|); normal components suit light-tailed
//! modes better. Which candidate is used is decided by the sampler from held-out draws.
//! No broad "defensive" component is added: where the target is nearly zero over most of a box
//! (sharp peaks), its mass there makes p(β=0|x) ≈ Δ large and the variance of log Z much worse.
//! Must not: decide when to refit or which candidate wins (the sampler does), or touch log ζ.

use crate::common::gaussian::{Gaussian, Mixture};
use crate::common::maths::{exp, ln, log_sum_exp};
use crate::common::rng::Stream;

/// Degrees of freedom of refitted components.
pub const NU: f64 = 7.0;
/// Scale inflation of refitted components (1: the t's scale matrix is the fitted covariance).
const INFLATE: f64 = 1.0;

fn weighted_moments(points: &[Vec<f64>], w: &[f64]) -> (Vec<f64>, Vec<f64>) {
    let d = points[0].len();
    let total: f64 = w.iter().sum();
    let mut mean = vec![0.0; d];
    for (p, wi) in points.iter().zip(w) {
        for i in 0..d {
            mean[i] += wi * p[i] / total;
        }
    }
    let mut cov = vec![0.0; d * d];
    for (p, wi) in points.iter().zip(w) {
        for i in 0..d {
            for j in 0..d {
                cov[i * d + j] += wi * (p[i] - mean[i]) * (p[j] - mean[j]) / total;
            }
        }
    }
    (mean, cov)
}

/// The E step of a weighted normal-mixture EM: responsibilities of each component for each
/// point (row-major, points × components) and the weighted log-likelihood.
fn e_step<P: AsRef<[f64]>>(
    points: &[P],
    w: &[f64],
    comps: &[Option<Gaussian>],
    shares: &[f64],
    resp: &mut [f64],
) -> f64 {
    let k = comps.len();
    let d = points.first().map_or(0, |p| p.as_ref().len());
    let mut scratch = vec![0.0; d];
    let mut terms = vec![0.0; k];
    let mut ll = 0.0;
    for (i, p) in points.iter().enumerate() {
        for c in 0..k {
            terms[c] = match &comps[c] {
                Some(g) if shares[c] > 0.0 => {
                    ln(shares[c]) + g.log_density(p.as_ref(), &mut scratch)
                }
                _ => f64::NEG_INFINITY,
            };
        }
        let t = log_sum_exp(&terms);
        for c in 0..k {
            resp[i * k + c] = if t.is_finite() {
                exp(terms[c] - t)
            } else {
                0.0
            };
        }
        if t.is_finite() {
            ll += w[i] * t;
        }
    }
    ll
}

/// Fits a mixture to points `z` with weights `w` (not necessarily normalised).
/// `seeds`: known components (mode locations and covariances) to start from; `k_max`: most
/// components. Returns `None` if the weights are degenerate.
pub fn refit(
    points: &[Vec<f64>],
    w: &[f64],
    seeds: &[Gaussian],
    k_max: usize,
    rng: &mut Stream,
) -> Option<Mixture> {
    let n = points.len();
    if n < 10 {
        return None;
    }
    let d = points[0].len();
    let total: f64 = w.iter().sum();
    if !(total > 0.0) {
        return None;
    }
    let ess = total * total / w.iter().map(|x| x * x).sum::<f64>();
    let (_, gcov) = weighted_moments(points, w);
    let ridge: Vec<f64> = (0..d).map(|i| 1e-6 * gcov[i * d + i].max(1e-12)).collect();
    // Every known mode keeps a component; extra ones only where there are about 10 D
    // effective draws for each.
    let extra_cap = (ess / (10.0 * d as f64)).floor() as usize;
    let k = seeds.len().max(k_max.min(seeds.len() + extra_cap)).max(1);
    // A component with fewer effective draws than this keeps its seed's shape.
    let min_eff = 5.0 * (d + 1) as f64;

    // Initial means: known modes first, then weighted k-means++ picks.
    let mut means: Vec<Vec<f64>> = seeds.iter().take(k).map(|g| g.mean.clone()).collect();
    let mut covs: Vec<Vec<f64>> = seeds.iter().take(k).map(|g| g.scale_matrix()).collect();
    while means.len() < k {
        let d2: Vec<f64> = points
            .iter()
            .zip(w)
            .map(|(p, wi)| {
                let m = means
                    .iter()
                    .map(|m| {
                        (0..d)
                            .map(|i| (p[i] - m[i]) * (p[i] - m[i]) / gcov[i * d + i].max(1e-300))
                            .sum::<f64>()
                    })
                    .fold(f64::INFINITY, f64::min);
                wi * if m.is_finite() { m } else { 1.0 }
            })
            .collect();
        let s: f64 = d2.iter().sum();
        if !(s > 0.0) {
            break;
        }
        let u = rng.uniform() * s;
        let mut acc = 0.0;
        let mut pick = n - 1;
        for (i, v) in d2.iter().enumerate() {
            acc += v;
            if acc >= u {
                pick = i;
                break;
            }
        }
        means.push(points[pick].clone());
        covs.push(
            (0..d * d)
                .map(|ij| {
                    if ij / d == ij % d {
                        0.25 * gcov[ij]
                    } else {
                        0.0
                    }
                })
                .collect(),
        );
    }
    let k = means.len();
    let mut weights = vec![1.0 / k as f64; k];
    let mut resp = vec![0.0; n * k];
    let mut last_ll = f64::NEG_INFINITY;
    for _iter in 0..GLOBAL_EM_ITERATIONS {
        // E step.
        let comps: Vec<Option<Gaussian>> = (0..k)
            .map(|c| Gaussian::from_flat(means[c].clone(), &covs[c], f64::INFINITY))
            .collect();
        let ll = e_step(points, w, &comps, &weights, &mut resp);
        // M step.
        for c in 0..k {
            let wc: f64 = (0..n).map(|i| w[i] * resp[i * k + c]).sum();
            let wc2: f64 = (0..n)
                .map(|i| (w[i] * resp[i * k + c]) * (w[i] * resp[i * k + c]))
                .sum();
            let n_eff = if wc2 > 0.0 { wc * wc / wc2 } else { 0.0 };
            weights[c] = wc / total;
            if wc <= 1e-12 * total {
                weights[c] = if c < seeds.len() { 1e-6 } else { 0.0 };
                continue;
            }
            if n_eff < min_eff {
                if c < seeds.len() {
                    continue; // too few draws to move a known mode's component
                }
                weights[c] = 0.0;
                continue;
            }
            let mut m = vec![0.0; d];
            for i in 0..n {
                let r = w[i] * resp[i * k + c] / wc;
                for j in 0..d {
                    m[j] += r * points[i][j];
                }
            }
            let mut cv = vec![0.0; d * d];
            for i in 0..n {
                let r = w[i] * resp[i * k + c] / wc;
                if r == 0.0 {
                    continue;
                }
                for a in 0..d {
                    let da = points[i][a] - m[a];
                    for b in 0..d {
                        cv[a * d + b] += r * da * (points[i][b] - m[b]);
                    }
                }
            }
            for a in 0..d {
                cv[a * d + a] += ridge[a];
            }
            means[c] = m;
            covs[c] = cv;
        }
        if (ll - last_ll).abs() < 1e-8 * (1.0 + ll.abs()) {
            break;
        }
        last_ll = ll;
    }
    let mut comps = Vec::new();
    let mut ws = Vec::new();
    for c in 0..k {
        if weights[c] < 1e-4 && c >= seeds.len() {
            continue;
        }
        let inflated: Vec<f64> = covs[c].iter().map(|v| v * INFLATE).collect();
        if let Some(g) = Gaussian::from_flat(means[c].clone(), &inflated, NU) {
            comps.push(g);
            ws.push(weights[c].max(1e-6));
        }
    }
    if comps.is_empty() {
        return None;
    }
    Some(Mixture::new(comps, &ws))
}

/// Each draw's mode: the index of the Laplace component most responsible for it.
pub fn assign_modes(points: &[Vec<f64>], laplace: &Mixture) -> Vec<usize> {
    let k = laplace.components.len();
    let mut scratch = laplace.scratch();
    let mut r = vec![0.0; k];
    points
        .iter()
        .map(|p| {
            if k == 1 {
                return 0;
            }
            laplace.responsibilities(p, &mut r, &mut scratch);
            let mut best = 0;
            for c in 1..k {
                if r[c] > r[best] {
                    best = c;
                }
            }
            best
        })
        .collect()
}

/// Mode weights from the target weight each mode holds, each at least [`WEIGHT_FLOOR`] of its
/// Laplace weight (a mode the warm-up draws missed keeps a share of the base, so chains can
/// still reach it); not normalised.
fn mode_weights(w: &[f64], mode_of: &[usize], laplace: &Mixture) -> Vec<f64> {
    let k = laplace.components.len();
    let mut held = vec![0.0; k];
    for (wi, &m) in w.iter().zip(mode_of) {
        held[m] += wi;
    }
    let total: f64 = held.iter().sum();
    let lw = laplace.weights();
    (0..k)
        .map(|c| (held[c] / total).max(WEIGHT_FLOOR * lw[c]))
        .collect()
}

/// One fitted component of a mode: (share within the mode, mean, covariance row-major).
type Part = (f64, Vec<f64>, Vec<f64>);

/// Most EM iterations of a per-mode fit.
pub const EM_ITERATIONS: usize = 40;
/// Most EM iterations of the global fit (many components sharing the draws converge slowly).
pub const GLOBAL_EM_ITERATIONS: usize = 100;
/// Share of its Laplace weight a mode keeps at least in a refitted base.
pub const WEIGHT_FLOOR: f64 = 0.05;
/// Effective draws needed per free parameter of a fitted component.
pub const DRAWS_PER_PARAMETER: f64 = 5.0;

/// The Laplace components with their weights re-estimated from the draws.
pub fn reweight(w: &[f64], mode_of: &[usize], laplace: &Mixture) -> Option<Mixture> {
    let total: f64 = w.iter().sum();
    if !(total > 0.0) || laplace.components.is_empty() {
        return None;
    }
    let ws = mode_weights(w, mode_of, laplace);
    Some(Mixture::new(laplace.components.clone(), &ws))
}

/// Degrees of freedom a per-mode fit chooses from (∞: normal components).
pub const NU_GRID: [f64; 5] = [4.0, 7.0, 15.0, 30.0, f64::INFINITY];
/// Most components per mode.
pub const MAX_PER_MODE: usize = 3;

/// The shape chosen for one mode: `components` = 0 keeps its Laplace component; otherwise that
/// many components fitted by EM, as Student-t components with ν = `nu` (∞: normal) and
/// covariance-matched scale cov·(ν − 2)/ν.
#[derive(Clone, Copy, Debug, PartialEq)]
pub struct ModeShape {
    pub components: usize,
    pub nu: f64,
}

impl ModeShape {
    pub const LAPLACE: ModeShape = ModeShape {
        components: 0,
        nu: f64::INFINITY,
    };
}

/// Draws grouped by mode: indices and weights of each mode's draws.
fn members(w: &[f64], mode_of: &[usize], modes: usize) -> Vec<Vec<usize>> {
    let mut out: Vec<Vec<usize>> = vec![Vec::new(); modes];
    for (i, &m) in mode_of.iter().enumerate() {
        if w[i] > 0.0 && m < modes {
            out[m].push(i);
        }
    }
    out
}

fn effective(idx: &[usize], w: &[f64]) -> f64 {
    let sw: f64 = idx.iter().map(|&i| w[i]).sum();
    let sw2: f64 = idx.iter().map(|&i| w[i] * w[i]).sum();
    if sw2 > 0.0 {
        sw * sw / sw2
    } else {
        0.0
    }
}

/// Components a mode's effective draws can support in `d` dimensions.
fn supported(n_eff: f64, d: usize) -> usize {
    let params = (d + d * (d + 1) / 2) as f64;
    ((n_eff / (DRAWS_PER_PARAMETER * params)).floor() as usize).min(MAX_PER_MODE)
}

/// One mode's components under a shape, fitted to its draws; `None` if the fit fails.
fn fit_mode(pts: &[&[f64]], ws: &[f64], shape: ModeShape) -> Option<Vec<(f64, Gaussian)>> {
    let parts = em_local(pts, ws, shape.components)?;
    as_components(&parts, shape.nu)
}

fn as_components(parts: &[Part], nu: f64) -> Option<Vec<(f64, Gaussian)>> {
    parts
        .iter()
        .map(|(share, mean, cov)| {
            let scale: Vec<f64> = if nu.is_finite() {
                cov.iter().map(|v| v * (nu - 2.0) / nu).collect()
            } else {
                cov.clone()
            };
            Gaussian::from_flat(mean.clone(), &scale, nu).map(|g| (*share, g))
        })
        .collect()
}

/// Weighted mean log density of points under a normalised set of components.
fn mean_log_density(set: &[(f64, Gaussian)], pts: &[&[f64]], ws: &[f64]) -> f64 {
    let d = pts.first().map_or(0, |p| p.len());
    let mut scratch = vec![0.0; d];
    let mut terms = vec![0.0; set.len()];
    let (mut ll, mut tw) = (0.0, 0.0);
    for (p, wi) in pts.iter().zip(ws) {
        for (c, (share, g)) in set.iter().enumerate() {
            terms[c] = ln(*share) + g.log_density(p, &mut scratch);
        }
        ll += wi * log_sum_exp(&terms);
        tw += wi;
    }
    ll / tw
}

/// Chooses each mode's shape by the likelihood of held-out draws: every number of components
/// its training draws support (0 = its Laplace component) and every ν of [`NU_GRID`], fitted to
/// the training draws, scored by the weighted mean log density of the mode's held-out draws.
/// A mode with too few held-out draws to judge keeps its Laplace component.
#[allow(clippy::too_many_arguments)]
pub fn choose_shapes(
    train: &[Vec<f64>],
    train_w: &[f64],
    train_mode: &[usize],
    valid: &[Vec<f64>],
    valid_w: &[f64],
    valid_mode: &[usize],
    laplace: &Mixture,
) -> Vec<ModeShape> {
    let k = laplace.components.len();
    let d = laplace.dim;
    let tm = members(train_w, train_mode, k);
    let vm = members(valid_w, valid_mode, k);
    (0..k)
        .map(|m| {
            let fits = supported(effective(&tm[m], train_w), d);
            if fits == 0 || effective(&vm[m], valid_w) < 10.0 {
                return ModeShape::LAPLACE;
            }
            let tp: Vec<&[f64]> = tm[m].iter().map(|&i| train[i].as_slice()).collect();
            let tw: Vec<f64> = tm[m].iter().map(|&i| train_w[i]).collect();
            let vp: Vec<&[f64]> = vm[m].iter().map(|&i| valid[i].as_slice()).collect();
            let vw: Vec<f64> = vm[m].iter().map(|&i| valid_w[i]).collect();
            let lap = vec![(1.0, laplace.components[m].clone())];
            let mut best = (mean_log_density(&lap, &vp, &vw), ModeShape::LAPLACE);
            for j in 1..=fits {
                let Some(parts) = em_local(&tp, &tw, j) else {
                    continue;
                };
                for nu in NU_GRID {
                    let Some(set) = as_components(&parts, nu) else {
                        continue;
                    };
                    let score = mean_log_density(&set, &vp, &vw);
                    if score.is_finite() && !(score <= best.0) {
                        best = (score, ModeShape { components: j, nu });
                    }
                }
            }
            best.1
        })
        .collect()
}

/// Per mode, the components of its shape fitted by weighted EM to the draws the mode is
/// responsible for (a mode whose fit fails, or whose draws are too few for its shape, keeps
/// its Laplace component); mode weights from the draws.
pub fn per_mode(
    points: &[Vec<f64>],
    w: &[f64],
    mode_of: &[usize],
    laplace: &Mixture,
    shapes: &[ModeShape],
) -> Option<Mixture> {
    let total: f64 = w.iter().sum();
    if !(total > 0.0) || points.is_empty() || laplace.components.is_empty() {
        return None;
    }
    let d = laplace.dim;
    let k = laplace.components.len();
    let mode_w = mode_weights(w, mode_of, laplace);
    let groups = members(w, mode_of, k);
    let mut comps = Vec::new();
    let mut weights = Vec::new();
    for m in 0..k {
        let shape = shapes.get(m).copied().unwrap_or(ModeShape::LAPLACE);
        let idx = &groups[m];
        let fitted = if shape.components == 0 || supported(effective(idx, w), d) == 0 {
            None
        } else {
            let pts: Vec<&[f64]> = idx.iter().map(|&i| points[i].as_slice()).collect();
            let ws: Vec<f64> = idx.iter().map(|&i| w[i]).collect();
            // Fewer components when a fit leaves one of them without enough draws.
            (1..=shape.components).rev().find_map(|j| {
                fit_mode(
                    &pts,
                    &ws,
                    ModeShape {
                        components: j,
                        ..shape
                    },
                )
            })
        };
        match fitted {
            Some(set) => {
                for (share, g) in set {
                    comps.push(g);
                    weights.push(mode_w[m] * share);
                }
            }
            None => {
                comps.push(laplace.components[m].clone());
                weights.push(mode_w[m]);
            }
        }
    }
    if comps.is_empty() {
        return None;
    }
    Some(Mixture::new(comps, &weights))
}

/// A `j`-component normal mixture fitted by weighted EM to one mode's draws: (share, mean,
/// covariance) per component; `None` if the draws are degenerate.
fn em_local(points: &[&[f64]], w: &[f64], j: usize) -> Option<Vec<Part>> {
    let n = points.len();
    let d = points.first()?.len();
    let total: f64 = w.iter().sum();
    if !(total > 0.0) {
        return None;
    }
    let (mean, cov) = moments(points, w, None);
    let ridge: Vec<f64> = (0..d).map(|i| 1e-9 * cov[i * d + i].max(1e-300)).collect();
    if j <= 1 {
        let mut c = cov;
        for i in 0..d {
            c[i * d + i] += ridge[i];
        }
        return Some(vec![(1.0, mean, c)]);
    }
    // Seeds: along the principal axis of the mode's covariance, at ±(0.5…1) sd.
    let (axis, var) = principal_axis(&cov, d);
    let sd = crate::common::maths::sqrt(var.max(0.0));
    let mut means = Vec::with_capacity(j);
    for c in 0..j {
        let t = if j == 1 {
            0.0
        } else {
            -1.0 + 2.0 * c as f64 / (j - 1) as f64
        };
        means.push(
            (0..d)
                .map(|i| mean[i] + t * sd * axis[i])
                .collect::<Vec<f64>>(),
        );
    }
    // Start each component with the covariance less the spread of the seeds along the axis.
    let shrink = 0.5;
    let mut covs: Vec<Vec<f64>> = (0..j)
        .map(|_| {
            (0..d * d)
                .map(|ij| {
                    let (a, b) = (ij / d, ij % d);
                    cov[ij] - shrink * var * axis[a] * axis[b]
                })
                .collect()
        })
        .collect();
    let mut shares = vec![1.0 / j as f64; j];
    let mut resp = vec![0.0; n * j];
    let mut last = f64::NEG_INFINITY;
    for _ in 0..EM_ITERATIONS {
        let comps: Vec<Option<Gaussian>> = (0..j)
            .map(|c| Gaussian::from_flat(means[c].clone(), &covs[c], f64::INFINITY))
            .collect();
        if comps.iter().any(|c| c.is_none()) {
            return None;
        }
        let ll = e_step(points, w, &comps, &shares, &mut resp);
        for c in 0..j {
            let rw: Vec<f64> = (0..n).map(|i| w[i] * resp[i * j + c]).collect();
            let wc: f64 = rw.iter().sum();
            let wc2: f64 = rw.iter().map(|x| x * x).sum();
            let n_eff = if wc2 > 0.0 { wc * wc / wc2 } else { 0.0 };
            // A component left with too few draws to pin down its covariance ends the fit.
            if n_eff < (d + 1) as f64 * 2.0 {
                return None;
            }
            shares[c] = wc / total;
            let (m, mut cv) = moments(points, &rw, None);
            for a in 0..d {
                cv[a * d + a] += ridge[a];
            }
            means[c] = m;
            covs[c] = cv;
        }
        if (ll - last).abs() <= 1e-7 * (1.0 + ll.abs()) {
            break;
        }
        last = ll;
    }
    Some(
        (0..j)
            .map(|c| (shares[c], means[c].clone(), covs[c].clone()))
            .collect(),
    )
}

/// Weighted mean and covariance (row-major) of points; `mean` given or computed.
fn moments(points: &[&[f64]], w: &[f64], mean: Option<&[f64]>) -> (Vec<f64>, Vec<f64>) {
    let d = points[0].len();
    let total: f64 = w.iter().sum();
    let m: Vec<f64> = match mean {
        Some(m) => m.to_vec(),
        None => {
            let mut m = vec![0.0; d];
            for (p, wi) in points.iter().zip(w) {
                for i in 0..d {
                    m[i] += wi * p[i];
                }
            }
            m.iter().map(|v| v / total).collect()
        }
    };
    let mut cov = vec![0.0; d * d];
    let mut dev = vec![0.0; d];
    for (p, wi) in points.iter().zip(w) {
        if *wi == 0.0 {
            continue;
        }
        for i in 0..d {
            dev[i] = p[i] - m[i];
        }
        for a in 0..d {
            for b in 0..=a {
                cov[a * d + b] += wi * dev[a] * dev[b];
            }
        }
    }
    for a in 0..d {
        for b in 0..=a {
            let v = cov[a * d + b] / total;
            cov[a * d + b] = v;
            cov[b * d + a] = v;
        }
    }
    (m, cov)
}

/// The leading eigenvector (unit length) and eigenvalue of a symmetric matrix, by power
/// iteration from the direction of largest diagonal entry.
fn principal_axis(a: &[f64], d: usize) -> (Vec<f64>, f64) {
    let mut v = vec![0.0; d];
    let start = (0..d)
        .max_by(|&i, &j| a[i * d + i].total_cmp(&a[j * d + j]))
        .unwrap_or(0);
    // Every coordinate gets a share, so that a start orthogonal to the axis cannot happen.
    for i in 0..d {
        v[i] = if i == start { 1.0 } else { 0.1 };
    }
    let mut lambda = 0.0;
    for _ in 0..200 {
        let mut nv = vec![0.0; d];
        for i in 0..d {
            for k in 0..d {
                nv[i] += a[i * d + k] * v[k];
            }
        }
        let norm = crate::common::maths::sqrt(nv.iter().map(|x| x * x).sum::<f64>());
        if !(norm > 0.0) {
            break;
        }
        let next: Vec<f64> = nv.iter().map(|x| x / norm).collect();
        let change: f64 = next.iter().zip(&v).map(|(a, b)| (a - b).abs()).sum();
        v = next;
        lambda = norm;
        if change < 1e-12 {
            break;
        }
    }
    (v, lambda)
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::common::rng::Purpose;

    #[test]
    fn em_recovers_two_separated_clusters() {
        // Draws from 0.3 N(−4, 1) + 0.7 N(3, 0.25) (1-D): the fit must find both.
        let mut rng = Stream::new(8, Purpose::Check, 0);
        let points: Vec<Vec<f64>> = (0..4000)
            .map(|_| {
                if rng.uniform() < 0.3 {
                    vec![-4.0 + rng.normal()]
                } else {
                    vec![3.0 + 0.5 * rng.normal()]
                }
            })
            .collect();
        let w = vec![1.0; points.len()];
        let m = refit(&points, &w, &[], 2, &mut rng).unwrap();
        let mut found: Vec<(f64, f64, f64)> = m
            .components
            .iter()
            .zip(m.weights())
            .filter(|(_, w)| *w > 0.1)
            .map(|(c, w)| (c.mean[0], c.scale_matrix()[0] / INFLATE, w))
            .collect();
        found.sort_by(|a, b| a.0.total_cmp(&b.0));
        assert_eq!(found.len(), 2, "{found:?}");
        assert!(
            (found[0].0 + 4.0).abs() < 0.1 && (found[1].0 - 3.0).abs() < 0.05,
            "{found:?}"
        );
        assert!(
            (found[0].1 - 1.0).abs() < 0.1 && (found[1].1 - 0.25).abs() < 0.03,
            "{found:?}"
        );
        assert!((found[0].2 - 0.3).abs() < 0.03, "{found:?}");
    }

    #[test]
    fn a_skewed_mode_gets_more_components_and_fits_better_than_laplace() {
        // One mode made of two overlapping normals (2/3 N(0, I) + 1/3 N((1.5, 0), I)); the
        // "Laplace" component is a normal at the mode with unit covariance. Held-out likelihood
        // must choose more than one component, and the fit must come within 0.02 nats per draw
        // of the true density's mean log density on fresh draws (its entropy), beating Laplace.
        let truth = Mixture::new(
            vec![
                Gaussian::new(&[0.0, 0.0], &[vec![1.0, 0.0], vec![0.0, 1.0]]).unwrap(),
                Gaussian::new(&[1.5, 0.0], &[vec![1.0, 0.0], vec![0.0, 1.0]]).unwrap(),
            ],
            &[2.0, 1.0],
        );
        let laplace = Mixture::new(
            vec![Gaussian::new(&[0.4, 0.0], &[vec![1.0, 0.0], vec![0.0, 1.0]]).unwrap()],
            &[1.0],
        );
        let mut rng = Stream::new(21, Purpose::Check, 0);
        let mut s = truth.scratch();
        let mut draw = |n: usize| -> Vec<Vec<f64>> {
            (0..n)
                .map(|_| {
                    let mut x = vec![0.0; 2];
                    truth.sample(&mut rng, &mut x, &mut s);
                    x
                })
                .collect()
        };
        let (train, valid, test) = (draw(3000), draw(3000), draw(20_000));
        let w = vec![1.0; 3000];
        let modes = vec![0usize; 3000];
        let shapes = choose_shapes(&train, &w, &modes, &valid, &w, &modes, &laplace);
        assert!(shapes[0].components >= 2, "{shapes:?}");
        let all: Vec<Vec<f64>> = train.iter().chain(&valid).cloned().collect();
        let fit = per_mode(&all, &[1.0; 6000], &[0; 6000], &laplace, &shapes).unwrap();
        let mean_ll = |q: &Mixture| {
            let mut sc = q.scratch();
            test.iter().map(|x| q.log_density(x, &mut sc)).sum::<f64>() / test.len() as f64
        };
        let (t, f, l) = (mean_ll(&truth), mean_ll(&fit), mean_ll(&laplace));
        assert!(f > l, "fit {f} vs Laplace {l}");
        assert!(t - f < 0.02, "truth {t} vs fit {f}");
    }

    #[test]
    fn reweighting_follows_the_target_weight_of_each_mode() {
        // Two modes, draws weighted 3 : 1 between them: the weights become 0.75 / 0.25.
        let a = Gaussian::new(&[-5.0], &[vec![1.0]]).unwrap();
        let b = Gaussian::new(&[5.0], &[vec![1.0]]).unwrap();
        let laplace = Mixture::new(vec![a, b], &[1.0, 1.0]);
        let mode_of = vec![0, 0, 0, 1, 0, 1, 0, 0];
        let w = vec![1.0, 1.0, 1.0, 2.0, 1.0, 0.0, 1.0, 1.0];
        let m = reweight(&w, &mode_of, &laplace).unwrap();
        let ws = m.weights();
        assert!(
            (ws[0] - 0.75).abs() < 1e-12 && (ws[1] - 0.25).abs() < 1e-12,
            "{ws:?}"
        );
    }
}
