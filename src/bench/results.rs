//! Aggregates of the benchmark's jobs: RMSE, bias, mode-mass error, time, and Kiln ÷ baseline
//! ratios with the goals.
//!
//! Owns: [`Row`], [`Ratio`], [`Goals`], [`Report`] and how they are computed from job results.
//! Must not: run jobs or write files.

use super::jobs::JobResult;
use super::targets::BenchTarget;
use super::Method;
use crate::bench::speed;
use crate::bench::KilnCounts;
use crate::common::maths::sqrt;
use serde::Serialize;

/// Kiln's RMSE at most this fraction of AIS's and of PT's (both) …
pub const GOAL_RATIO: f64 = 0.3;
/// … on at least this many targets at [`MID_BUDGET`], and on every target from [`LARGE_BUDGET`].
pub const GOAL_TARGETS: usize = 5;
/// At budgets up to [`MID_BUDGET`], Kiln's RMSE at most this fraction of the better of AIS and
/// PT on every target.
pub const SMALL_BUDGET_RATIO: f64 = 0.5;
/// The budgets the goals name (energy evaluations).
pub const MID_BUDGET: u64 = 60_000;
pub const LARGE_BUDGET: u64 = 200_000;
/// Where the base is good, Kiln's RMSE at most this multiple of importance sampling's from the
/// same base. The base counts as good at a budget when importance sampling beats both annealing
/// baselines there (a property measured in the same run, not assumed per target).
pub const GOOD_BASE_IS_RATIO: f64 = 1.0;
/// A run's error bar covers the reference when |estimate − reference| ≤ this many SEs (the
/// calibration suite's rule).
pub const COVERAGE_SES: f64 = 2.0;

/// One line of the results: a method on a target at a budget, over the seeds.
#[derive(Clone, Debug, Serialize)]
pub struct Row {
    pub target: String,
    pub method: String,
    pub budget: u64,
    /// Root mean square error of log Z over the seeds (null for NUTS, or when a run failed).
    pub log_z_rmse: Option<f64>,
    /// Mean error of log Z (estimate − reference).
    pub log_z_bias: Option<f64>,
    /// Mean of the runs' own standard errors of log Z.
    pub log_z_mean_se: Option<f64>,
    /// Share of runs whose log Z ± 2 SE covers the reference ([`COVERAGE_SES`]).
    pub coverage: Option<f64>,
    /// Root mean square over the seeds of each run's largest |mass − exact| (null: one mode).
    pub mass_error: Option<f64>,
    /// Mean wall time of one run (single-threaded).
    pub seconds: f64,
    /// Mean energy evaluations actually used.
    pub evaluations: f64,
    pub seeds: usize,
    /// Runs without a finite log Z.
    pub failures: usize,
    /// Tuning of the first seed's run.
    pub tuning: String,
}

#[derive(Clone, Debug, Serialize)]
pub struct Ratio {
    pub target: String,
    pub budget: u64,
    pub baseline: String,
    /// Kiln's log Z RMSE ÷ the baseline's.
    pub log_z_rmse: Option<f64>,
    /// Kiln's mass error ÷ the baseline's.
    pub mass_error: Option<f64>,
}

#[derive(Clone, Debug, Serialize)]
pub struct GoalAtBudget {
    pub budget: u64,
    /// Targets where Kiln's RMSE ≤ 0.3 × AIS's.
    pub beats_ais: Vec<String>,
    /// Targets where Kiln's RMSE ≤ 0.3 × PT's.
    pub beats_pt: Vec<String>,
    /// Targets where both hold.
    pub beats_both: Vec<String>,
    /// Targets where Kiln's RMSE ≤ 0.5 × the better of AIS's and PT's.
    pub half_of_better: Vec<String>,
    /// Targets where the base is good (importance sampling beats AIS and PT).
    pub good_base: Vec<String>,
    /// Of those, the ones where Kiln's RMSE ≤ 1.0 × importance sampling's.
    pub matches_is: Vec<String>,
    /// Targets compared (Kiln, AIS and PT all ran).
    pub compared: usize,
    /// Kiln's lowest ±2 SE coverage over the targets, and where.
    pub lowest_coverage: Option<(String, f64)>,
    /// Each goal that applies at this budget, and whether it was met.
    pub goals: Vec<(String, bool)>,
    /// All of them met.
    pub met: bool,
}

#[derive(Clone, Debug, Serialize)]
pub struct Goals {
    pub accuracy: Vec<GoalAtBudget>,
    /// `None` when the speed was not measured (`--no-speed`).
    pub worst_tape_ratio: Option<f64>,
    pub tape_met: Option<bool>,
    pub worst_wasm_ratio: Option<f64>,
    pub wasm_met: Option<bool>,
}

#[derive(Clone, Debug, Serialize)]
pub struct WasmRatio {
    pub energy: String,
    /// WebAssembly ns ÷ native ns, through the tape.
    pub tape: f64,
    /// The same for the hand-written function.
    pub hand: f64,
}

#[derive(Clone, Debug, Serialize)]
pub struct Speed {
    pub native: Vec<speed::SpeedRow>,
    pub wasm: Option<Vec<speed::SpeedRow>>,
    pub wasm_over_native: Option<Vec<WasmRatio>>,
    pub wasm_note: String,
}

#[derive(Clone, Debug, Serialize)]
pub struct TargetInfo {
    pub name: String,
    pub description: String,
    pub dimension: usize,
    pub reference_log_z: f64,
    pub reference: String,
    pub modes: usize,
    pub laplace_log_z: f64,
    pub mode_search_evaluations: u64,
    pub mode_search_seconds: f64,
    pub kiln_counts: Vec<(u64, KilnCounts)>,
}

#[derive(Clone, Debug, Serialize)]
pub struct Settings {
    pub quick: bool,
    pub budgets: Vec<u64>,
    pub seeds: u64,
    pub date: String,
    pub machine: String,
    pub threads: usize,
    pub profile: String,
    pub total_seconds: f64,
    /// The machine's 1-minute load average (other work running beside the benchmark).
    pub load_average: String,
}

/// Everything `kiln bench` measured.
#[derive(Clone, Debug, Serialize)]
pub struct Report {
    pub rows: Vec<Row>,
    pub speed: Speed,
    pub ratios: Vec<Ratio>,
    pub goals: Goals,
    pub targets: Vec<TargetInfo>,
    pub settings: Settings,
}

pub(super) fn aggregate(
    target: &BenchTarget,
    method: Method,
    budget: u64,
    results: &[&JobResult],
) -> Row {
    let n = results.len();
    let errs: Vec<f64> = results.iter().map(|r| r.log_z - target.log_z).collect();
    let failures = errs.iter().filter(|e| !e.is_finite()).count();
    let (rmse, bias) = if !method.has_log_z() || n == 0 || failures > 0 {
        (None, None)
    } else {
        (
            Some(sqrt(errs.iter().map(|e| e * e).sum::<f64>() / n as f64)),
            Some(errs.iter().sum::<f64>() / n as f64),
        )
    };
    let ses: Vec<f64> = results.iter().map(|r| r.log_z_se).collect();
    let (mean_se, coverage) = if rmse.is_some() && ses.iter().all(|s| s.is_finite()) {
        let covered = errs
            .iter()
            .zip(&ses)
            .filter(|(e, s)| e.abs() <= COVERAGE_SES * **s)
            .count();
        (
            Some(ses.iter().sum::<f64>() / n as f64),
            Some(covered as f64 / n as f64),
        )
    } else {
        (None, None)
    };
    let mass_error = if target.groups.masses().is_some() && n > 0 {
        let v: Vec<f64> = results.iter().filter_map(|r| r.mass_error).collect();
        let ok = v.iter().all(|x| x.is_finite());
        ok.then(|| sqrt(v.iter().map(|x| x * x).sum::<f64>() / v.len().max(1) as f64))
    } else {
        None
    };
    Row {
        target: target.name.to_string(),
        method: method.name().to_string(),
        budget,
        log_z_rmse: rmse,
        log_z_bias: bias,
        log_z_mean_se: mean_se,
        coverage,
        mass_error,
        seconds: results.iter().map(|r| r.seconds).sum::<f64>() / n.max(1) as f64,
        evaluations: results.iter().map(|r| r.evaluations as f64).sum::<f64>() / n.max(1) as f64,
        seeds: n,
        failures: if method.has_log_z() { failures } else { 0 },
        tuning: results
            .first()
            .map(|r| r.tuning.clone())
            .unwrap_or_default(),
    }
}

pub(super) fn find<'a>(
    rows: &'a [Row],
    target: &str,
    method: Method,
    budget: u64,
) -> Option<&'a Row> {
    rows.iter()
        .find(|r| r.target == target && r.method == method.name() && r.budget == budget)
}

/// Kiln ÷ baseline; a failed baseline (no finite estimate in some run) counts as 0.
pub(super) fn ratio(kiln: Option<f64>, base: Option<f64>, base_failed: bool) -> Option<f64> {
    match (kiln, base) {
        (Some(k), Some(b)) if b > 0.0 => Some(k / b),
        (Some(_), None) if base_failed => Some(0.0),
        _ => None,
    }
}

pub(super) fn ratios_and_goals(
    rows: &[Row],
    targets: &[BenchTarget],
    budgets: &[u64],
) -> (Vec<Ratio>, Vec<GoalAtBudget>) {
    let mut ratios = Vec::new();
    let mut goals = Vec::new();
    for &b in budgets {
        let mut g = GoalAtBudget {
            budget: b,
            beats_ais: Vec::new(),
            beats_pt: Vec::new(),
            beats_both: Vec::new(),
            half_of_better: Vec::new(),
            good_base: Vec::new(),
            matches_is: Vec::new(),
            compared: 0,
            lowest_coverage: None,
            goals: Vec::new(),
            met: false,
        };
        for t in targets {
            let Some(k) = find(rows, t.name, Method::Kiln, b) else {
                continue;
            };
            if let Some(c) = k.coverage {
                if g.lowest_coverage.as_ref().is_none_or(|(_, x)| c < *x) {
                    g.lowest_coverage = Some((t.name.to_string(), c));
                }
            }
            let mut rmse_ratio = |m: Method| -> Option<f64> {
                let r = find(rows, t.name, m, b)?;
                let lr = ratio(k.log_z_rmse, r.log_z_rmse, r.failures > 0);
                ratios.push(Ratio {
                    target: t.name.to_string(),
                    budget: b,
                    baseline: m.name().to_string(),
                    log_z_rmse: lr,
                    mass_error: ratio(k.mass_error, r.mass_error, false),
                });
                lr
            };
            let (ais, pt, is) = (
                rmse_ratio(Method::Ais),
                rmse_ratio(Method::Pt),
                rmse_ratio(Method::Is),
            );
            rmse_ratio(Method::Nuts);
            let name = t.name.to_string();
            if let (Some(a), Some(p)) = (ais, pt) {
                g.compared += 1;
                if a <= GOAL_RATIO {
                    g.beats_ais.push(name.clone());
                }
                if p <= GOAL_RATIO {
                    g.beats_pt.push(name.clone());
                }
                if a <= GOAL_RATIO && p <= GOAL_RATIO {
                    g.beats_both.push(name.clone());
                }
                // Kiln ÷ min(AIS, PT) = max of the two ratios.
                if a.max(p) <= SMALL_BUDGET_RATIO {
                    g.half_of_better.push(name.clone());
                }
                if let Some(i) = is {
                    // IS beats both baselines when Kiln ÷ IS exceeds Kiln ÷ AIS and Kiln ÷ PT.
                    if i > a.max(p) {
                        g.good_base.push(name.clone());
                        if i <= GOOD_BASE_IS_RATIO {
                            g.matches_is.push(name);
                        }
                    }
                }
            }
        }
        if g.compared > 0 {
            if b <= MID_BUDGET {
                g.goals.push((
                    format!("≤ {SMALL_BUDGET_RATIO}× the better of AIS and PT on every target"),
                    g.half_of_better.len() == g.compared,
                ));
            }
            if b == MID_BUDGET {
                g.goals.push((
                    format!(
                        "≤ {GOAL_RATIO}× both on at least {} targets",
                        GOAL_TARGETS.min(g.compared)
                    ),
                    g.beats_both.len() >= GOAL_TARGETS.min(g.compared),
                ));
            }
            if b >= LARGE_BUDGET {
                g.goals.push((
                    format!("≤ {GOAL_RATIO}× both on every target"),
                    g.beats_both.len() == g.compared,
                ));
            }
            g.goals.push((
                format!("≤ {GOOD_BASE_IS_RATIO:.1}× importance sampling where the base is good"),
                g.matches_is.len() == g.good_base.len(),
            ));
        }
        g.met = !g.goals.is_empty() && g.goals.iter().all(|(_, m)| *m);
        goals.push(g);
    }
    (ratios, goals)
}
