//! Draws as CSV (RFC 4180), the same for the command line and the page, written through the
//! `csv` crate (the crate that also reads the spec's data, in `model::table`).
//!
//! Owns: the draws file's columns, quoting (only where a field needs it) and CRLF line ends.
//! Must not: choose or weight the draws (the run's result does).

use crate::estimate::WeightedDraws;
use crate::run::RunResult;

/// Resampled, unweighted target draws as CSV (RFC 4180): the unknowns, then `beta` (where the
/// draw was made), `weight` (its p(β=1|x) weight relative to the mean, before resampling),
/// `chain`, `iteration` (1-based) and `mode` (1-based, as in the mode table).
pub fn draws_csv(names: &[String], draws: &WeightedDraws, picks: &[usize]) -> String {
    let d = names.len();
    let mut w = csv::WriterBuilder::new()
        .terminator(csv::Terminator::CRLF)
        .quote_style(csv::QuoteStyle::Necessary)
        .from_writer(Vec::new());
    let mut header: Vec<&str> = names.iter().map(|n| n.as_str()).collect();
    header.extend(["beta", "weight", "chain", "iteration", "mode"]);
    // Writing into memory cannot fail (the writer's only errors are I/O errors and records of
    // unequal length, and every record here has d + 5 fields); a failure would leave the file
    // short, never panic.
    let _ = w.write_record(&header);
    let mut row: Vec<String> = Vec::with_capacity(d + 5);
    for &i in picks {
        row.clear();
        row.extend((0..d).map(|j| format!("{}", draws.x[i * d + j])));
        row.push(format!("{}", draws.beta[i]));
        row.push(format!("{}", draws.weight[i]));
        row.push(format!("{}", draws.chain[i] + 1));
        row.push(format!("{}", draws.iteration[i] + 1));
        row.push(format!("{}", draws.mode[i] + 1));
        let _ = w.write_record(&row);
    }
    let bytes = w.into_inner().unwrap_or_default();
    String::from_utf8(bytes).unwrap_or_default()
}

/// The draws of a finished run as `kiln run --draws-csv` writes them: resampled, unweighted.
pub fn run_draws_csv(r: &RunResult) -> String {
    draws_csv(&r.names, &r.draws, &r.resampled())
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn header_fields_are_quoted_only_where_needed_and_lines_end_in_crlf() {
        let draws = WeightedDraws {
            x: vec![1.5, -2.0],
            beta: vec![1.0],
            weight: vec![0.25],
            chain: vec![0],
            iteration: vec![4],
            mode: vec![1],
        };
        let names = vec!["mu[1]".to_string(), "a,\"b\"".to_string()];
        let text = draws_csv(&names, &draws, &[0]);
        assert_eq!(
            text,
            "mu[1],\"a,\"\"b\"\"\",beta,weight,chain,iteration,mode\r\n1.5,-2,1,0.25,1,5,2\r\n"
        );
    }
}
