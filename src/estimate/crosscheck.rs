//! Cross-checks of the sampler's log Z and the verdict on them, as typed values.
//!
//! Owns: [`CrossCheck`] (the exact value for mixtures, the grid, importance sampling, Laplace),
//! which checks vote and why the others do not, the agreement rule, and [`Verdict`]: agree,
//! disagree, or not enough evidence, with the checks that voted, the reasons of those that did
//! not, and whether the mode search was limited. The command line, the JSON and the page all
//! read this value; nothing anywhere matches on its text.
//!
//! The agreement rule: a check agrees when the sampler's log Z and its value differ by at most
//! [`AGREEMENT_SIGMAS`] combined standard errors, √(SE² + error²), plus a round-off allowance of
//! [`ROUND_OFF`] · (1 + |log Z|). Four standard errors keep false alarms rare when several checks
//! vote on one run (about 1 in 16 000 per check for honest error bars); the round-off allowance
//! is far below any statistical error and only keeps an exact answer from disagreeing with an
//! estimate whose error bar is itself at round-off. There is no other floor: a difference that
//! is small in nats but large in standard errors is a disagreement, because it says the error
//! bar is wrong.
//! Must not: compute any of the independent values (they come in as numbers).

use crate::common::format::num;
use crate::common::maths::sqrt;
use crate::common::psis::KHAT_FINITE_VARIANCE;
use crate::search::Coverage;
use serde::Serialize;

/// A check agrees within this many combined standard errors.
pub const AGREEMENT_SIGMAS: f64 = 4.0;
/// Differences below `ROUND_OFF · (1 + |log Z|)` are round-off.
pub const ROUND_OFF: f64 = 1e-9;
/// The importance check votes only with at least this many effective draws (a sample variance
/// from fewer is itself too noisy to make an error bar).
pub const IS_MIN_ESS: f64 = 100.0;

/// Which independent value a check is.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Serialize)]
#[serde(rename_all = "snake_case")]
pub enum CheckKind {
    /// The exact log Z of a Gaussian mixture (the log of its total weight).
    Exact,
    /// Grid quadrature (one or two unknowns).
    Grid,
    /// Importance sampling from the base.
    Importance,
    /// The Laplace approximation: information, never a vote.
    Laplace,
}

impl CheckKind {
    pub fn label(self) -> &'static str {
        match self {
            CheckKind::Exact => "exact",
            CheckKind::Grid => "grid",
            CheckKind::Importance => "importance",
            CheckKind::Laplace => "laplace",
        }
    }
}

/// One independent estimate of log Z shown beside the sampler's.
#[derive(Clone, Debug, Serialize)]
pub struct CrossCheck {
    pub name: CheckKind,
    pub log_z: f64,
    /// Its own error estimate (0 for exact; none for Laplace, an approximation).
    pub error: Option<f64>,
    /// (sampler − check) / combined error, when both have errors.
    pub z_score: Option<f64>,
    /// Whether it takes part in the verdict.
    pub votes: bool,
    /// When it votes: whether it agrees.
    pub agrees: Option<bool>,
    /// When it does not vote: why.
    pub abstains_because: Option<String>,
    pub note: String,
}

/// The independent values a run has, as numbers.
#[derive(Clone, Copy, Debug, Default)]
pub struct CheckInputs {
    pub exact: Option<f64>,
    /// The grid's value and error estimate; `converged`: whether its refinement levels agreed
    /// before its budget ran out.
    pub grid: Option<GridValue>,
    pub importance: Option<ImportanceValue>,
    pub laplace: f64,
    /// Whether every mode passed the Gaussian-shape test of the mode search.
    pub modes_gaussian: bool,
}

#[derive(Clone, Copy, Debug)]
pub struct GridValue {
    pub log_z: f64,
    pub error: f64,
    pub converged: bool,
}

#[derive(Clone, Copy, Debug)]
pub struct ImportanceValue {
    pub log_z: f64,
    pub se: f64,
    pub ess: f64,
    pub khat: f64,
}

fn agreement(log_z: f64, se: f64, value: f64, err: f64) -> (f64, bool) {
    let diff = log_z - value;
    let comb = sqrt(se * se + err * err);
    let allowance = ROUND_OFF * (1.0 + log_z.abs());
    let z = if comb > 0.0 {
        diff / comb
    } else if diff.abs() <= allowance {
        0.0
    } else {
        f64::INFINITY * diff.signum()
    };
    (z, diff.abs() <= AGREEMENT_SIGMAS * comb + allowance)
}

/// Compares the sampler's log Z (± `se`) with each independent value.
pub fn cross_checks(log_z: f64, se: f64, inputs: &CheckInputs) -> Vec<CrossCheck> {
    let mut out = Vec::new();
    let voting = |name: CheckKind, value: f64, err: f64, note: String| {
        let (z, agrees) = agreement(log_z, se, value, err);
        CrossCheck {
            name,
            log_z: value,
            error: Some(err),
            z_score: Some(z),
            votes: true,
            agrees: Some(agrees),
            abstains_because: None,
            note,
        }
    };
    let abstaining =
        |name: CheckKind, value: f64, err: Option<f64>, why: String, note: String| CrossCheck {
            name,
            log_z: value,
            error: err,
            z_score: None,
            votes: false,
            agrees: None,
            abstains_because: Some(why),
            note,
        };
    if let Some(e) = inputs.exact {
        out.push(voting(
            CheckKind::Exact,
            e,
            0.0,
            "log of the mixture's total weight".into(),
        ));
    }
    if let Some(g) = inputs.grid {
        let note =
            "quadrature on a grid over the searched region, refined where the density concentrates"
                .to_string();
        if !g.log_z.is_finite() || !g.error.is_finite() {
            out.push(abstaining(
                CheckKind::Grid,
                g.log_z,
                None,
                "the grid found no finite value".into(),
                note,
            ));
        } else if g.converged {
            out.push(voting(CheckKind::Grid, g.log_z, g.error, note));
        } else {
            out.push(voting(
                CheckKind::Grid,
                g.log_z,
                g.error,
                format!("{note}; its work budget ran out before two refinement levels agreed, so its error is the last difference between levels"),
            ));
        }
    }
    if let Some(is) = inputs.importance {
        let note = format!(
            "importance sampling from the base ({:.0} effective draws, Pareto k̂ {})",
            is.ess,
            if is.khat.is_finite() {
                format!("{:.2}", is.khat)
            } else {
                "unknown".into()
            }
        );
        let why = if !(is.log_z.is_finite() && is.se.is_finite()) {
            Some("its estimate is not finite".to_string())
        } else if !(is.khat <= KHAT_FINITE_VARIANCE) {
            // The check's error bar is the usual one for raw weights, which needs their variance
            // to be finite (measured: with k̂ up to 0.7 allowed, its ±2 SE covered the truth in
            // 87–88 % of 30 seeds on the egg crate and the two shells).
            Some(format!(
                "its weights have a heavy tail (Pareto k̂ {} above {KHAT_FINITE_VARIANCE}: their variance is infinite), so its error bar cannot be trusted",
                if is.khat.is_finite() { format!("{:.2}", is.khat) } else { "unknown".into() }
            ))
        } else if is.ess < IS_MIN_ESS {
            Some(format!(
                "only {:.0} effective draws (fewer than {IS_MIN_ESS:.0}): its error bar is itself too uncertain",
                is.ess
            ))
        } else {
            None
        };
        out.push(match why {
            Some(why) => abstaining(CheckKind::Importance, is.log_z, Some(is.se), why, note),
            None => voting(CheckKind::Importance, is.log_z, is.se, note),
        });
    }
    // Laplace: information only. A hint when it is far off although every mode looked
    // Gaussian (otherwise being off is what a curved or heavy-tailed mode does).
    let far = (log_z - inputs.laplace).abs() > 0.5;
    let mut note = "sum of Gaussian approximations at the modes (no error bar)".to_string();
    if far && inputs.modes_gaussian && log_z.is_finite() {
        note.push_str(&format!(
            "; it is {} nats from log Z although every mode passed the Gaussian-shape test: modes may overlap, or a mode may be missing",
            num(log_z - inputs.laplace)
        ));
    }
    out.push(abstaining(
        CheckKind::Laplace,
        inputs.laplace,
        None,
        "an approximation without an error bar: shown for information".into(),
        note,
    ));
    out
}

/// The verdict's three answers.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Serialize, serde::Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum Agreement {
    Agree,
    Disagree,
    NotEnoughEvidence,
}

/// A check that did not vote, and why.
#[derive(Clone, Debug, Serialize)]
pub struct Abstention {
    pub check: CheckKind,
    pub reason: String,
}

/// The verdict on a run's log Z.
#[derive(Clone, Debug, Serialize)]
pub struct Verdict {
    pub state: Agreement,
    /// True when the mode search's evidence says a mode could have been missed (see the
    /// search's coverage): an `agree` then means "agree, given the modes found".
    pub search_limited: bool,
    /// One line for a headline; never contradicts `sentence`.
    pub headline: String,
    pub sentence: String,
    /// The checks that voted.
    pub voted: Vec<CheckKind>,
    /// Of those, the ones that disagree.
    pub disagreeing: Vec<CheckKind>,
    pub abstained: Vec<Abstention>,
}

impl Verdict {
    /// Agree, with nothing in the search's evidence against it.
    pub fn plain_agree(&self) -> bool {
        self.state == Agreement::Agree && !self.search_limited
    }
}

/// The verdict on the cross-checks, given the search's evidence that every mode was found.
pub fn verdict(checks: &[CrossCheck], log_z: f64, coverage: &Coverage) -> Verdict {
    let voted: Vec<CheckKind> = checks.iter().filter(|c| c.votes).map(|c| c.name).collect();
    let disagreeing: Vec<CheckKind> = checks
        .iter()
        .filter(|c| c.agrees == Some(false))
        .map(|c| c.name)
        .collect();
    let abstained: Vec<Abstention> = checks
        .iter()
        .filter(|c| !c.votes)
        .map(|c| Abstention {
            check: c.name,
            reason: c.abstains_because.clone().unwrap_or_default(),
        })
        .collect();
    let search_limited = !coverage.thorough();
    let scope = format!("Searched: {}.", coverage.summary);
    let limits: Vec<&str> = coverage
        .limitations
        .iter()
        .map(|l| l.sentence.as_str())
        .collect();
    let names =
        |v: &[CheckKind]| -> String { v.iter().map(|k| k.label()).collect::<Vec<_>>().join(", ") };
    let (state, headline, sentence) = if !log_z.is_finite() {
        (
            Agreement::NotEnoughEvidence,
            "log Z could not be estimated".to_string(),
            "The sampler's log Z is not finite: see the warnings.".to_string(),
        )
    } else if !disagreeing.is_empty() {
        let parts: Vec<String> = checks
            .iter()
            .filter(|c| c.agrees == Some(false))
            .map(|c| {
                format!(
                    "{} gives {:.4} ({:+.1} combined standard errors away)",
                    c.name.label(),
                    c.log_z,
                    c.z_score.unwrap_or(f64::NAN)
                )
            })
            .collect();
        (
            Agreement::Disagree,
            "The checks disagree: do not use this log Z yet".to_string(),
            format!(
                "{}. At least one number is wrong: a mode may be missing, or an error bar too small. {scope}",
                parts.join("; ")
            ),
        )
    } else if voted.is_empty() {
        let why: Vec<String> = abstained
            .iter()
            .map(|a| format!("{}: {}", a.check.label(), a.reason))
            .collect();
        (
            Agreement::NotEnoughEvidence,
            "Not enough evidence to judge log Z".to_string(),
            format!(
                "No independent check could vote ({}), so log Z rests on the sampler alone. {scope}",
                why.join("; ")
            ),
        )
    } else if search_limited {
        (
            Agreement::Agree,
            "The checks agree, given the modes found".to_string(),
            format!(
                "The independent checks ({}) agree with the sampler, given the modes found; but {}. {scope}",
                names(&voted),
                limits.join("; and ")
            ),
        )
    } else {
        (
            Agreement::Agree,
            "The independent checks agree".to_string(),
            format!(
                "The independent checks ({}) agree with the sampler within their errors, given the modes found in the region searched. {scope}",
                names(&voted)
            ),
        )
    };
    Verdict {
        state,
        search_limited,
        headline,
        sentence,
        voted,
        disagreeing,
        abstained,
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn inputs() -> CheckInputs {
        CheckInputs {
            exact: None,
            grid: Some(GridValue {
                log_z: 1.0,
                error: 1e-4,
                converged: true,
            }),
            importance: Some(ImportanceValue {
                log_z: 1.0,
                se: 0.01,
                ess: 3000.0,
                khat: 0.2,
            }),
            laplace: 0.2,
            modes_gaussian: true,
        }
    }

    #[test]
    fn four_standard_errors_and_no_floor() {
        // 0.005 nats apart with SE 0.001: 5 standard errors, a disagreement although small.
        let c = cross_checks(1.005, 0.001, &inputs());
        let grid = c.iter().find(|c| c.name == CheckKind::Grid).unwrap();
        assert_eq!(grid.agrees, Some(false));
        let c = cross_checks(1.0039, 0.001, &inputs());
        let grid = c.iter().find(|c| c.name == CheckKind::Grid).unwrap();
        assert_eq!(grid.agrees, Some(true));
        // An exact value against an estimate whose SE is at round-off.
        let exact = CheckInputs {
            exact: Some(3.0),
            ..inputs()
        };
        let c = cross_checks(3.0 + 1e-12, 1e-16, &exact);
        assert_eq!(c[0].agrees, Some(true));
    }

    #[test]
    fn laplace_never_votes_and_heavy_tails_abstain() {
        let mut i = inputs();
        i.importance = Some(ImportanceValue {
            log_z: 1.0,
            se: 0.01,
            ess: 3000.0,
            khat: 0.9,
        });
        let c = cross_checks(1.0, 0.01, &i);
        let lap = c.iter().find(|c| c.name == CheckKind::Laplace).unwrap();
        assert!(!lap.votes && lap.agrees.is_none());
        assert!(lap.note.contains("Gaussian-shape test"));
        let is = c.iter().find(|c| c.name == CheckKind::Importance).unwrap();
        assert!(!is.votes && is.abstains_because.as_ref().unwrap().contains("0.90"));
    }
}
