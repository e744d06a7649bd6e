//! Final stage: results → words and tables for people.
//!
//! Owns: number formatting and the human-readable reports of the command line (the page draws
//! its own from the same JSON). Plain words for anything that makes a number unreliable.
//! Must not: compute statistics; it only formats what `pipeline` produced.

use crate::pipeline::CheckOutcome;
use std::fmt::Write;

/// A number in at most about six significant digits, in plain or scientific notation.
pub fn num(v: f64) -> String {
    if v.is_nan() {
        return "NaN".into();
    }
    if v.is_infinite() {
        return if v > 0.0 { "inf".into() } else { "-inf".into() };
    }
    if v == 0.0 {
        return "0".into();
    }
    let a = v.abs();
    if (1e-4..1e6).contains(&a) {
        let decimals = (5 - libm::floor(libm::log10(a)) as i32).clamp(0, 9) as usize;
        let s = format!("{v:.decimals$}");
        if s.contains('.') {
            s.trim_end_matches('0').trim_end_matches('.').to_string()
        } else {
            s
        }
    } else {
        format!("{v:.4e}")
    }
}

/// A log Z value with four decimals.
pub fn log_z(v: f64) -> String {
    if v.is_finite() {
        format!("{v:.4}")
    } else {
        num(v)
    }
}

fn bounds_text(lower: Option<f64>, upper: Option<f64>) -> String {
    match (lower, upper) {
        (None, None) => "unbounded".to_string(),
        (Some(l), None) => format!("> {}", num(l)),
        (None, Some(u)) => format!("< {}", num(u)),
        (Some(l), Some(u)) => format!("in ({}, {})", num(l), num(u)),
    }
}

/// Pads every column of `rows` to its widest cell.
pub fn table(rows: &[Vec<String>]) -> String {
    let cols = rows.iter().map(|r| r.len()).max().unwrap_or(0);
    let widths: Vec<usize> = (0..cols)
        .map(|c| {
            rows.iter()
                .filter_map(|r| r.get(c))
                .map(|s| s.chars().count())
                .max()
                .unwrap_or(0)
        })
        .collect();
    let mut out = String::new();
    for r in rows {
        let line: Vec<String> = r
            .iter()
            .enumerate()
            .map(|(c, s)| format!("{s:>w$}", w = widths[c]))
            .collect();
        let _ = writeln!(out, "  {}", line.join("  ").trim_end());
    }
    out
}

/// The report of `kiln check`.
pub fn check_text(c: &CheckOutcome) -> String {
    let mut o = String::new();
    let title = if c.title.is_empty() {
        "(untitled)"
    } else {
        &c.title
    };
    let _ = writeln!(o, "Kiln check: {title}");
    let model = match c.model.as_str() {
        "energy" => "density ∝ exp(−energy)",
        "log_density" => "density ∝ exp(log_density)",
        _ => "Gaussian mixture",
    };
    let _ = writeln!(
        o,
        "\nTarget: {model}, {} unknown{}",
        c.dimension,
        if c.dimension == 1 { "" } else { "s" }
    );
    for u in &c.unknowns {
        let _ = writeln!(o, "  {:<12} {}", u.name, bounds_text(u.lower, u.upper));
    }
    if c.data_rows > 0 {
        let _ = writeln!(
            o,
            "  data: {} rows of {}",
            c.data_rows,
            c.data_columns.join(", ")
        );
    }

    let _ = writeln!(
        o,
        "\nModes: {} found from {} optimiser starts ({} gradient evaluations)",
        c.modes.len(),
        c.starts,
        c.gradient_evaluations
    );
    let mut rows = vec![{
        let mut h = vec!["#".to_string()];
        h.extend(c.unknowns.iter().map(|u| u.name.clone()));
        h.push("energy".into());
        h.push("Laplace mass".into());
        h
    }];
    const SHOWN: usize = 20;
    for (k, m) in c.modes.iter().take(SHOWN).enumerate() {
        let mut r = vec![format!("{}", k + 1)];
        r.extend(m.location.iter().map(|v| num(*v)));
        r.push(num(m.energy));
        r.push(format!(
            "{:.4}{}",
            m.laplace_mass,
            if m.non_quadratic { " *" } else { "" }
        ));
        rows.push(r);
    }
    o.push_str(&table(&rows));
    if c.modes.len() > SHOWN {
        let _ = writeln!(o, "  … and {} more (see --json)", c.modes.len() - SHOWN);
    }
    if c.modes.iter().any(|m| m.non_quadratic) {
        let _ = writeln!(
            o,
            "  * not Gaussian-shaped: width measured along the axes of the Hessian"
        );
    }

    let _ = writeln!(o, "\nlog Z");
    let _ = writeln!(o, "  Laplace (sum over modes)   {}", log_z(c.laplace_log_z));
    match &c.grid {
        Some(g) if g.log_z.is_finite() => {
            let pts: Vec<String> = g.points_per_axis.iter().map(|p| p.to_string()).collect();
            let _ = writeln!(
                o,
                "  grid quadrature            {}   (last refinement changed it by {:.1e}; {} points)",
                log_z(g.log_z),
                g.change,
                pts.join(" × ")
            );
        }
        Some(_) => {
            let _ = writeln!(
                o,
                "  grid quadrature            not available (see warnings)"
            );
        }
        None => {
            let _ = writeln!(
                o,
                "  grid quadrature            not run (only for one or two unknowns)"
            );
        }
    }
    if let Some(e) = &c.exact {
        let _ = writeln!(o, "  exact (mixture)            {}", log_z(e.log_z));
        let _ = writeln!(o, "\nExact answers of the mixture");
        let mut rows = vec![{
            let mut h = vec!["component".to_string()];
            h.extend(c.unknowns.iter().map(|u| format!("mean {}", u.name)));
            h.push("mass".into());
            h
        }];
        for (k, (m, w)) in e.means.iter().zip(&e.masses).enumerate() {
            let mut r = vec![format!("{}", k + 1)];
            r.extend(m.iter().map(|v| num(*v)));
            r.push(format!("{w:.4}"));
            rows.push(r);
        }
        o.push_str(&table(&rows));
        let means: Vec<String> = c
            .unknowns
            .iter()
            .zip(&e.mean)
            .map(|(u, m)| format!("{} = {}", u.name, num(*m)))
            .collect();
        let _ = writeln!(o, "  overall mean: {}", means.join(", "));
        let sds: Vec<String> = c
            .unknowns
            .iter()
            .enumerate()
            .map(|(i, u)| format!("{} = {}", u.name, num(crate::maths::sqrt(e.cov[i][i]))))
            .collect();
        let _ = writeln!(o, "  overall sd:   {}", sds.join(", "));
    }
    if !c.warnings.is_empty() {
        let _ = writeln!(o, "\nWarnings");
        for w in &c.warnings {
            let _ = writeln!(o, "  - {w}");
        }
    }
    let _ = writeln!(
        o,
        "\nThe Laplace value assumes every mode was found and is Gaussian-shaped; `kiln run` samples the density to check it."
    );
    o
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn numbers_are_short_and_readable() {
        assert_eq!(num(1.23456789), "1.23457");
        assert_eq!(num(-0.5), "-0.5");
        assert_eq!(num(235.856), "235.856");
        assert_eq!(num(1e-9), "1.0000e-9");
        assert_eq!(num(31.4), "31.4");
        assert_eq!(num(2.0), "2");
    }
}
