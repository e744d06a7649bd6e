//! The Pareto k̂ diagnostic of importance weights: how heavy the upper tail of the weights is.
//!
//! Owns: [`pareto_khat`], the shape of a generalized Pareto distribution fitted to the largest
//! weights, as in Pareto smoothed importance sampling (Vehtari, Simpson, Gelman, Yao & Gabry
//! 2024, "Pareto smoothed importance sampling", Journal of Machine Learning Research 25):
//! the M = min(S/5, 3√S) largest of S weights, less the next largest, are fitted by the
//! quick empirical-Bayes estimate of Zhang & Stephens (2009, "A new and efficient estimation
//! method for the generalized Pareto distribution", Technometrics 51, 316–325), and the shape
//! is pulled towards 1/2 by a weakly informative prior worth 10 observations, as that paper
//! recommends. With k̂ below 1/2 the weights have a finite variance and the usual standard
//! error holds; between 1/2 and 0.7 it is still usable for the estimate with care; above 0.7
//! the estimate and its error bar cannot be trusted.
//! Must not: draw anything (it reads log weights) or know what the weights are of.

use crate::common::maths::{exp, ln, ln_1p, log_sum_exp, sqrt};

/// The k̂ above which even a Pareto-smoothed importance-sampling estimate is not to be trusted
/// (Vehtari et al. 2024).
pub const KHAT_LIMIT: f64 = 0.7;
/// The k̂ above which the raw weights' variance is infinite (a generalized Pareto tail of shape
/// ξ has a finite variance only for ξ < 1/2), so that the usual standard error of a raw
/// importance-sampling estimate does not hold.
pub const KHAT_FINITE_VARIANCE: f64 = 0.5;

/// k̂ of the upper tail of the weights exp(`log_w`); `None` with too few finite weights (fewer
/// than 5 in the tail).
pub fn pareto_khat(log_w: &[f64]) -> Option<f64> {
    let mut lw: Vec<f64> = log_w.iter().copied().filter(|v| v.is_finite()).collect();
    let s = lw.len();
    let m = (0.2 * s as f64).min(3.0 * sqrt(s as f64)) as usize;
    if m < 5 || s <= m {
        return None;
    }
    lw.sort_by(|a, b| b.total_cmp(a));
    let top = lw[0];
    // Exceedances of the tail over the (M+1)-th largest weight, scaled by the largest weight
    // (the shape does not depend on the scale).
    let threshold = exp(lw[m] - top);
    // Weights equal to round-off (a base that is the target) have no tail to fit: their
    // spread is rounding noise.
    if 1.0 - threshold < 1e-9 {
        return Some(0.0);
    }
    let mut x: Vec<f64> = lw[..m].iter().map(|l| exp(l - top) - threshold).collect();
    x.sort_by(|a, b| a.total_cmp(b));
    let k = generalized_pareto_shape(&x);
    let n = m as f64;
    // A weakly informative prior: the shape pulled towards 1/2 with the weight of 10 draws.
    Some((n * k + 10.0 * 0.5) / (n + 10.0))
}

/// The shape ξ (positive for heavy tails) of a generalized Pareto distribution fitted to
/// positive values `x` sorted ascending, by Zhang & Stephens' estimate: a posterior mean of
/// θ = ξ/σ over a grid of candidates, each weighted by its profile likelihood.
fn generalized_pareto_shape(x: &[f64]) -> f64 {
    let n = x.len();
    let grid = 30 + sqrt(n as f64) as usize;
    let quartile = x[((n as f64 / 4.0 + 0.5) as usize).clamp(1, n) - 1];
    let largest = x[n - 1];
    // In Zhang & Stephens' parametrisation (their shape is −ξ): θ < 1/max(x).
    let thetas: Vec<f64> = (1..=grid)
        .map(|j| 1.0 / largest + (1.0 - sqrt(grid as f64 / (j as f64 - 0.5))) / (3.0 * quartile))
        .collect();
    let profile = |theta: f64| -> f64 {
        // k(θ) = −mean log(1 − θ x); l(θ) = n (log(θ / k) + k − 1).
        let k = -x.iter().map(|v| ln_1p(-theta * v)).sum::<f64>() / n as f64;
        n as f64 * (ln(theta / k) + k - 1.0)
    };
    let logs: Vec<f64> = thetas.iter().map(|t| profile(*t)).collect();
    let finite: Vec<(f64, f64)> = thetas
        .iter()
        .zip(&logs)
        .filter(|(_, l)| l.is_finite())
        .map(|(t, l)| (*t, *l))
        .collect();
    if finite.is_empty() {
        return f64::NAN;
    }
    let lse = log_sum_exp(&finite.iter().map(|p| p.1).collect::<Vec<_>>());
    let theta: f64 = finite.iter().map(|(t, l)| t * exp(l - lse)).sum();
    // ξ = mean log(1 − θ̂ x).
    x.iter().map(|v| ln_1p(-theta * v)).sum::<f64>() / n as f64
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::common::maths::pow;
    use crate::common::rng::{Purpose, Stream};

    /// Mean k̂ over repeated samples of `s` weights from a distribution with upper-tail shape ξ
    /// known exactly: the generalized Pareto distribution itself, x = ((1 − U)^(−ξ) − 1)/ξ
    /// (exponential for ξ = 0).
    fn mean_khat(xi: f64, s: usize, repeats: usize) -> f64 {
        let mut rng = Stream::new(21, Purpose::Check, (100.0 * xi) as u64);
        let mut total = 0.0;
        for _ in 0..repeats {
            let lw: Vec<f64> = (0..s)
                .map(|_| {
                    let u = rng.uniform();
                    let x = if xi == 0.0 {
                        -ln(1.0 - u)
                    } else {
                        (pow(1.0 - u, -xi) - 1.0) / xi
                    };
                    ln(x.max(1e-300))
                })
                .collect();
            total += pareto_khat(&lw).unwrap();
        }
        total / repeats as f64
    }

    #[test]
    fn khat_recovers_known_tail_shapes() {
        // The estimate is shrunk towards 1/2 with weight 10/(M + 10) (M = 189 for S = 4000),
        // which moves it by at most 0.03 here; the sampling sd of one estimate is about
        // (1 + ξ)/√M ≈ 0.1, so the mean of 40 is within about 0.02.
        for &xi in &[0.0, 0.3, 0.6, 0.9] {
            let k = mean_khat(xi, 4000, 40);
            let shrunk = (189.0 * xi + 5.0) / 199.0;
            assert!((k - shrunk).abs() < 0.06, "ξ = {xi}: mean k̂ {k}");
        }
    }

    #[test]
    fn equal_weights_and_too_few_weights() {
        let flat = vec![0.0; 1000];
        let k = pareto_khat(&flat).unwrap();
        assert!(k.abs() < 0.1, "{k}");
        assert!(pareto_khat(&[0.0; 20]).is_none());
        assert!(pareto_khat(&[f64::NEG_INFINITY; 500]).is_none());
    }
}
