//! Warm-up only: refit the base q to weighted draws when the Laplace base is poor.
//!
//! Owns: a weighted EM fit of a Gaussian mixture (Dempster, Laird & Rubin 1977, "Maximum
//! likelihood from incomplete data via the EM algorithm", JRSS B 39, 1), seeded at the known
//! modes and, for the remaining components, by weighted k-means++ picks (Arthur & Vassilvitskii
//! 2007); covariances are inflated (×1.44, i.e. standard deviations ×1.2) and a broad defensive
//! component (5 % weight, twice the overall standard deviation; Hesterberg 1995, "Weighted
//! average importance sampling and defensive mixture distributions", Technometrics 37, 185)
//! keeps q's tails heavier than the fit's.
//! Must not: decide when to refit (the sampler does), or touch log ζ.

use crate::gaussian::{Gaussian, Mixture};
use crate::maths::{exp, ln, log_sum_exp};
use crate::rng::Stream;

/// Variance inflation of refitted components.
const INFLATE: f64 = 1.44;
/// Weight of the defensive component.
const DEFENSIVE: f64 = 0.05;

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
    let (gmean, gcov) = weighted_moments(points, w);
    let ridge: Vec<f64> = (0..d).map(|i| 1e-6 * gcov[i * d + i].max(1e-12)).collect();
    // Enough weighted points per component: about 20 D effective draws each.
    let k_cap = ((ess / (20.0 * d as f64)).floor() as usize).max(1);
    let k = k_max
        .max(seeds.len())
        .min(k_cap.max(seeds.len().min(k_cap)))
        .max(1);

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
            weights[c] = wc / total;
            if wc <= 1e-12 * total {
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
        if weights[c] < 1e-4 {
            continue;
        }
        let inflated: Vec<f64> = covs[c].iter().map(|v| v * INFLATE).collect();
        if let Some(g) = Gaussian::from_flat(means[c].clone(), &inflated, f64::INFINITY) {
            comps.push(g);
            ws.push(weights[c] * (1.0 - DEFENSIVE));
        }
    }
    if comps.is_empty() {
        return None;
    }
    let broad: Vec<f64> = (0..d * d)
        .map(|ij| 4.0 * gcov[ij] + if ij / d == ij % d { ridge[ij / d] } else { 0.0 })
        .collect();
    if let Some(g) = Gaussian::from_flat(gmean, &broad, f64::INFINITY) {
        comps.push(g);
        ws.push(DEFENSIVE);
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
            .map(|(c, w)| {
                (
                    c.mean[0],
                    c.scale_matrix()[0] / INFLATE,
                    w / (1.0 - DEFENSIVE),
                )
            })
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
