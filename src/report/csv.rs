//! Draws as CSV (RFC 4180), the same for the command line and the page.
//!
//! Owns: the draws file's columns and quoting.
//! Must not: choose or weight the draws (the run's result does).

use crate::estimate::WeightedDraws;
use crate::run::RunResult;

/// An RFC 4180 field: quoted when it holds a comma, quote or line break.
fn csv_field(s: &str) -> String {
    if s.contains([',', '"', '\n', '\r']) {
        format!("\"{}\"", s.replace('"', "\"\""))
    } else {
        s.to_string()
    }
}

/// Resampled, unweighted target draws as CSV (RFC 4180): the unknowns, then `beta` (where the
/// draw was made), `weight` (its p(β=1|x) weight relative to the mean, before resampling),
/// `chain`, `iteration` (1-based) and `mode` (1-based, as in the mode table).
pub fn draws_csv(names: &[String], draws: &WeightedDraws, picks: &[usize]) -> String {
    let d = names.len();
    let mut o = String::new();
    let mut header: Vec<String> = names.iter().map(|n| csv_field(n)).collect();
    header.extend(
        ["beta", "weight", "chain", "iteration", "mode"]
            .iter()
            .map(|s| s.to_string()),
    );
    o.push_str(&header.join(","));
    o.push_str("\r\n");
    for &i in picks {
        let mut row: Vec<String> = (0..d).map(|j| format!("{}", draws.x[i * d + j])).collect();
        row.push(format!("{}", draws.beta[i]));
        row.push(format!("{}", draws.weight[i]));
        row.push(format!("{}", draws.chain[i] + 1));
        row.push(format!("{}", draws.iteration[i] + 1));
        row.push(format!("{}", draws.mode[i] + 1));
        o.push_str(&row.join(","));
        o.push_str("\r\n");
    }
    o
}

/// The draws of a finished run as `kiln run --draws-csv` writes them: resampled, unweighted.
pub fn run_draws_csv(r: &RunResult) -> String {
    draws_csv(&r.names, &r.draws, &r.resampled())
}
