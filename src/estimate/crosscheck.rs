//! Cross-checks of the sampler's log Z and the verdict on them.
//!
//! Owns: [`CrossCheck`] (the exact value for mixtures, the grid, importance sampling, Laplace),
//! the agreement rule, and the verdict.
//! Must not: compute any of the independent values (they come in as numbers).

use crate::common::maths::sqrt;
use serde::Serialize;

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
