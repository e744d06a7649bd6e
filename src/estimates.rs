//! Stage 7: draws → estimates, diagnostics and the verdict.
//!
//! Owns, from the kept draws of a frozen plan (method note, "Estimates from every draw"):
//! - `log Z = log ζ + g(0) − g(1) + log mean p(1|x) − log mean p(0|x) + log Q₊` (Q₊: the base's
//!   mass on the target's support, 1 unless the density is zero somewhere; see
//!   `Plan::measure_support`) and its standard error
//!   from the linearised series `z_i = p1_i/mean(p1) − p0_i/mean(p0)`,
//!   `SE² = var(z) / ESS(z)`, ESS pooled over chains by Geyer's initial monotone sequence
//!   (Geyer 1992, "Practical Markov chain Monte Carlo", Statistical Science 7, 473) in the
//!   multi-chain form of Vehtari, Gelman, Simpson, Carpenter & Bürkner 2021, "Rank-normalization,
//!   folding, and localization: an improved R-hat", Bayesian Analysis 16, 667;
//! - the same estimate with control variates (`control`): reported as `log_z` when they cut
//!   its variance and agree with it, always beside the plain one;
//! - expectations, quantiles and mode masses weighted by p(β=1|x), with standard errors from
//!   the same linearisation;
//! - rank-normalised split R-hat and bulk ESS per unknown (Vehtari et al. 2021) on the chains;
//! - the importance-sampling cross-check from the base, round trips in β, and warnings.
//!
//! Must not: run chains or change the plan.

use crate::maths::{exp, ln, log_sum_exp, sqrt};
use crate::rng::{Purpose, Stream};
use crate::sampler::{Plan, Record};
use crate::target::Target;
use serde::Serialize;

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
    let u = e * sqrt(2.0 * crate::maths::PI) * exp(0.5 * x * x);
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

#[derive(Clone, Debug, Serialize)]
pub struct ModeEstimate {
    /// Location in the user's coordinates.
    pub location: Vec<f64>,
    pub mass: f64,
    pub mass_se: f64,
    pub laplace_mass: f64,
    /// Whether draws near β = 1 (β ≥ 0.5) were assigned to this mode.
    pub visited: bool,
    /// "optimiser" or "sampler" (found by optimising from draws in an unexplored region).
    pub found_by: String,
}

#[derive(Clone, Debug, Serialize)]
pub struct Diagnostics {
    /// Mean acceptance statistic of the Hamiltonian moves.
    pub acceptance: f64,
    pub divergences: usize,
    /// Transitions that hit the maximum tree depth.
    pub max_depth_hits: usize,
    /// Share of independence proposals accepted.
    pub independence_acceptance: f64,
    /// Share of iterations that made a Hamiltonian move (the rest made only the independence
    /// move and the β draw).
    pub hamiltonian_share: f64,
    /// Round trips β < 0.1 → β > 0.9 → β < 0.1, per chain.
    pub round_trips: Vec<usize>,
    /// Share of draws with β ≥ 0.9.
    pub share_near_beta_one: f64,
    /// Mean of p(β=1|x): the share of the draws' weight that counts for the target.
    pub mean_p1: f64,
    /// Effective sample size of the log Z series.
    pub log_z_ess: f64,
    /// max g − min g of the frozen bias (0 for the plain method).
    pub bias_span: f64,
    pub base_refitted: bool,
    pub base_components: usize,
    pub step_sizes: Vec<f64>,
    /// Importance sampling from the base: effective sample size of its weights.
    pub is_ess: f64,
    /// Share of the target weight in draws far (squared Mahalanobis distance above 30 + 4D)
    /// from the mode they are assigned to.
    pub far_from_modes: f64,
}

#[derive(Clone, Debug, Serialize)]
pub struct Estimates {
    pub log_z: f64,
    pub log_z_se: f64,
    /// The method note's estimator without control variates (equal to `log_z` when they are
    /// not used).
    pub log_z_plain: f64,
    pub log_z_plain_se: f64,
    pub control_variates: Option<ControlSummary>,
    pub is_log_z: f64,
    pub is_log_z_se: f64,
    pub modes: Vec<ModeEstimate>,
    pub mean: Vec<f64>,
    pub sd: Vec<f64>,
    /// 5 %, 50 % and 95 % quantiles per unknown.
    pub quantiles: Vec<[f64; 3]>,
    /// Rank-normalised split R-hat per unknown, on the tempered chains.
    pub rhat: Vec<f64>,
    /// Effective number of target draws per unknown: sd² / SE(mean)², from the weighted series.
    pub ess: Vec<f64>,
    /// Bulk ESS per unknown of the tempered chains (Vehtari et al. 2021).
    pub ess_chains: Vec<f64>,
    pub diagnostics: Diagnostics,
}

/// A draw with its provenance.
#[derive(Clone, Debug)]
pub struct WeightedDraws {
    /// User coordinates, `dim` per draw, chains one after another.
    pub x: Vec<f64>,
    pub beta: Vec<f64>,
    /// p(β=1|x) / mean p(β=1|x).
    pub weight: Vec<f64>,
    pub chain: Vec<usize>,
    pub iteration: Vec<usize>,
    /// Index (0-based) of the mode whose Laplace component is most responsible for the draw.
    pub mode: Vec<usize>,
}

/// Round trips β low → high → low.
fn round_trips(beta: &[f64]) -> usize {
    let mut state = 0; // 0: unknown, 1: last extreme was low, 2: went high after low
    let mut trips = 0;
    for &b in beta {
        if b < 0.1 {
            if state == 2 {
                trips += 1;
            }
            state = 1;
        } else if b > 0.9 && state == 1 {
            state = 2;
        }
    }
    trips
}

/// Linearised standard error of a weighted mean: SE² = var(h) / ESS(h) with
/// h_i = w̃_i (v_i − m) and w̃ = normalised weights, per chain.
fn weighted_mean_se(values: &[f64], wn: &[f64], mean: f64, lens: &[usize]) -> (f64, f64) {
    let h: Vec<f64> = values.iter().zip(wn).map(|(v, w)| w * (v - mean)).collect();
    let n = h.len() as f64;
    let var = h.iter().map(|x| x * x).sum::<f64>() / n;
    let mut chains: Vec<&[f64]> = Vec::new();
    let mut at = 0;
    for &l in lens {
        chains.push(&h[at..at + l]);
        at += l;
    }
    let e = ess(&chains).max(1.0);
    (sqrt(var / e), e)
}

/// log Z, its standard error and the ESS of its series, with the log p(1|x) of every draw.
pub struct LogZ {
    pub log_z: f64,
    pub se: f64,
    pub ess: f64,
    pub l1: Vec<f64>,
    pub lse1: f64,
    /// The method note's estimate without control variates, and its standard error.
    pub plain: f64,
    pub plain_se: f64,
    /// What the control variates did (`None`: not tried).
    pub control: Option<ControlSummary>,
}

/// What the control variates of [`crate::control`] did to the log Z estimate.
#[derive(Clone, Debug, Serialize)]
pub struct ControlSummary {
    /// Whether `log_z` is the adjusted estimate (otherwise the plain one, for the reason given).
    pub used: bool,
    pub features: usize,
    /// The highest monomial degree of the features.
    pub degree: usize,
    /// SE² of the plain estimate ÷ SE² of the adjusted one (above 1: the features helped).
    pub variance_ratio: f64,
    pub note: String,
}

/// The log Z estimate of the method note (with the bias correction) and its SE, from records
/// drawn under `plan`; NaN when the plan does not temper.
pub fn log_z_estimate(plan: &Plan, records: &[Record]) -> LogZ {
    let lens: Vec<usize> = records.iter().map(|r| r.beta.len()).collect();
    let total: usize = lens.iter().sum();
    let mut s = vec![0.0; plan.bias.knots.len()];
    let tempered = plan.is_tempered();
    let (mut l1, mut l0) = (Vec::with_capacity(total), Vec::with_capacity(total));
    for r in records {
        for &delta in &r.delta {
            if tempered {
                let (a, b) = plan.bias.log_p1_p0(delta, &mut s);
                l1.push(a);
                l0.push(b);
            } else {
                l1.push(0.0);
                l0.push(0.0);
            }
        }
    }
    let lse1 = log_sum_exp(&l1);
    let lse0 = log_sum_exp(&l0);
    let n = total as f64;
    let g0 = plan.bias.values[0];
    let g1 = plan.bias.values[plan.bias.values.len() - 1];
    let (log_z, se, ess_z) = if tempered && total > 0 {
        // + log Q₊: the base's mass on the target's support (see `Plan::measure_support`).
        let (q_plus, q_se) = plan.support;
        let log_z = plan.base.log_zeta + g0 - g1 + lse1 - lse0 + ln(q_plus);
        let zs: Vec<f64> = l1
            .iter()
            .zip(&l0)
            .map(|(a, b)| exp(a - lse1 + ln(n)) - exp(b - lse0 + ln(n)))
            .collect();
        let var = zs.iter().map(|z| z * z).sum::<f64>() / n;
        let mut chains: Vec<&[f64]> = Vec::new();
        let mut at = 0;
        for &l in &lens {
            chains.push(&zs[at..at + l]);
            at += l;
        }
        let e = ess(&chains).max(1.0);
        let support_rel = q_se / q_plus;
        (log_z, sqrt(var / e + support_rel * support_rel), e)
    } else {
        (f64::NAN, f64::NAN, f64::NAN)
    };
    LogZ {
        log_z,
        se,
        ess: ess_z,
        l1,
        lse1,
        plain: log_z,
        plain_se: se,
        control: None,
    }
}

/// The adjusted estimate is kept only if it differs from the plain one by less than this many
/// plain standard errors (the two estimate the same number from the same draws; a larger gap
/// means the regression is not to be trusted, for instance with heavy-tailed weights).
pub const CONTROL_AGREEMENT: f64 = 3.0;
/// The adjusted estimate is kept only if it cuts the variance by at least this factor: a small
/// gain is not worth the risk that the regression's standard error is itself optimistic (for a
/// poor base, whose series has heavy tails and slow mixing).
pub const CONTROL_MIN_GAIN: f64 = 1.5;
/// The standard error reported with control variates credits them with at most this variance
/// reduction: SE ≥ SE_plain / √25. The residual series keeps the rare draws the features cannot
/// explain (deep in the base's tails, where the features are damped away and p(0|x) ≈ Δ is
/// large); a run of moderate length usually holds too few of them for its sample variance to
/// show their share, so a very large apparent reduction overstates the precision. (A cap chosen
/// by measurement: on x⁴ the apparent reductions of 100–1000× came with errors of about twice
/// the uncapped SE; near-normal posteriors with reductions near 50× were already honest.)
pub const CONTROL_MAX_GAIN: f64 = 25.0;

/// [`log_z_estimate`] with the control variates of [`crate::control`]: the same estimate with
/// the part of its noise that the base's known moments explain removed. Falls back to the
/// plain estimate (saying why) when there are too few draws, when the density is zero on part
/// of the base's support (the identity behind the features then fails), or when the adjusted
/// estimate is not better or disagrees with the plain one.
pub fn log_z_with_controls(plan: &Plan, records: &[Record]) -> LogZ {
    let mut out = log_z_estimate(plan, records);
    if !out.log_z.is_finite() {
        return out;
    }
    let skip = |why: &str| ControlSummary {
        used: false,
        features: 0,
        degree: 0,
        variance_ratio: 1.0,
        note: why.to_string(),
    };
    if plan.support.0 < 1.0 {
        out.control = Some(skip(
            "not used: the density is zero on part of the base's support",
        ));
        return out;
    }
    let d = plan.base.q.dim;
    let mut s = vec![0.0; plan.bias.knots.len()];
    let (mut l1, mut l0) = (Vec::new(), Vec::new());
    let mut points: Vec<&[f64]> = Vec::new();
    let mut fold = Vec::new();
    let lens: Vec<usize> = records.iter().map(|r| r.beta.len()).collect();
    let halves = records.len() < 2;
    for (c, r) in records.iter().enumerate() {
        for (i, &delta) in r.delta.iter().enumerate() {
            let (a, b) = plan.bias.log_p1_p0(delta, &mut s);
            l1.push(a);
            l0.push(b);
            points.push(&r.z[i * d..(i + 1) * d]);
            fold.push(if halves {
                u8::from(2 * i >= r.delta.len())
            } else {
                (c % 2) as u8
            });
        }
    }
    let n = l1.len() as f64;
    let (lse1, lse0) = (log_sum_exp(&l1), log_sum_exp(&l0));
    let z: Vec<f64> = l1
        .iter()
        .zip(&l0)
        .map(|(a, b)| exp(a - lse1 + ln(n)) - exp(b - lse0 + ln(n)))
        .collect();
    let p0: Vec<f64> = l0.iter().map(|b| exp(b - lse0 + ln(n))).collect();
    let Some(adj) = crate::control::adjust(&plan.base.q, &points, &z, &p0, &fold) else {
        out.control = Some(skip("not used: too few draws for the features"));
        return out;
    };
    let mut chains: Vec<&[f64]> = Vec::new();
    let mut at = 0;
    for &l in &lens {
        chains.push(&adj.residual[at..at + l]);
        at += l;
    }
    let var = adj.residual.iter().map(|r| r * r).sum::<f64>() / n;
    let e = ess(&chains).max(1.0);
    let se_raw = sqrt(var / e);
    let log_z = out.plain - adj.correction;
    let ratio = (out.plain_se * out.plain_se) / (se_raw * se_raw);
    let se = se_raw.max(out.plain_se / sqrt(CONTROL_MAX_GAIN));
    let mut summary = ControlSummary {
        used: false,
        features: adj.features,
        degree: adj.degree,
        variance_ratio: ratio,
        note: String::new(),
    };
    if !(log_z.is_finite() && se.is_finite()) {
        summary.note = "not used: the adjusted estimate is not finite".into();
    } else if !(ratio >= CONTROL_MIN_GAIN) {
        summary.note = format!(
            "not used: they would cut the variance of log Z by only {ratio:.2}× (less than {CONTROL_MIN_GAIN}×)"
        );
    } else if (log_z - out.plain).abs() > CONTROL_AGREEMENT * out.plain_se {
        summary.note = format!(
            "not used: the adjusted estimate {log_z:.6} differs from the plain one by more than {CONTROL_AGREEMENT} standard errors"
        );
    } else {
        summary.used = true;
        summary.note = format!(
            "{} features (damped monomials up to degree {} in the base components' whitened coordinates) cut the variance of log Z by {:.1}×{}",
            adj.features,
            adj.degree,
            ratio,
            if ratio > CONTROL_MAX_GAIN {
                format!(" (the standard error credits them with at most {CONTROL_MAX_GAIN}×)")
            } else {
                String::new()
            }
        );
        out.log_z = log_z;
        out.se = se;
        out.ess = e;
    }
    out.control = Some(summary);
    out
}

/// Everything estimated from the sampling records of a frozen plan.
pub fn estimate(
    target: &Target,
    plan: &Plan,
    records: &[Record],
    is_draws: usize,
) -> (Estimates, WeightedDraws) {
    let d = target.dim();
    let lens: Vec<usize> = records.iter().map(|r| r.beta.len()).collect();
    let total: usize = lens.iter().sum();
    let tempered = plan.is_tempered();
    let LogZ {
        log_z,
        se: log_z_se,
        ess: log_z_ess,
        l1,
        lse1,
        plain: log_z_plain,
        plain_se: log_z_plain_se,
        control: control_variates,
    } = log_z_with_controls(plan, records);
    let n = total as f64;
    // Normalised weights w̃_i = p1_i / mean(p1).
    let wn: Vec<f64> = l1.iter().map(|a| exp(a - lse1 + ln(n))).collect();

    // User coordinates and mode assignment.
    let laplace = &plan.laplace;
    let mut scratch = laplace.base.scratch();
    let k = laplace.base.components.len();
    let mut resp = vec![0.0; k];
    let mut x = Vec::with_capacity(total * d);
    let mut mode = Vec::with_capacity(total);
    let mut beta = Vec::with_capacity(total);
    let mut chain = Vec::with_capacity(total);
    let mut iteration = Vec::with_capacity(total);
    let far = 30.0 + 4.0 * d as f64;
    let mut far_weight = 0.0;
    for (c, r) in records.iter().enumerate() {
        for i in 0..r.beta.len() {
            let z = &r.z[i * d..(i + 1) * d];
            x.extend(target.to_user(z));
            laplace.base.responsibilities(z, &mut resp, &mut scratch);
            let best = (0..k)
                .max_by(|&a, &b| resp[a].total_cmp(&resp[b]))
                .unwrap_or(0);
            let near =
                crate::modes::mahalanobis2(z, &plan.modes[best].z, &plan.modes[best].hessian);
            if near > far {
                far_weight += wn[mode.len()];
            }
            mode.push(best);
            beta.push(r.beta[i]);
            chain.push(c);
            iteration.push(i);
        }
    }

    // Moments and quantiles per unknown, weighted by p1.
    let mut mean = vec![0.0; d];
    let mut sd = vec![0.0; d];
    let mut quantiles = vec![[0.0; 3]; d];
    let mut ess_target = vec![0.0; d];
    let mut rh = vec![0.0; d];
    let mut ess_ch = vec![0.0; d];
    for j in 0..d {
        let v: Vec<f64> = (0..total).map(|i| x[i * d + j]).collect();
        let m = v.iter().zip(&wn).map(|(a, w)| a * w).sum::<f64>() / n;
        let var = v
            .iter()
            .zip(&wn)
            .map(|(a, w)| w * (a - m) * (a - m))
            .sum::<f64>()
            / n;
        mean[j] = m;
        sd[j] = sqrt(var);
        for (qi, q) in [0.05, 0.5, 0.95].iter().enumerate() {
            quantiles[j][qi] = weighted_quantile(&v, &wn, *q);
        }
        let (se, _) = weighted_mean_se(&v, &wn, m, &lens);
        ess_target[j] = if se > 0.0 { var / (se * se) } else { n };
        let mut chains: Vec<&[f64]> = Vec::new();
        let mut at = 0;
        for &l in &lens {
            chains.push(&v[at..at + l]);
            at += l;
        }
        rh[j] = rhat(&chains);
        ess_ch[j] = ess_bulk(&chains);
    }

    // Mode masses.
    let laplace_masses = laplace.masses();
    let optimiser_modes = plan.modes.len() - plan.new_modes;
    let modes: Vec<ModeEstimate> = (0..plan.modes.len())
        .map(|km| {
            let ind: Vec<f64> = mode
                .iter()
                .map(|&m| if m == km { 1.0 } else { 0.0 })
                .collect();
            let mass = ind.iter().zip(&wn).map(|(a, w)| a * w).sum::<f64>() / n;
            let (se, _) = weighted_mean_se(&ind, &wn, mass, &lens);
            let visited = (0..total).any(|i| mode[i] == km && beta[i] >= 0.5);
            ModeEstimate {
                location: plan.modes[km].x.clone(),
                mass,
                mass_se: se,
                laplace_mass: laplace_masses[km],
                visited,
                found_by: if km < optimiser_modes {
                    "optimiser".into()
                } else {
                    "sampler".into()
                },
            }
        })
        .collect();

    // Importance sampling from the base.
    let (is_log_z, is_log_z_se, is_ess) = importance_check(target, plan, is_draws);

    let transitions: usize = records.iter().map(|r| r.transitions).sum();
    let acc: f64 = records
        .iter()
        .map(|r| r.accept * r.transitions as f64)
        .sum::<f64>()
        / transitions.max(1) as f64;
    let iters: usize = records.iter().map(|r| r.iterations).sum();
    let indep: usize = records.iter().map(|r| r.independence_accepted).sum();
    let bias_span = plan
        .bias
        .values
        .iter()
        .copied()
        .fold(f64::NEG_INFINITY, f64::max)
        - plan
            .bias
            .values
            .iter()
            .copied()
            .fold(f64::INFINITY, f64::min);
    let diagnostics = Diagnostics {
        acceptance: acc,
        divergences: records.iter().map(|r| r.divergences).sum(),
        max_depth_hits: records.iter().map(|r| r.max_depth_hits).sum(),
        independence_acceptance: if tempered && plan.options.independence {
            indep as f64 / iters.max(1) as f64
        } else {
            0.0
        },
        hamiltonian_share: transitions as f64 / iters.max(1) as f64,
        round_trips: records.iter().map(|r| round_trips(&r.beta)).collect(),
        share_near_beta_one: beta.iter().filter(|b| **b >= 0.9).count() as f64 / n.max(1.0),
        mean_p1: exp(lse1 - ln(n)),
        log_z_ess,
        bias_span,
        base_refitted: plan.refitted,
        base_components: plan.base.q.components.len(),
        step_sizes: Vec::new(),
        is_ess,
        far_from_modes: far_weight / n.max(1.0),
    };
    let est = Estimates {
        log_z,
        log_z_se,
        log_z_plain,
        log_z_plain_se,
        control_variates,
        is_log_z,
        is_log_z_se,
        modes,
        mean,
        sd,
        quantiles,
        rhat: rh,
        ess: ess_target,
        ess_chains: ess_ch,
        diagnostics,
    };
    let draws = WeightedDraws {
        x,
        beta,
        weight: wn,
        chain,
        iteration,
        mode,
    };
    (est, draws)
}

/// log Z by importance sampling from the frozen base: log mean(f/q), with its delta-method
/// standard error and the effective sample size of the weights.
pub fn importance_check(target: &Target, plan: &Plan, n: usize) -> (f64, f64, f64) {
    if n == 0 {
        return (f64::NAN, f64::NAN, 0.0);
    }
    let d = target.dim();
    let mut rng = Stream::new(plan.options.seed, Purpose::Check, 0);
    let mut ev = target.evaluator();
    let q = &plan.base.q;
    let mut scratch = q.scratch();
    let mut z = vec![0.0; d];
    let mut lw = Vec::with_capacity(n);
    for _ in 0..n {
        q.sample(&mut rng, &mut z, &mut scratch);
        let e = ev.energy(&z);
        let lq = q.log_density(&z, &mut scratch);
        lw.push(if e.is_finite() {
            -e - lq
        } else {
            f64::NEG_INFINITY
        });
    }
    let lse = log_sum_exp(&lw);
    if !lse.is_finite() {
        return (f64::NEG_INFINITY, f64::NAN, 0.0);
    }
    let w: Vec<f64> = lw.iter().map(|l| exp(l - lse)).collect(); // sums to 1
    let sum_sq: f64 = w.iter().map(|x| x * x).sum();
    let ess = 1.0 / sum_sq;
    // Var of the mean of w·n around 1, relative: SE(log Ẑ) ≈ sd(w n) / sqrt(n).
    let rel_var = (sum_sq * n as f64 - 1.0).max(0.0);
    (lse - ln(n as f64), sqrt(rel_var / n as f64), ess)
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

/// One independent estimate of log Z shown beside the sampler's.
#[derive(Clone, Debug, Serialize)]
pub struct CrossCheck {
    /// "exact", "grid", "importance" or "laplace".
    pub name: String,
    pub log_z: f64,
    /// Its own error estimate (0 for exact; none for Laplace, an approximation).
    pub error: Option<f64>,
    /// (sampler − check) / combined error, when both have errors.
    pub z_score: Option<f64>,
    pub agrees: bool,
    pub note: String,
}

/// Compares the sampler's log Z with each independent value and says whether they agree.
/// Agreement: within 4 combined standard errors, or within 0.01 nats (a practical floor).
pub fn cross_checks(
    log_z: f64,
    se: f64,
    exact: Option<f64>,
    grid: Option<(f64, f64)>,
    is: (f64, f64, f64),
    laplace: f64,
) -> Vec<CrossCheck> {
    let mut out = Vec::new();
    let mut compare = |name: &str, value: f64, err: f64, note: String| {
        let diff = log_z - value;
        let comb = sqrt(se * se + err * err);
        let z = if comb > 0.0 {
            diff / comb
        } else {
            f64::INFINITY * diff.signum()
        };
        let within_errors = diff.abs() <= 4.0 * comb;
        let agrees = within_errors || diff.abs() <= 0.01;
        let mut note = note;
        if agrees && !within_errors {
            note.push_str(&format!(
                "; {:.1} standard errors apart, but within the 0.01-nat floor below which differences are treated as negligible",
                z.abs()
            ));
        }
        out.push(CrossCheck {
            name: name.into(),
            log_z: value,
            error: Some(err),
            z_score: Some(z),
            agrees,
            note,
        });
    };
    if let Some(e) = exact {
        compare("exact", e, 0.0, "log of the mixture's total weight".into());
    }
    if let Some((g, change)) = grid {
        if g.is_finite() {
            compare(
                "grid",
                g,
                change.max(1e-4),
                "quadrature on a refined grid".into(),
            );
        }
    }
    let (is_z, is_se, is_ess) = is;
    if is_z.is_finite() && is_se.is_finite() {
        // Importance sampling's own error bar is only trustworthy with many effective draws.
        let reliable = is_ess >= 100.0;
        let note = format!(
            "importance sampling from the base ({:.0} effective draws)",
            is_ess
        );
        compare("importance", is_z, is_se, note);
        if !reliable {
            if let Some(last) = out.last_mut() {
                last.agrees = true;
                last.note.push_str("; too few effective draws to judge");
            }
        }
    }
    let diff = log_z - laplace;
    out.push(CrossCheck {
        name: "laplace".into(),
        log_z: laplace,
        error: None,
        z_score: None,
        agrees: diff.abs() <= 1.0,
        note: "sum of Gaussian approximations at the modes (no error bar)".into(),
    });
    out
}

/// A one-line verdict on the cross-checks.
pub fn verdict(checks: &[CrossCheck], log_z: f64, se: f64) -> String {
    if !log_z.is_finite() {
        return "log Z could not be estimated: see the warnings".into();
    }
    let bad: Vec<&CrossCheck> = checks
        .iter()
        .filter(|c| c.error.is_some() && !c.agrees)
        .collect();
    if !bad.is_empty() {
        let parts: Vec<String> = bad
            .iter()
            .map(|c| {
                format!(
                    "{} gives {:.4} ({:+.2} standard errors away)",
                    c.name,
                    c.log_z,
                    c.z_score.unwrap_or(f64::NAN)
                )
            })
            .collect();
        return format!(
            "DISAGREEMENT: {}; do not trust log Z until this is resolved",
            parts.join(", ")
        );
    }
    let with_errors = checks.iter().filter(|c| c.error.is_some()).count();
    if with_errors == 0 {
        return format!(
            "no independent check with an error bar is available here (only the Laplace approximation); log Z = {log_z:.4} ± {se:.4} rests on the sampler alone"
        );
    }
    let names: Vec<&str> = checks
        .iter()
        .filter(|c| c.error.is_some())
        .map(|c| c.name.as_str())
        .collect();
    format!(
        "the independent checks ({}) agree with the sampler within their errors",
        names.join(", ")
    )
}

/// Plain-words warnings about anything that makes the numbers unreliable.
pub fn warnings(
    est: &Estimates,
    checks: &[CrossCheck],
    names: &[String],
    tempered: bool,
    iterations: usize,
) -> Vec<String> {
    let mut w = Vec::new();
    let dg = &est.diagnostics;
    if tempered {
        for (c, trips) in dg.round_trips.iter().enumerate() {
            if *trips == 0 {
                w.push(format!("chain {} never made a round trip between β = 0 and β = 1: it may not have mixed between modes", c + 1));
            }
        }
        let total: usize = dg.round_trips.iter().sum();
        if total > 0 && total < 5 * dg.round_trips.len() {
            w.push(format!("only {total} round trips in β over all chains: mode masses and log Z rest on few independent visits; run longer"));
        }
        if dg.share_near_beta_one < 0.02 {
            w.push(format!(
                "the chains spent only {:.1}% of the time near β = 1: the target is poorly sampled",
                100.0 * dg.share_near_beta_one
            ));
        }
        if dg.log_z_ess < 100.0 {
            w.push(format!("the log Z series has only {:.0} effective draws: its error bar is itself uncertain", dg.log_z_ess));
        }
    }
    for m in &est.modes {
        if !m.visited && m.laplace_mass > 1e-3 {
            let loc: Vec<String> = m.location.iter().map(|v| crate::report::num(*v)).collect();
            w.push(format!(
                "the optimiser found a mode at ({}) with Laplace mass {:.3}, but no chain visited it near β = 1",
                loc.join(", "),
                m.laplace_mass
            ));
        }
    }
    if dg.far_from_modes > 0.01 {
        w.push(format!(
            "{:.1}% of the target's weight lies far from every known mode: the mode table may be incomplete (a mode may have been missed) or the modes have heavy tails",
            100.0 * dg.far_from_modes
        ));
    }
    for c in checks {
        if c.error.is_some() && !c.agrees {
            w.push(format!(
                "the {} cross-check ({:.4}) disagrees with the sampler beyond their errors",
                c.name, c.log_z
            ));
        }
    }
    for (j, r) in est.rhat.iter().enumerate() {
        if *r > 1.01 {
            w.push(format!("R-hat of `{}` is {:.3} (above 1.01): the chains disagree; run longer or check the modes", names[j], r));
        }
    }
    if iterations > 0 && dg.divergences as f64 > 0.01 * iterations as f64 {
        w.push(format!(
            "{} divergent transitions ({:.1}% of iterations): the energy is hard to integrate somewhere (very curved, or non-finite)",
            dg.divergences,
            100.0 * dg.divergences as f64 / iterations as f64
        ));
    }
    w
}
