//! Statistics of draws that every later stage shares: effective sample size, R-hat, normal
//! quantiles, weighted quantiles and resampling.
//!
//! Owns: the effective sample size of a mean over several chains by Geyer's initial monotone
//! sequence (Geyer 1992, "Practical Markov chain Monte Carlo", Statistical Science 7, 473) in
//! the multi-chain form of Vehtari, Gelman, Simpson, Carpenter & Bürkner 2021,
//! "Rank-normalization, folding, and localization: an improved R-hat", Bayesian Analysis 16,
//! 667; rank-normalised split R-hat and bulk ESS from the same paper; Φ⁻¹; weighted quantiles;
//! systematic resampling; Kish's effective sample size of importance weights.
//! Must not: know about chains' records, plans, bases or targets (plain slices in, numbers out).

use crate::common::maths::{exp, ln, sqrt};
use crate::common::rng::{Purpose, Stream};
/// Effective sample size of the mean of `chains` (equal lengths), by Geyer's initial monotone
/// sequence on the multi-chain autocorrelation.
pub fn ess(chains: &[&[f64]]) -> f64 {
    let m = chains.len();
    if m == 0 {
        return 0.0;
    }
    let n = chains.iter().map(|c| c.len()).min().unwrap_or(0);
    if n < 4 {
        return (m * n) as f64;
    }
    let means: Vec<f64> = chains
        .iter()
        .map(|c| c[..n].iter().sum::<f64>() / n as f64)
        .collect();
    let vars: Vec<f64> = chains
        .iter()
        .zip(&means)
        .map(|(c, mu)| c[..n].iter().map(|x| (x - mu) * (x - mu)).sum::<f64>() / (n - 1) as f64)
        .collect();
    let w = vars.iter().sum::<f64>() / m as f64;
    let grand = means.iter().sum::<f64>() / m as f64;
    let b_over_n = if m > 1 {
        means
            .iter()
            .map(|mu| (mu - grand) * (mu - grand))
            .sum::<f64>()
            / (m - 1) as f64
    } else {
        0.0
    };
    let var_plus = (n - 1) as f64 / n as f64 * w + b_over_n;
    if !(var_plus > 0.0) {
        return (m * n) as f64;
    }
    // Autocovariance at lag t, averaged over chains (biased, 1/n).
    let acov = |t: usize| -> f64 {
        chains
            .iter()
            .zip(&means)
            .map(|(c, mu)| {
                (0..n - t)
                    .map(|i| (c[i] - mu) * (c[i + t] - mu))
                    .sum::<f64>()
                    / n as f64
            })
            .sum::<f64>()
            / m as f64
    };
    let rho = |t: usize| -> f64 { 1.0 - (w - acov(t)) / var_plus };
    let mut sum_pairs = 0.0;
    let mut prev_pair = f64::INFINITY;
    let mut t = 0;
    while t + 1 < n {
        let r0 = if t == 0 { 1.0 } else { rho(t) };
        let r1 = rho(t + 1);
        let mut pair = r0 + r1;
        if pair < 0.0 {
            break;
        }
        if pair > prev_pair {
            pair = prev_pair; // initial monotone sequence
        }
        prev_pair = pair;
        sum_pairs += pair;
        t += 2;
    }
    let tau = (-1.0 + 2.0 * sum_pairs).max(1.0 / ln((m * n) as f64).max(1.0));
    (m * n) as f64 / tau
}

/// Φ⁻¹(p): Acklam's rational approximation refined by one Halley step on erfc.
#[allow(clippy::excessive_precision)]
pub fn normal_quantile(p: f64) -> f64 {
    if p <= 0.0 {
        return f64::NEG_INFINITY;
    }
    if p >= 1.0 {
        return f64::INFINITY;
    }
    let a = [
        -3.969683028665376e1,
        2.209460984245205e2,
        -2.759285104469687e2,
        1.383577518672690e2,
        -3.066479806614716e1,
        2.506628277459239,
    ];
    let b = [
        -5.447609879822406e1,
        1.615858368580409e2,
        -1.556989798598866e2,
        6.680131188771972e1,
        -1.328068155288572e1,
    ];
    let c = [
        -7.784894002430293e-3,
        -3.223964580411365e-1,
        -2.400758277161838,
        -2.549732539343734,
        4.374664141464968,
        2.938163982698783,
    ];
    let d = [
        7.784695709041462e-3,
        3.224671290700398e-1,
        2.445134137142996,
        3.754408661907416,
    ];
    let lo = 0.02425;
    let x = if p < lo {
        let q = sqrt(-2.0 * ln(p));
        (((((c[0] * q + c[1]) * q + c[2]) * q + c[3]) * q + c[4]) * q + c[5])
            / ((((d[0] * q + d[1]) * q + d[2]) * q + d[3]) * q + 1.0)
    } else if p <= 1.0 - lo {
        let q = p - 0.5;
        let r = q * q;
        (((((a[0] * r + a[1]) * r + a[2]) * r + a[3]) * r + a[4]) * r + a[5]) * q
            / (((((b[0] * r + b[1]) * r + b[2]) * r + b[3]) * r + b[4]) * r + 1.0)
    } else {
        let q = sqrt(-2.0 * ln(1.0 - p));
        -(((((c[0] * q + c[1]) * q + c[2]) * q + c[3]) * q + c[4]) * q + c[5])
            / ((((d[0] * q + d[1]) * q + d[2]) * q + d[3]) * q + 1.0)
    };
    let e = 0.5 * libm::erfc(-x / std::f64::consts::SQRT_2) - p;
    let u = e * sqrt(2.0 * crate::common::maths::PI) * exp(0.5 * x * x);
    x - u / (1.0 + 0.5 * x * u)
}

fn split_chains(chains: &[&[f64]]) -> Vec<Vec<f64>> {
    let mut out = Vec::new();
    for c in chains {
        let h = c.len() / 2;
        if h == 0 {
            continue;
        }
        out.push(c[..h].to_vec());
        out.push(c[c.len() - h..].to_vec());
    }
    out
}

fn rank_normalise(chains: &[Vec<f64>]) -> Vec<Vec<f64>> {
    let mut all: Vec<(f64, usize, usize)> = Vec::new();
    for (ci, c) in chains.iter().enumerate() {
        for (i, v) in c.iter().enumerate() {
            all.push((*v, ci, i));
        }
    }
    all.sort_by(|a, b| a.0.total_cmp(&b.0));
    let s = all.len() as f64;
    let mut out: Vec<Vec<f64>> = chains.iter().map(|c| vec![0.0; c.len()]).collect();
    let mut i = 0;
    while i < all.len() {
        let mut j = i;
        while j + 1 < all.len() && all[j + 1].0 == all[i].0 {
            j += 1;
        }
        let rank = 0.5 * ((i + 1) + (j + 1)) as f64; // average rank of ties
        let z = normal_quantile((rank - 0.375) / (s + 0.25));
        for item in &all[i..=j] {
            out[item.1][item.2] = z;
        }
        i = j + 1;
    }
    out
}

fn rhat_basic(chains: &[Vec<f64>]) -> f64 {
    let m = chains.len();
    let n = chains.iter().map(|c| c.len()).min().unwrap_or(0);
    if m < 2 || n < 2 {
        return f64::NAN;
    }
    let means: Vec<f64> = chains
        .iter()
        .map(|c| c[..n].iter().sum::<f64>() / n as f64)
        .collect();
    let w = chains
        .iter()
        .zip(&means)
        .map(|(c, mu)| c[..n].iter().map(|x| (x - mu) * (x - mu)).sum::<f64>() / (n - 1) as f64)
        .sum::<f64>()
        / m as f64;
    let grand = means.iter().sum::<f64>() / m as f64;
    let b_over_n = means
        .iter()
        .map(|mu| (mu - grand) * (mu - grand))
        .sum::<f64>()
        / (m - 1) as f64;
    let var_plus = (n - 1) as f64 / n as f64 * w + b_over_n;
    if !(w > 0.0) {
        return if b_over_n > 0.0 { f64::INFINITY } else { 1.0 };
    }
    sqrt(var_plus / w)
}

/// Rank-normalised split R-hat: the larger of the bulk and the folded versions.
pub fn rhat(chains: &[&[f64]]) -> f64 {
    let split = split_chains(chains);
    let bulk = rhat_basic(&rank_normalise(&split));
    let mut all: Vec<f64> = chains.iter().flat_map(|c| c.iter().copied()).collect();
    all.sort_by(|a, b| a.total_cmp(b));
    let median = if all.is_empty() {
        0.0
    } else {
        all[all.len() / 2]
    };
    let folded: Vec<Vec<f64>> = split
        .iter()
        .map(|c| c.iter().map(|v| (v - median).abs()).collect())
        .collect();
    let tail = rhat_basic(&rank_normalise(&folded));
    bulk.max(tail)
}

/// Bulk ESS: ESS of the rank-normalised split chains.
pub fn ess_bulk(chains: &[&[f64]]) -> f64 {
    let split = rank_normalise(&split_chains(chains));
    let refs: Vec<&[f64]> = split.iter().map(|c| c.as_slice()).collect();
    ess(&refs)
}

/// The q-quantile of values with weights (linear between neighbours in cumulative weight).
pub fn weighted_quantile(values: &[f64], weights: &[f64], q: f64) -> f64 {
    let mut idx: Vec<usize> = (0..values.len()).filter(|&i| weights[i] > 0.0).collect();
    if idx.is_empty() {
        return f64::NAN;
    }
    idx.sort_by(|&a, &b| values[a].total_cmp(&values[b]));
    let total: f64 = idx.iter().map(|&i| weights[i]).sum();
    let mut acc = 0.0;
    let mut prev_mid = f64::NEG_INFINITY;
    let mut prev_val = values[idx[0]];
    for &i in &idx {
        // Each draw stands for the middle of its own slice of cumulative weight.
        let mid = (acc + 0.5 * weights[i]) / total;
        if mid >= q {
            if !prev_mid.is_finite() {
                return values[i];
            }
            let t = (q - prev_mid) / (mid - prev_mid);
            return prev_val + t * (values[i] - prev_val);
        }
        acc += weights[i];
        prev_mid = mid;
        prev_val = values[i];
    }
    prev_val
}

/// Systematic resampling of the weighted draws into `n` unweighted target draws; returns
/// indices into the draws.
pub fn resample(weights: &[f64], n: usize, seed: u64) -> Vec<usize> {
    let total: f64 = weights.iter().sum();
    if !(total > 0.0) || weights.is_empty() {
        return Vec::new();
    }
    let mut rng = Stream::new(seed, Purpose::Resample, 0);
    let u0 = rng.uniform() / n as f64;
    let mut out = Vec::with_capacity(n);
    let mut acc = 0.0;
    let mut i = 0;
    for k in 0..n {
        let target = (u0 + k as f64 / n as f64) * total;
        while i + 1 < weights.len() && acc + weights[i] < target {
            acc += weights[i];
            i += 1;
        }
        out.push(i);
    }
    out
}

/// Kish's effective sample size of the importance weights exp(`log_w`): (Σw)² / Σw² (0 when
/// no weight is finite and positive). Between 1 and the number of weights.
pub fn weights_ess(log_w: &[f64]) -> f64 {
    let top = log_w.iter().copied().fold(f64::NEG_INFINITY, f64::max);
    if !top.is_finite() {
        return 0.0;
    }
    let (s1, s2) = log_w.iter().fold((0.0, 0.0), |(a, b), l| {
        let w = exp(l - top);
        (a + w, b + w * w)
    });
    s1 * s1 / s2
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn normal_quantile_is_accurate() {
        // Known values of Φ⁻¹: 0.975 → 1.959963984540054, 0.5 → 0, 1e-10 → −6.361340902404056.
        assert!((normal_quantile(0.975) - 1.959_963_984_540_054).abs() < 1e-12);
        assert!(normal_quantile(0.5).abs() < 1e-15);
        assert!((normal_quantile(1e-10) + 6.361_340_902_404_056).abs() < 1e-9);
    }

    #[test]
    fn ess_of_independent_and_correlated_series() {
        // Independent normals: ESS ≈ N. AR(1) with coefficient φ: ESS ≈ N (1 − φ)/(1 + φ)
        // (exact asymptotic identity for the variance of the mean of an AR(1) process).
        let mut rng = Stream::new(4, Purpose::Check, 0);
        let n = 20_000;
        let iid: Vec<Vec<f64>> = (0..4)
            .map(|_| (0..n).map(|_| rng.normal()).collect())
            .collect();
        let refs: Vec<&[f64]> = iid.iter().map(|c| c.as_slice()).collect();
        let e = ess(&refs);
        assert!((e / (4 * n) as f64 - 1.0).abs() < 0.1, "{e}");
        let phi = 0.9;
        let ar: Vec<Vec<f64>> = (0..4)
            .map(|_| {
                let mut x = 0.0;
                (0..n)
                    .map(|_| {
                        x = phi * x + sqrt(1.0 - phi * phi) * rng.normal();
                        x
                    })
                    .collect()
            })
            .collect();
        let refs: Vec<&[f64]> = ar.iter().map(|c| c.as_slice()).collect();
        let e = ess(&refs);
        let want = (4 * n) as f64 * (1.0 - phi) / (1.0 + phi);
        assert!((e / want - 1.0).abs() < 0.2, "{e} vs {want}");
        // R-hat near 1 for mixed chains, far above for chains stuck in different places.
        assert!(rhat(&refs) < 1.02);
        let stuck: Vec<Vec<f64>> = (0..4)
            .map(|c| iid[c].iter().map(|v| v + 3.0 * c as f64).collect())
            .collect();
        let refs: Vec<&[f64]> = stuck.iter().map(|c| c.as_slice()).collect();
        assert!(rhat(&refs) > 1.5);
    }

    #[test]
    fn weighted_quantiles_and_resampling() {
        let v: Vec<f64> = (0..1001).map(|i| i as f64 / 1000.0).collect();
        let w = vec![1.0; v.len()];
        assert!((weighted_quantile(&v, &w, 0.5) - 0.5).abs() < 1e-3);
        assert!((weighted_quantile(&v, &w, 0.05) - 0.05).abs() < 2e-3);
        // Weights 3:1 on two values: resampling keeps the ratio.
        let idx = resample(&[3.0, 1.0], 4000, 1);
        let ones = idx.iter().filter(|&&i| i == 1).count();
        assert_eq!(ones, 1000);
    }
}
