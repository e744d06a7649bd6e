//! Warm-up only: refit the base q to weighted draws when the Laplace base is poor.
//!
//! Owns: a weighted EM fit of a Gaussian mixture (Dempster, Laird & Rubin 1977, "Maximum
//! likelihood from incomplete data via the EM algorithm", JRSS B 39, 1), seeded at the known
//! modes and, for the remaining components, by weighted k-means++ picks (Arthur & Vassilvitskii
//! 2007). The fitted components become Student-t components with [`NU`] degrees of freedom and
//! the fitted covariance as scale matrix (so their covariance is inflated by ν/(ν − 2)), which
//! keeps q's tails heavier than the target's for light- and moderately heavy-tailed targets:
//! where q is much lighter than the target, p(β=1|x) grows like |Δ| and the log Z estimate's
//! variance can become infinite. No broad "defensive" component is added: where the target is
//! nearly zero over most of a box (sharp peaks), its mass there makes p(β=0|x) ≈ Δ large and the
//! variance of log Z much worse.
//! Must not: decide when to refit (the sampler does), or touch log ζ.

use crate::gaussian::{Gaussian, Mixture};
use crate::maths::{exp, ln, log_sum_exp};
use crate::rng::Stream;

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
    let mut scratch = vec![0.0; d];
    let mut last_ll = f64::NEG_INFINITY;
    for _iter in 0..100 {
        // E step.
        let comps: Vec<Option<Gaussian>> = (0..k)
            .map(|c| Gaussian::from_flat(means[c].clone(), &covs[c], f64::INFINITY))
            .collect();
        let mut ll = 0.0;
        let mut terms = vec![0.0; k];
        for i in 0..n {
            for c in 0..k {
                terms[c] = match &comps[c] {
                    Some(g) if weights[c] > 0.0 => {
                        ln(weights[c]) + g.log_density(&points[i], &mut scratch)
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

#[cfg(test)]
mod tests {
    use super::*;
    use crate::rng::Purpose;

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
}
