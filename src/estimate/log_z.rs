//! log Z ± SE from the kept draws of a frozen plan (method note, "Estimates from every draw").
//!
//! Owns: `log Z = log ζ + g(0) − g(1) + log mean p(1|x) − log mean p(0|x) + log Q₊` (Q₊: the
//! base's mass on the target's support, 1 unless the density is zero somewhere; see
//! `Plan::measure_support`) with its standard error from the linearised series
//! (`SE² = var(z) / ESS(z)`, ESS pooled over chains, `common::stats::ess`), and the same
//! estimate with the control variates of `control`: reported when they cut its variance and
//! agree with it, always beside the plain one.
//! Must not: run chains or change the plan.

use super::control;
use crate::common::maths::{ln, sqrt};
use crate::sample::series::{mean_square, Series};
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

/// [`log_z_estimate`] with the control variates of [`crate::estimate::control`]: the same estimate with
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
    let z = series.linearised();
    let p0 = series.base_weights();
    let Some(adj) = control::adjust(&plan.base.q, &points, &z, &p0, &fold) else {
        out.control = Some(skip("not used: too few draws for the features"));
        return out;
    };
    let var = mean_square(&adj.residual);
    let e = series.ess_of(&adj.residual);
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
