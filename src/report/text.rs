//! The human-readable reports of the command line: `kiln check`, `kiln run`, `kiln compare`
//! (the page draws its own from the same JSON).
//!
//! Owns: the order and words of each report: the verdict, then the warnings with what to do,
//! the numbers and tables, and the notes last (pieces shared between reports: `parts`).
//! Must not: compute statistics; it only lays out what `run` produced, with `common::format`.

use super::parts::{
    coverage_figures, coverage_text, folded_words, message_lines, notes_text, number_list,
    run_modes_text, settings_words, unknowns_text, warnings_text,
};
use crate::common::format::{decimals4, num, pm, table};
use crate::run::{CheckOutcome, CompareOutcome, RunOutcome};
use std::fmt::Write;

fn bounds_text(lower: Option<f64>, upper: Option<f64>) -> String {
    match (lower, upper) {
        (None, None) => "unbounded".to_string(),
        (Some(l), None) => format!("> {}", num(l)),
        (None, Some(u)) => format!("< {}", num(u)),
        (Some(l), Some(u)) => format!("in ({}, {})", num(l), num(u)),
    }
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
        "\nModes: {} found from {} optimiser starts ({} energy evaluations), largest Laplace mass first",
        c.modes.len(),
        c.starts,
        super::parts::grouped(c.energy_evaluations)
    );
    let mut rows = vec![{
        let mut h = vec!["mode".to_string()];
        h.extend(c.unknowns.iter().map(|u| u.name.clone()));
        h.push("energy".into());
        h.push("Laplace mass".into());
        h
    }];
    for &k in &c.mode_table.shown {
        let m = &c.modes[k - 1];
        let mut r = vec![format!("{k}")];
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
    if let Some(f) = folded_words(&c.mode_table) {
        let _ = writeln!(
            o,
            "  … {f} (modes {}; `kiln check --json` has each)",
            number_list(&c.mode_table.folded)
        );
    }
    if c.modes.iter().any(|m| m.non_quadratic) {
        let _ = writeln!(
            o,
            "  * not Gaussian-shaped: width measured along the axes of the Hessian"
        );
    }

    let _ = writeln!(o, "\nlog Z");
    let _ = writeln!(
        o,
        "  Laplace (sum over modes)   {}",
        decimals4(c.laplace_log_z)
    );
    match &c.grid {
        Some(g) if g.log_z.is_finite() => {
            let pts: Vec<String> = g.points_per_axis.iter().map(|p| p.to_string()).collect();
            let _ = writeln!(
                o,
                "  grid quadrature            {}   (last refinement changed it by {:.1e}; {} points)",
                decimals4(g.log_z),
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
        let _ = writeln!(o, "  exact (mixture)            {}", decimals4(e.log_z));
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
            .map(|(i, u)| {
                format!(
                    "{} = {}",
                    u.name,
                    num(crate::common::maths::sqrt(e.cov[i][i]))
                )
            })
            .collect();
        let _ = writeln!(o, "  overall sd:   {}", sds.join(", "));
    }
    coverage_text(&mut o, &c.mode_coverage);
    if !c.warnings.is_empty() {
        warnings_text(&mut o, &c.warnings);
    }
    notes_text(&mut o, &c.notes);
    let _ = writeln!(
        o,
        "\nThe Laplace value assumes every mode was found and is Gaussian-shaped; `kiln run` samples the density to check it."
    );
    o
}

/// The report of `kiln run`.
pub fn run_text(r: &RunOutcome) -> String {
    let mut o = String::new();
    let title = if r.title.is_empty() {
        "(untitled)"
    } else {
        &r.title
    };
    let _ = writeln!(o, "Kiln run: {title}");
    let _ = writeln!(o, "  {}", settings_words(&r.settings, r.energy_evaluations));
    let _ = writeln!(
        o,
        "\n{}\n  {}",
        r.verdict.headline.to_uppercase(),
        r.verdict.sentence
    );
    warnings_text(&mut o, &r.warnings);
    let _ = writeln!(o, "\nlog Z = {}", pm(r.est.log_z, r.est.log_z_se));
    if r.est.log_z_se < crate::common::format::SE_FLOOR {
        let _ = writeln!(
            o,
            "  exact, given the modes found: the base equals the target to round-off, so what remains uncertain is whether every mode was found (below)"
        );
    }
    if let Some(cv) = &r.est.control_variates {
        if cv.used {
            let _ = writeln!(
                o,
                "  without control variates {}; {}",
                pm(r.est.log_z_plain, r.est.log_z_plain_se),
                cv.note
            );
        } else {
            let _ = writeln!(o, "  control variates {}", cv.note);
        }
    }
    if let Some(p) = &r.est.proposals {
        if p.used {
            let _ = writeln!(
                o,
                "  tempered estimate alone {}, proposals alone {}; {}",
                pm(p.log_z_tempered, p.se_tempered),
                pm(p.log_z_proposals, p.se_proposals),
                p.note
            );
        }
    }
    let mut rows = vec![vec![
        "check".to_string(),
        "log Z".to_string(),
        "error".to_string(),
        "vs sampler".to_string(),
        "".to_string(),
    ]];
    for c in &r.cross_checks {
        rows.push(vec![
            c.name.label().to_string(),
            format!("{:.4}", c.log_z),
            c.error.map_or("-".to_string(), |e| format!("{e:.1e}")),
            c.z_score
                .map_or(format!("{:+.3} nats", r.est.log_z - c.log_z), |z| {
                    format!("{z:+.1} SE")
                }),
            match c.agrees {
                Some(true) => "agrees".into(),
                Some(false) => "DISAGREES".into(),
                None => "does not vote".into(),
            },
        ]);
    }
    o.push_str(&table(&rows));
    for c in r.cross_checks.iter().filter(|c| !c.votes) {
        if let Some(why) = &c.abstains_because {
            let _ = writeln!(o, "  {} does not vote: {why}", c.name.label());
        }
    }

    run_modes_text(
        &mut o,
        &r.unknowns,
        &r.est.modes,
        &r.mode_table,
        r.exact_masses.as_deref(),
    );
    coverage_text(&mut o, &r.mode_coverage);
    unknowns_text(&mut o, &r.unknowns_summary);

    let d = &r.est.diagnostics;
    let _ = writeln!(o, "\nDiagnostics");
    let _ = writeln!(
        o,
        "  acceptance {:.2}, divergences {}, max tree depth reached {} times",
        d.acceptance, d.divergences, d.max_depth_hits
    );
    let _ = writeln!(
        o,
        "  β round trips per chain {:?}, time near β = 1: {:.1}%, independence moves accepted {:.1}%, Hamiltonian moves in {:.1}% of iterations",
        d.round_trips,
        100.0 * d.share_near_beta_one,
        100.0 * d.independence_acceptance,
        100.0 * d.hamiltonian_share
    );
    let _ = writeln!(
        o,
        "  log Z series ESS {:.0}; bias span {:.2} nats; base: {} component(s){}",
        d.log_z_ess,
        d.bias_span,
        d.base_components,
        if d.base_refitted {
            ", refitted in warm-up"
        } else {
            " (Laplace)"
        }
    );
    notes_text(&mut o, &r.notes);
    o
}

/// The report of `kiln compare`: the log Bayes factor and what it means (or why it is not to
/// be used), then each run's log Z, verdict and mode search, then both runs' warnings.
pub fn compare_text(c: &CompareOutcome, name_a: &str, name_b: &str) -> String {
    let mut o = String::new();
    let _ = writeln!(o, "Kiln compare: model A {name_a} with model B {name_b}");
    let bf = &c.bayes_factor;
    let _ = writeln!(
        o,
        "\nlog Bayes factor log(Z_A / Z_B) = {}",
        pm(bf.log_bayes_factor, bf.log_bayes_factor_se)
    );
    match &bf.refused_because {
        Some(why) => {
            let _ = writeln!(o, "  NOT TO BE USED: {why}");
        }
        None => {
            let _ = writeln!(o, "  {}", bf.meaning);
        }
    }
    for (id, name, r) in [("A", name_a, &c.a), ("B", name_b, &c.b)] {
        let _ = writeln!(o, "\nModel {id}: {name}");
        let _ = writeln!(o, "  log Z = {}", pm(r.est.log_z, r.est.log_z_se));
        let _ = writeln!(
            o,
            "  verdict: {} ({})",
            r.verdict.headline,
            match r.verdict.state {
                crate::estimate::Agreement::Agree => "agree",
                crate::estimate::Agreement::Disagree => "disagree",
                crate::estimate::Agreement::NotEnoughEvidence => "not enough evidence",
            }
        );
        let _ = writeln!(o, "  mode search: {}", coverage_figures(&r.mode_coverage));
    }
    if c.warnings.is_empty() {
        let _ = writeln!(o, "\nNo warnings in either run.");
    } else {
        let _ = writeln!(o, "\nWarnings of the two runs — act on these");
        for w in &c.warnings {
            message_lines(&mut o, &w.message, &format!("model {}: ", w.model));
        }
    }
    o
}
