//! Pieces the command-line reports share: warnings and notes, the mode table with its folded
//! row, the unknowns summary, the mode search's figures and the run's settings in words.
//!
//! Owns: the text layout of each piece (the page lays out the same JSON in the same order).
//! Must not: compute statistics or decide orders and folds (`run::digest` does).

use crate::common::format::{num, pm, share, table};
use crate::common::message::Message;
use crate::estimate::ModeEstimate;
use crate::run::{ModeTable, RunSettings, Unknown, UnknownsSummary};
use crate::sample::{Integrator, Method};
use crate::search::{Coverage, FoundBy};
use std::fmt::Write;

/// The run's settings in plain words, for the header line.
pub fn settings_words(s: &RunSettings, evaluations: u64) -> String {
    let method = match s.method {
        Method::Alternating => "position moves, then an exact draw of β (alternating)",
        Method::Joint => "β moves with the position (joint)",
    };
    let integrator = match s.integrator {
        Integrator::Nuts => "trajectories that stop when they turn back (nuts)",
        Integrator::Hmc => "trajectories of fixed length (hmc)",
    };
    format!(
        "seed {} · {} chains × ({} warm-up + {} kept draws) · {method} · {integrator} · acceptance goal {} · {} energy evaluations",
        s.seed,
        s.chains,
        s.warmup,
        s.draws,
        num(s.acceptance_goal),
        grouped(evaluations)
    )
}

/// A whole number with thin groups of three digits: 1 234 567.
pub fn grouped(n: u64) -> String {
    let digits = n.to_string();
    let mut out = String::new();
    for (i, c) in digits.chars().enumerate() {
        if i > 0 && (digits.len() - i).is_multiple_of(3) {
            out.push(' ');
        }
        out.push(c);
    }
    out
}

/// The warnings, right under the verdict: each sentence with its code, then what to do.
pub fn warnings_text(o: &mut String, warnings: &[Message]) {
    if warnings.is_empty() {
        let _ = writeln!(
            o,
            "\nNo warnings: nothing in the diagnostics calls for action."
        );
        return;
    }
    let _ = writeln!(
        o,
        "\n{} — act on {}",
        if warnings.len() == 1 {
            "1 warning".to_string()
        } else {
            format!("{} warnings", warnings.len())
        },
        if warnings.len() == 1 { "it" } else { "these" }
    );
    for w in warnings {
        message_lines(o, w, "");
    }
}

/// One message: `  ! sentence  [code]`, then `    what to do: remedy` for a warning.
pub fn message_lines(o: &mut String, m: &Message, prefix: &str) {
    let mark = if m.is_warning() { "!" } else { "·" };
    let _ = writeln!(o, "  {mark} {prefix}{}  [{}]", m.sentence, m.code);
    if let Some(r) = &m.remedy {
        let _ = writeln!(o, "    what to do: {r}");
    }
}

/// The notes, last: what Kiln chose and why.
pub fn notes_text(o: &mut String, notes: &[Message]) {
    if notes.is_empty() {
        return;
    }
    let _ = writeln!(o, "\nNotes (what Kiln chose and why)");
    for n in notes {
        message_lines(o, n, "");
    }
}

/// How a mode was first found, in words.
pub fn found_by_words(f: FoundBy) -> &'static str {
    match f {
        FoundBy::Starts => "scattered starts",
        FoundBy::Barrier => "across a barrier",
        FoundBy::Lattice => "from neighbouring modes",
        FoundBy::Scan => "the dense scan",
        FoundBy::Chains => "the chains",
    }
}

/// The folded row: "… 15 more modes, 0.0041 % together".
pub fn folded_words(t: &ModeTable) -> Option<String> {
    if t.folded.is_empty() {
        return None;
    }
    let unvisited = match t.folded_not_visited {
        0 => String::new(),
        n if n == t.folded.len() => ", none visited".to_string(),
        n => format!(", {n} of them not visited"),
    };
    Some(format!(
        "{} more modes, {} together{unvisited}",
        t.folded.len(),
        share(t.folded_mass)
    ))
}

/// The run's mode table: one row per shown mode (largest mass first), the folded row, the
/// marks' meanings.
pub fn run_modes_text(
    o: &mut String,
    unknowns: &[Unknown],
    modes: &[ModeEstimate],
    t: &ModeTable,
    exact: Option<&[f64]>,
) {
    let _ = writeln!(o, "\nModes, largest mass first");
    let mut h = vec!["mode".to_string()];
    h.extend(unknowns.iter().map(|u| u.name.clone()));
    h.extend(["mass ± SE".into(), "Laplace mass".into()]);
    if exact.is_some() {
        h.push("exact mass".into());
    }
    h.push("found by".into());
    let mut rows = vec![h];
    for &k in &t.shown {
        let m = &modes[k - 1];
        let mut row = vec![format!(
            "{k}{}",
            if m.found_by == FoundBy::Chains {
                "+"
            } else {
                ""
            }
        )];
        row.extend(m.location.iter().map(|v| num(*v)));
        row.push(match m.mass_se {
            Some(se) => pm(m.mass, se),
            None => "not visited".into(),
        });
        row.push(format!("{:.4}", m.laplace_mass));
        if let Some(ex) = exact {
            row.push(format!("{:.4}", ex[k - 1]));
        }
        row.push(found_by_words(m.found_by).into());
        rows.push(row);
    }
    o.push_str(&table(&rows));
    if let Some(f) = folded_words(t) {
        let _ = writeln!(
            o,
            "  … {f} (modes {}; `kiln run --json` has each)",
            number_list(&t.folded)
        );
    }
    if modes.iter().any(|m| m.found_by == FoundBy::Chains) {
        let _ = writeln!(o, "  + found by the chains, not by the mode search");
    }
}

/// Mode numbers as a short list: "4, 7, 9" or "4, 7, 9, … 31 (22 in all)".
pub fn number_list(ks: &[usize]) -> String {
    let shown: Vec<String> = ks.iter().take(6).map(|k| k.to_string()).collect();
    if ks.len() <= 6 {
        shown.join(", ")
    } else {
        format!(
            "{}, … {} ({} in all)",
            shown.join(", "),
            ks[ks.len() - 1],
            ks.len()
        )
    }
}

/// The column heads of the unknowns summary, in Kiln's order (the page uses the same).
pub fn unknowns_heads(level: f64, priors: bool) -> Vec<String> {
    let mut h = vec!["unknown".to_string()];
    if priors {
        h.push("prior".into());
    }
    h.extend([
        "median".to_string(),
        format!("{} % interval", num(100.0 * level)),
        "mean ± sd".to_string(),
        "R-hat".to_string(),
        "effective draws".to_string(),
    ]);
    h
}

/// The unknowns summary: unknown | prior | median | 90 % interval | mean ± sd | R-hat |
/// effective draws (the prior column only when a prior was given).
pub fn unknowns_text(o: &mut String, u: &UnknownsSummary) {
    let priors = u.rows.iter().any(|r| r.prior.is_some());
    let _ = writeln!(
        o,
        "\nUnknowns (target draws weighted by p(β=1|x); the interval holds the central {} % of the mass)",
        num(100.0 * u.interval_level)
    );
    let mut rows = vec![unknowns_heads(u.interval_level, priors)];
    for r in &u.rows {
        let mut row = vec![r.name.clone()];
        if priors {
            row.push(r.prior.clone().unwrap_or_else(|| "—".into()));
        }
        row.extend([
            num(r.median),
            format!("{} to {}", num(r.interval[0]), num(r.interval[1])),
            format!("{} ± {}", num(r.mean), num(r.sd)),
            format!(
                "{:.3}{}",
                r.rhat,
                if r.rhat > 1.01 { " (high)" } else { "" }
            ),
            format!("{:.0}", r.effective_draws),
        ]);
        rows.push(row);
    }
    o.push_str(&table(&rows));
}

/// The mode search's figures in one line (also used by `kiln compare`).
pub fn coverage_figures(c: &Coverage) -> String {
    let k = &c.counts;
    format!(
        "{} of {} starts ended in {} distinct modes, {} of them reached by only one start; chance that one more start finds a new mode {} (Good–Turing); expected modes not yet seen {} (Boender & Rinnooy Kan)",
        k.converged,
        c.starts,
        k.distinct,
        k.singletons,
        share(c.new_mode_chance),
        c.expected_unseen
            .map_or("unknown (too few starts)".to_string(), |u| format!("{u:.2}"))
    )
}

/// The mode search's evidence, under the mode table.
pub fn coverage_text(o: &mut String, c: &Coverage) {
    let _ = writeln!(o, "\nMode search");
    let _ = writeln!(o, "  {}", c.summary);
    let _ = writeln!(o, "  {}", coverage_figures(c));
    if c.found_outward + c.found_by_chains > 0 {
        let _ = writeln!(
            o,
            "  found otherwise: {} from known modes, {} by the chains",
            c.found_outward, c.found_by_chains
        );
    }
    for l in &c.limitations {
        let _ = writeln!(o, "  limitation: {}", l.sentence);
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn numbers_group_by_three_and_lists_stay_short() {
        assert_eq!(grouped(0), "0");
        assert_eq!(grouped(999), "999");
        assert_eq!(grouped(1000), "1 000");
        assert_eq!(grouped(1234567), "1 234 567");
        assert_eq!(number_list(&[3, 5]), "3, 5");
        assert_eq!(
            number_list(&[1, 2, 3, 4, 5, 6, 7, 9]),
            "1, 2, 3, 4, 5, 6, … 9 (8 in all)"
        );
    }

    #[test]
    fn a_warning_shows_its_remedy_and_a_note_does_not() {
        let mut o = String::new();
        warnings_text(
            &mut o,
            &[Message::warning("rhat_high", "R-hat is high", "run longer")],
        );
        assert!(o.contains("1 warning — act on it"), "{o}");
        assert!(o.contains("  ! R-hat is high  [rhat_high]\n    what to do: run longer\n"));
        let mut o = String::new();
        notes_text(&mut o, &[Message::note("priors_used", "priors added")]);
        assert!(o.contains("· priors added  [priors_used]") && !o.contains("what to do"));
    }
}
