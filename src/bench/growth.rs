//! How the cost of a log Z estimate grows with the number of unknowns (`kiln bench --growth`).
//!
//! Owns: the growth family (two separated clusters in D = 2 … 16 unknowns, one of them
//! heavy-tailed, exact log Z), the budget ladder each method climbs until its log Z RMSE over the
//! seeds reaches [`RMSE_GOAL`], the evaluations and seconds interpolated at that point, the
//! growth exponent fitted over D, and the section of BENCHMARKS.md with its plot.
//! Must not: change how any method runs (each runs exactly as in the main benchmark, through
//! `jobs::run_job`).
//!
//! Why RMSE and not the runs' own SE: a method whose error bar is optimistic would look cheap
//! by its SE; the RMSE against the exact value cannot be fooled. The cost is interpolated on
//! log-log axes between the two rungs of the ladder that straddle the goal (the RMSE of a
//! Monte Carlo estimate falls about as budget^(−1/2), so that line is nearly straight there);
//! below the first rung it is extrapolated along that slope, and a method that misses the goal
//! at the last rung is reported as "more than" it.

use super::budget::kiln_counts;
use super::jobs::{pool, run_job, Job};
use super::output::{budget_label, log_log_chart, merge_marked, today};
use super::results::aggregate;
use super::targets::{two_clusters, BenchTarget};
use super::Method;
use crate::common::error::KilnError;
use crate::common::maths::{exp, ln};
use crate::run::prepare;
use serde::Serialize;
use std::time::Instant;

/// The numbers of unknowns measured.
pub const DIMS: [usize; 5] = [2, 4, 8, 12, 16];
/// The budgets (energy evaluations) each method climbs, smallest first.
pub const LADDER: [u64; 6] = [5_000, 15_000, 50_000, 150_000, 500_000, 1_500_000];
/// Seeds per rung.
pub const SEEDS: u64 = 10;
/// The accuracy whose cost is measured: log Z RMSE over the seeds (nats).
pub const RMSE_GOAL: f64 = 0.05;
/// The methods compared.
pub const METHODS: [Method; 3] = [Method::Kiln, Method::Ais, Method::Pt];

/// One rung of one method's ladder at one D.
#[derive(Clone, Debug, Serialize)]
pub struct Rung {
    pub budget: u64,
    pub rmse: f64,
    pub mean_se: f64,
    /// Share of runs whose log Z ± 2 SE covers the exact value.
    pub coverage: f64,
    pub seconds: f64,
    pub evaluations: f64,
}

/// A method at one D: its ladder and the cost of reaching the goal.
#[derive(Clone, Debug, Serialize)]
pub struct Climb {
    pub dim: usize,
    pub method: String,
    pub rungs: Vec<Rung>,
    /// Evaluations to reach the goal (interpolated); `None` when the last rung missed it.
    pub evaluations: Option<f64>,
    pub seconds: Option<f64>,
    /// How `evaluations` was found: "interpolated", "extrapolated below the first rung" or
    /// "not reached".
    pub how: String,
    /// Evaluations of the shared mode search (not in the budgets).
    pub mode_search_evaluations: u64,
}

/// The fitted growth exponent of one method: evaluations ∝ D^exponent.
#[derive(Clone, Debug, Serialize)]
pub struct Exponent {
    pub method: String,
    /// Fitted over every D (`None` when some D missed the goal at the last rung).
    pub exponent: Option<f64>,
    /// When some D missed it: the slope with those D's costs set to the last rung's budget,
    /// which their true costs exceed. The missed D are the largest ones here, so raising their
    /// costs to the truth could only steepen the fit: a lower bound on the exponent.
    pub lower_bound: Option<f64>,
    /// The D values where the goal was reached.
    pub dims: Vec<usize>,
}

#[derive(Clone, Debug, Serialize)]
pub struct GrowthReport {
    pub climbs: Vec<Climb>,
    pub exponents: Vec<Exponent>,
    /// Kiln's exponent ≤ each baseline's (`None`: some exponent could not be fitted).
    pub goal_met: Option<bool>,
    pub date: String,
    pub total_seconds: f64,
}

/// Least-squares slope of ln y on ln x.
pub fn log_log_slope(points: &[(f64, f64)]) -> Option<f64> {
    if points.len() < 2 {
        return None;
    }
    let n = points.len() as f64;
    let xs: Vec<f64> = points.iter().map(|p| ln(p.0)).collect();
    let ys: Vec<f64> = points.iter().map(|p| ln(p.1)).collect();
    let mx = xs.iter().sum::<f64>() / n;
    let my = ys.iter().sum::<f64>() / n;
    let sxx: f64 = xs.iter().map(|x| (x - mx) * (x - mx)).sum();
    let sxy: f64 = xs.iter().zip(&ys).map(|(x, y)| (x - mx) * (y - my)).sum();
    (sxx > 0.0).then(|| sxy / sxx)
}

/// The budget at which the RMSE reaches `goal`, from the rungs climbed (the last one at or
/// below the goal, unless none is): see the module's note.
pub fn cost_at_goal(rungs: &[(f64, f64)], goal: f64) -> (Option<f64>, &'static str) {
    let Some(k) = rungs.iter().position(|r| r.1 <= goal) else {
        return (None, "not reached");
    };
    let (b1, r1) = rungs[k];
    if k == 0 {
        // RMSE ∝ budget^(−1/2) below the first rung.
        return (
            Some(b1 * (r1 / goal) * (r1 / goal)),
            "extrapolated below the first rung",
        );
    }
    let (b0, r0) = rungs[k - 1];
    let t = (ln(goal) - ln(r0)) / (ln(r1) - ln(r0));
    (Some(exp(ln(b0) + t * (ln(b1) - ln(b0)))), "interpolated")
}

/// Runs the growth benchmark (every D, every method, up its ladder).
pub fn run_growth() -> Result<GrowthReport, KilnError> {
    let start = Instant::now();
    let threads = std::thread::available_parallelism().map_or(1, |n| n.get());
    let mut climbs = Vec::new();
    for &d in &DIMS {
        let target: BenchTarget = two_clusters(d);
        let prep = prepare(&target.spec)?;
        eprintln!(
            "kiln bench --growth: D = {d}: {} modes, {} evaluations in the mode search",
            prep.search.modes.len(),
            prep.search.evaluations
        );
        let targets = [target];
        let prepared = [prep];
        for m in METHODS {
            let mut rungs = Vec::new();
            for &b in &LADDER {
                let counts = if m == Method::Kiln {
                    vec![(0, b, kiln_counts(&prepared[0], b)?)]
                } else {
                    Vec::new()
                };
                let jobs: Vec<Job> = (1..=SEEDS)
                    .map(|seed| Job {
                        target: 0,
                        budget: b,
                        seed,
                        method: m,
                    })
                    .collect();
                let results = pool(
                    jobs.len(),
                    threads,
                    |i| run_job(&jobs[i], &targets, &prepared, &counts),
                    |_, _| {},
                );
                // The main benchmark's aggregate (RMSE, mean SE, coverage, time, evaluations).
                let row = aggregate(&targets[0], m, b, &results.iter().collect::<Vec<_>>());
                let rung = Rung {
                    budget: b,
                    // A run without a finite log Z leaves the RMSE undefined: not reached.
                    rmse: row.log_z_rmse.unwrap_or(f64::INFINITY),
                    mean_se: row.log_z_mean_se.unwrap_or(f64::NAN),
                    coverage: row.coverage.unwrap_or(f64::NAN),
                    seconds: row.seconds,
                    evaluations: row.evaluations,
                };
                eprintln!(
                    "kiln bench --growth: D = {d} {} {}: RMSE {:.4}, mean SE {:.4}, {:.2} s per run",
                    m.name(),
                    budget_label(b),
                    rung.rmse,
                    rung.mean_se,
                    rung.seconds
                );
                let reached = rung.rmse <= RMSE_GOAL;
                rungs.push(rung);
                if reached {
                    break;
                }
            }
            let pts: Vec<(f64, f64)> = rungs.iter().map(|r| (r.evaluations, r.rmse)).collect();
            let (evaluations, how) = cost_at_goal(&pts, RMSE_GOAL);
            // Seconds at the goal: the last rung's seconds per evaluation times the cost.
            let seconds = evaluations.and_then(|e| {
                let last = rungs.last()?;
                Some(e * last.seconds / last.evaluations.max(1.0))
            });
            climbs.push(Climb {
                dim: d,
                method: m.name().to_string(),
                rungs,
                evaluations,
                seconds,
                how: how.to_string(),
                mode_search_evaluations: prepared[0].search.evaluations,
            });
        }
    }
    let exponents: Vec<Exponent> = METHODS
        .iter()
        .map(|m| {
            let pts: Vec<(f64, f64)> = climbs
                .iter()
                .filter(|c| c.method == m.name())
                .filter_map(|c| c.evaluations.map(|e| (c.dim as f64, e)))
                .collect();
            let all = pts.len() == DIMS.len();
            let top = *LADDER.last().unwrap_or(&1) as f64;
            let censored: Vec<(f64, f64)> = climbs
                .iter()
                .filter(|c| c.method == m.name())
                .map(|c| (c.dim as f64, c.evaluations.unwrap_or(top)))
                .collect();
            // The bound holds when every missed D is larger than every reached one.
            let largest_reached = pts.iter().map(|p| p.0).fold(0.0, f64::max);
            let missed_are_largest = climbs
                .iter()
                .filter(|c| c.method == m.name() && c.evaluations.is_none())
                .all(|c| c.dim as f64 > largest_reached);
            Exponent {
                method: m.name().to_string(),
                exponent: if all { log_log_slope(&pts) } else { None },
                lower_bound: if !all && missed_are_largest {
                    log_log_slope(&censored)
                } else {
                    None
                },
                dims: pts.iter().map(|p| p.0 as usize).collect(),
            }
        })
        .collect();
    let kiln = exponents[0].exponent;
    // A baseline's exponent, or its lower bound: Kiln's at most that meets the goal either way.
    let goal_met = exponents[1..]
        .iter()
        .map(|e| e.exponent.or(e.lower_bound))
        .collect::<Option<Vec<f64>>>()
        .and_then(|bs| kiln.map(|k| bs.iter().all(|b| k <= *b)));
    Ok(GrowthReport {
        climbs,
        exponents,
        goal_met,
        date: today(),
        total_seconds: start.elapsed().as_secs_f64(),
    })
}

/// Markers of the growth section in BENCHMARKS.md.
pub const GROWTH_START: &str = "<!-- growth-dims:start -->";
pub const GROWTH_END: &str = "<!-- growth-dims:end -->";

/// The growth section as Markdown (`files`: with the plot).
pub fn growth_markdown(r: &GrowthReport, files: bool) -> String {
    let mut o = String::from("## Growth with the number of unknowns\n\n");
    o.push_str(&format!(
        "Generated by `kiln bench --growth` on {} (release build, {:.0} s). Target: two separated clusters in D unknowns, N(−5 e₁, I) with weight 0.7 and a Student-t (ν = 4, unit scale) at +5 e₁ with weight 0.3, both normalised, so log Z = 0 exactly. Each method climbs the budgets {} (energy evaluations; the shared mode search is not in them, as in the main benchmark) with {SEEDS} seeds per rung until its log Z RMSE is ≤ {RMSE_GOAL}; the cost of that accuracy is interpolated on log-log axes between the two rungs that straddle it. The exponent is the least-squares slope of ln(evaluations) on ln D.\n\n",
        r.date,
        r.total_seconds,
        LADDER.iter().map(|b| budget_label(*b)).collect::<Vec<_>>().join(", ")
    ));
    o.push_str("| D | method | evaluations to RMSE ≤ 0.05 | seconds (one thread) | how | last rung: RMSE, mean SE, ±2 SE coverage | mode search evaluations |\n|---|---|---|---|---|---|---|\n");
    for c in &r.climbs {
        let last = c.rungs.last();
        o.push_str(&format!(
            "| {} | {} | {} | {} | {} | {} | {} |\n",
            c.dim,
            c.method,
            c.evaluations.map_or_else(
                || format!("> {}", budget_label(*LADDER.last().unwrap_or(&0))),
                |e| format!("{e:.3e}")
            ),
            c.seconds.map_or("—".to_string(), |s| format!("{s:.3}")),
            c.how,
            last.map_or("—".to_string(), |l| format!(
                "{:.4}, {:.4}, {:.0} % at {}",
                l.rmse,
                l.mean_se,
                100.0 * l.coverage,
                budget_label(l.budget)
            )),
            c.mode_search_evaluations
        ));
    }
    o.push_str(
        "\n| method | growth exponent (evaluations ∝ D^k) | goal reached at D |\n|---|---|---|\n",
    );
    for e in &r.exponents {
        o.push_str(&format!(
            "| {} | {} | {} |\n",
            e.method,
            match (e.exponent, e.lower_bound) {
                (Some(k), _) => format!("{k:.2}"),
                (None, Some(b)) => format!(
                    "≥ {b:.2} (the D that missed the goal counted at the last rung's budget)"
                ),
                (None, None) => "— (goal not reached at every D)".to_string(),
            },
            e.dims
                .iter()
                .map(|d| d.to_string())
                .collect::<Vec<_>>()
                .join(", ")
        ));
    }
    o.push_str(&format!(
        "\nGoal: Kiln's exponent ≤ each baseline's: {}.\n",
        match r.goal_met {
            Some(true) => "met",
            Some(false) => "missed",
            None => "not judged (an exponent could not be fitted)",
        }
    ));
    if files {
        o.push_str(
            "\n![evaluations to reach log Z RMSE 0.05 against D](bench/plots/growth-dims.svg)\n",
        );
    }
    o
}

/// The plot: evaluations to the goal against D, one line per method.
pub fn growth_chart(r: &GrowthReport) -> String {
    let colours = ["#D55E00", "#0072B2", "#009E73"];
    let series: Vec<(&str, &str, Vec<Option<f64>>)> = METHODS
        .iter()
        .zip(colours)
        .map(|(m, c)| {
            (
                m.name(),
                c,
                DIMS.iter()
                    .map(|d| {
                        r.climbs
                            .iter()
                            .find(|x| x.dim == *d && x.method == m.name())
                            .and_then(|x| x.evaluations)
                    })
                    .collect(),
            )
        })
        .collect();
    let dims: Vec<u64> = DIMS.iter().map(|d| *d as u64).collect();
    log_log_chart(
        "evaluations to reach log Z RMSE 0.05",
        ("unknowns D", "energy evaluations"),
        &dims,
        &series,
    )
}

/// `kiln bench --growth [--json]`: runs it, writes its section of BENCHMARKS.md and its plot.
pub fn growth_command(json: bool) -> Result<String, KilnError> {
    let r = run_growth()?;
    let io =
        |path: &str, e: std::io::Error| KilnError::usage(format!("cannot write `{path}`: {e}"));
    std::fs::create_dir_all("bench/plots").map_err(|e| io("bench/plots", e))?;
    let path = "bench/plots/growth-dims.svg";
    std::fs::write(path, growth_chart(&r)).map_err(|e| io(path, e))?;
    let old = std::fs::read_to_string("BENCHMARKS.md").unwrap_or_default();
    std::fs::write(
        "BENCHMARKS.md",
        merge_marked(&old, GROWTH_START, GROWTH_END, &growth_markdown(&r, true)),
    )
    .map_err(|e| io("BENCHMARKS.md", e))?;
    if json {
        serde_json::to_string_pretty(&r)
            .map_err(|e| KilnError::usage(format!("could not write JSON: {e}")))
    } else {
        Ok(growth_markdown(&r, false))
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::common::maths::sqrt;

    #[test]
    fn slope_of_a_power_law_is_its_exponent() {
        let pts: Vec<(f64, f64)> = [2.0f64, 4.0, 8.0, 16.0]
            .iter()
            .map(|d| (*d, 3.0 * d * d * sqrt(*d)))
            .collect();
        assert!((log_log_slope(&pts).unwrap() - 2.5).abs() < 1e-12);
        assert!(log_log_slope(&pts[..1]).is_none());
    }

    #[test]
    fn cost_is_interpolated_between_the_straddling_rungs() {
        // RMSE = 1/√b exactly: the goal 0.05 is reached at b = 400.
        let rungs: Vec<(f64, f64)> = [100.0f64, 300.0, 1000.0]
            .iter()
            .map(|b| (*b, 1.0 / sqrt(*b)))
            .collect();
        let (b, how) = cost_at_goal(&rungs, 0.05);
        assert!((b.unwrap() - 400.0).abs() < 1e-9, "{b:?}");
        assert_eq!(how, "interpolated");
        let (b, how) = cost_at_goal(&rungs[2..], 0.05);
        assert!((b.unwrap() - 400.0).abs() < 1e-9);
        assert_eq!(how, "extrapolated below the first rung");
        assert_eq!(cost_at_goal(&rungs[..1], 0.05).0, None);
    }
}
