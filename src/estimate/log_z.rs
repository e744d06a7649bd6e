//! log Z ± SE from the kept draws of a frozen plan (method note, "Estimates from every draw").
//!
//! Owns: `log Z = log ζ + g(0) − g(1) + log mean p(1|x) − log mean p(0|x) + log Q₊` (Q₊: the
//! base's mass on the target's support, 1 unless the density is zero somewhere; see
//! `Plan::measure_support`) with its standard error from the linearised series
//! (`SE² = var(z) / ESS(z)`, ESS pooled over chains, `common::stats::ess`), and the same
//! estimate with the control variates of `control`: reported when they cut its variance and
//! agree with it, always beside the plain one; and that estimate combined with the
//! importance-sampling estimate from the independence proposals the chains drew anyway
//! ([`combine_with_proposals`]), reported when it is trustworthy and cuts the variance.
//! Must not: run chains or change the plan.

use super::control;
use crate::common::maths::{exp, ln, log_sum_exp, pow, sqrt};
use crate::common::psis::{pareto_khat, KHAT_FINITE_VARIANCE};
use crate::sample::series::{mean_square, Series};
use crate::sample::warmup::{under_covered_share, UNDER_COVERED};
use crate::sample::{Plan, Record};
use serde::Serialize;

/// log Z, its standard error and the ESS of its series, with the log p(1|x) of every draw.
pub struct LogZ {
    pub log_z: f64,
    pub se: f64,
    pub ess: f64,
    /// The series the estimate was made from (the draws' weights come from it).
    pub series: Series,
    /// The method note's estimate without control variates, and its standard error.
    pub plain: f64,
    pub plain_se: f64,
    /// What the control variates did (`None`: not tried).
    pub control: Option<ControlSummary>,
    /// What the combination with the independence proposals did (`None`: not tried).
    pub proposals: Option<ProposalSummary>,
}

/// What the control variates of [`crate::estimate::control`] did to the log Z estimate.
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
    let tempered = plan.is_tempered();
    let series = if tempered {
        Series::new(&plan.bias, records)
    } else {
        Series::untempered(records)
    };
    let (log_z, se, ess_z) = if tempered && !series.is_empty() {
        // + log Q₊: the base's mass on the target's support (see `Plan::measure_support`).
        let (q_plus, q_se) = plan.support;
        let log_z = series.log_z(&plan.bias, plan.base.log_zeta) + ln(q_plus);
        let zs = series.linearised();
        let var = mean_square(&zs);
        let e = series.ess_of(&zs);
        let support_rel = q_se / q_plus;
        (log_z, sqrt(var / e + support_rel * support_rel), e)
    } else {
        (f64::NAN, f64::NAN, f64::NAN)
    };
    LogZ {
        log_z,
        se,
        ess: ess_z,
        series,
        plain: log_z,
        plain_se: se,
        control: None,
        proposals: None,
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
/// Below that cap, the standard error credits the control variates with the apparent variance
/// reduction g raised to this power (g^¾: 8 for an apparent 16×), for the same reason: the
/// apparent reduction is itself estimated from the draws, and the larger it looks, the more of
/// it is the residual's missing tail. (Chosen by measurement on the default demo, 84 seeds:
/// crediting the full g gave 95 % intervals that covered the truth in 90.5 % of runs and errors
/// 1.21 of the SE in root mean square, the runs with g above 8 being the worst; g^¾ gave
/// 95.2 % and 0.97. Targets whose apparent g exceeds 25^{4/3} ≈ 73, such as x⁴, meet the cap
/// either way.)
pub const CONTROL_GAIN_CREDIT: f64 = 0.75;

/// The log Z that Kiln reports from the kept records of a frozen plan: [`log_z_estimate`], with
/// the control variates when they help ([`with_controls`]), combined with the independence
/// proposals' importance-sampling estimate when that helps ([`combine_with_proposals`]). Each
/// step says in its summary what it did and why.
pub fn log_z_reported(plan: &Plan, records: &[Record]) -> LogZ {
    let (out, noise) = with_controls(plan, records);
    combine_with_proposals(records, out, &noise)
}

/// [`log_z_estimate`] with the control variates of [`crate::estimate::control`]: the same estimate with
/// the part of its noise that the base's known moments explain removed. Falls back to the
/// plain estimate (saying why) when there are too few draws, when the density is zero on part
/// of the base's support (the identity behind the features then fails), or when the adjusted
/// estimate is not better or disagrees with the plain one. Also returns the per-draw noise
/// series of the estimate it settles on (the linearised series, or the regression's residual).
pub fn with_controls(plan: &Plan, records: &[Record]) -> (LogZ, Vec<f64>) {
    let mut out = log_z_estimate(plan, records);
    if !out.log_z.is_finite() {
        return (out, Vec::new());
    }
    let mut noise = out.series.linearised();
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
        return (out, noise);
    }
    let d = plan.base.q.dim;
    let series = &out.series;
    let mut points: Vec<&[f64]> = Vec::new();
    let mut fold = Vec::new();
    let halves = records.len() < 2;
    for (c, r) in records.iter().enumerate() {
        for i in 0..r.delta.len() {
            points.push(&r.z[i * d..(i + 1) * d]);
            fold.push(if halves {
                u8::from(2 * i >= r.delta.len())
            } else {
                (c % 2) as u8
            });
        }
    }
    let p0 = series.base_weights();
    let Some(adj) = control::adjust(&plan.base.q, &points, &noise, &p0, &fold) else {
        out.control = Some(skip("not used: too few draws for the features"));
        return (out, noise);
    };
    let var = mean_square(&adj.residual);
    let e = series.ess_of(&adj.residual);
    let se_raw = sqrt(var / e);
    let log_z = out.plain - adj.correction;
    let ratio = (out.plain_se * out.plain_se) / (se_raw * se_raw);
    let credited = pow(ratio, CONTROL_GAIN_CREDIT).min(CONTROL_MAX_GAIN);
    let se = if credited > 1.0 {
        se_raw.max(out.plain_se / sqrt(credited))
    } else {
        se_raw
    };
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
            if credited < ratio {
                format!(" (the standard error credits them with {credited:.1}×)")
            } else {
                String::new()
            }
        );
        out.log_z = log_z;
        out.se = se;
        out.ess = e;
        noise = adj.residual;
    }
    out.control = Some(summary);
    (out, noise)
}

/// What [`combine_with_proposals`] did.
#[derive(Clone, Debug, Serialize)]
pub struct ProposalSummary {
    /// Whether `log_z` is the combined estimate (otherwise the tempered one, for the reason given).
    pub used: bool,
    /// λ: the tempered estimate's share in the combination λ·T + (1 − λ)·I.
    pub tempered_share: f64,
    /// The proposals' own estimate I = log mean w and its standard error.
    pub log_z_proposals: f64,
    pub se_proposals: f64,
    /// Pareto k̂ of the proposals' weights (NaN: too few to fit).
    pub khat: f64,
    /// The tempered estimate T (with control variates if they were used) and its SE.
    pub log_z_tempered: f64,
    pub se_tempered: f64,
    pub proposals: usize,
    pub note: String,
}

/// Fewest proposals for the combination to be tried.
pub const MIN_PROPOSALS: usize = 200;
/// The combination is reported only if it cuts the variance of the tempered estimate by at
/// least this factor (a smaller gain is not worth a second estimator's risks).
pub const PROPOSAL_MIN_GAIN: f64 = 1.1;
/// The two estimates must agree within this many standard errors of their difference.
pub const PROPOSAL_AGREEMENT: f64 = 3.0;

/// Combines the tempered estimate T (`tempered`, whose per-draw noise series is `noise`) with
/// the importance-sampling estimate I = log mean w from the independence proposals x′ ~ q′ the
/// chains drew in every kept iteration (w = f(x′)/q′(x′), `Record::proposal_log_w`). Those
/// proposals are independent draws from q′ whose energies were computed anyway for the
/// independence move, so I is free; when the base is already close to the target it is the
/// better estimator (every evaluation counts), and when the base is poor it is worse.
///
/// Linearised, T − log Z ≈ mean(z) and I − log Z ≈ mean(v) with v = w/mean(w) − 1, draw by draw
/// in the same iterations. With A = Var T, B = Var I and C = Cov(T, I) — each variance being
/// `mean(x²)/ESS(x)` over the chains, and C = [V(z + v) − V(z) − V(v)]/2 — the combination
/// λT + (1 − λ)I with λ = (B − C)/(A + B − 2C) (clamped to [0, 1]) has the least variance
/// λ²A + (1 − λ)²B + 2λ(1 − λ)C among such combinations (the optimal linear combination of two
/// correlated unbiased estimators; e.g. Owen 2013, "Monte Carlo theory, methods and examples",
/// §8.6 on combining estimates). Its SE² is floored at min(A, B)/2, so that an estimated
/// negative covariance cannot buy more precision than two independent estimators would give.
///
/// The tempered estimate is kept (saying why) when the proposals are too few, when the target
/// has more than [`UNDER_COVERED`] of its weight where the base falls short of it (there the
/// proposals rarely land, I is biased low, and its standard error does not show it), when the
/// weights' k̂ says their variance is infinite, when T and I disagree by more than
/// [`PROPOSAL_AGREEMENT`] standard errors of their difference, or when the gain is below
/// [`PROPOSAL_MIN_GAIN`].
pub fn combine_with_proposals(records: &[Record], mut tempered: LogZ, noise: &[f64]) -> LogZ {
    if !tempered.log_z.is_finite() || noise.len() != tempered.series.len() {
        return tempered;
    }
    let n = tempered.series.len();
    let log_w: Vec<f64> = records
        .iter()
        .flat_map(|r| r.proposal_log_w.iter().copied())
        .collect();
    let aligned = records
        .iter()
        .all(|r| r.proposal_log_w.len() == r.delta.len());
    let (t, a) = (tempered.log_z, tempered.se * tempered.se);
    let mut summary = ProposalSummary {
        used: false,
        tempered_share: 1.0,
        log_z_proposals: f64::NAN,
        se_proposals: f64::NAN,
        khat: f64::NAN,
        log_z_tempered: t,
        se_tempered: tempered.se,
        proposals: log_w.len(),
        note: String::new(),
    };
    if !aligned || log_w.len() != n || n < MIN_PROPOSALS {
        summary.note = format!(
            "not used: fewer than {MIN_PROPOSALS} independence proposals in the kept iterations"
        );
        tempered.proposals = Some(summary);
        return tempered;
    }
    let lse = log_sum_exp(&log_w);
    let i_est = lse - ln(n as f64);
    let v: Vec<f64> = log_w.iter().map(|l| exp(l - i_est) - 1.0).collect();
    let series = &tempered.series;
    let var_of = |x: &[f64]| mean_square(x) / series.ess_of(x);
    let b = var_of(&v);
    let both: Vec<f64> = noise.iter().zip(&v).map(|(x, y)| x + y).collect();
    let c = 0.5 * (var_of(&both) - var_of(noise) - b);
    summary.log_z_proposals = i_est;
    summary.se_proposals = sqrt(b);
    summary.khat = pareto_khat(&log_w).unwrap_or(f64::NAN);
    let under = under_covered_share(series, records);
    let diff_var = (a + b - 2.0 * c).max(0.0);
    let lambda = if diff_var > 0.0 {
        ((b - c) / diff_var).clamp(0.0, 1.0)
    } else {
        1.0
    };
    let var = (lambda * lambda * a
        + (1.0 - lambda) * (1.0 - lambda) * b
        + 2.0 * lambda * (1.0 - lambda) * c)
        .max(0.5 * a.min(b));
    let combined = lambda * t + (1.0 - lambda) * i_est;
    let gain = a / var;
    if !(i_est.is_finite() && b.is_finite() && c.is_finite()) {
        summary.note = "not used: the proposals' estimate is not finite".into();
    } else if under > UNDER_COVERED {
        summary.note = format!(
            "not used: {:.1} % of the target's weight lies where the base falls short of it by more than e² (the limit is {:.0} %), where proposals rarely land",
            100.0 * under,
            100.0 * UNDER_COVERED
        );
    } else if summary.khat > KHAT_FINITE_VARIANCE {
        summary.note = format!(
            "not used: the proposals' weights have k̂ = {:.2} (above {KHAT_FINITE_VARIANCE}, an infinite variance)",
            summary.khat
        );
    } else if (t - i_est).abs() > PROPOSAL_AGREEMENT * sqrt(diff_var.max(0.5 * a.min(b))) {
        summary.note = format!(
            "not used: the proposals' estimate {i_est:.6} differs from the tempered one by more than {PROPOSAL_AGREEMENT} standard errors"
        );
    } else if !(gain >= PROPOSAL_MIN_GAIN) {
        summary.note = format!(
            "not used: the combination would cut the variance of log Z by only {gain:.2}× (less than {PROPOSAL_MIN_GAIN}×)"
        );
    } else {
        summary.used = true;
        summary.tempered_share = lambda;
        summary.note = format!(
            "combined with the {n} independence proposals' importance-sampling estimate (weight {:.2}), cutting the variance of log Z by {gain:.1}×",
            1.0 - lambda
        );
        tempered.log_z = combined;
        tempered.se = sqrt(var);
    }
    tempered.proposals = Some(summary);
    tempered
}
