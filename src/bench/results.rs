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

/// The goal of the issue: Kiln's RMSE at most this fraction of AIS's and of PT's …
pub const GOAL_RATIO: f64 = 0.3;
/// … on at least this many targets.
pub const GOAL_TARGETS: usize = 5;

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
            met: false,
        };
        for t in targets {
            let Some(k) = find(rows, t.name, Method::Kiln, b) else {
                continue;
            };
            let mut wins = 0;
            for m in [Method::Ais, Method::Pt, Method::Is, Method::Nuts] {
                let Some(r) = find(rows, t.name, m, b) else {
                    continue;
                };
                let lr = ratio(k.log_z_rmse, r.log_z_rmse, r.failures > 0);
                let mr = ratio(k.mass_error, r.mass_error, false);
                if let Some(x) = lr {
                    if x <= GOAL_RATIO && m == Method::Ais {
                        g.beats_ais.push(t.name.to_string());
                        wins += 1;
                    }
                    if x <= GOAL_RATIO && m == Method::Pt {
                        g.beats_pt.push(t.name.to_string());
                        wins += 1;
                    }
                }
                ratios.push(Ratio {
                    target: t.name.to_string(),
                    budget: b,
                    baseline: m.name().to_string(),
                    log_z_rmse: lr,
                    mass_error: mr,
                });
            }
            if wins == 2 {
                g.beats_both.push(t.name.to_string());
            }
        }
        g.met = g.beats_both.len() >= GOAL_TARGETS;
        goals.push(g);
    }
    (ratios, goals)
}
