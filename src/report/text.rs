//! The human-readable reports of the command line: `kiln check`, `kiln run`, `kiln compare`
//! (the page draws its own from the same JSON).
//!
//! Owns: the words and tables of each report, in plain words for anything that makes a number
//! unreliable.
//! Must not: compute statistics; it only lays out what `run` produced, with `common::format`.

use crate::common::format::{decimals4, num, pm, se_text, table};
use crate::run::{CheckOutcome, CompareOutcome, RunOutcome};
use crate::search::{Coverage, FoundBy};
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

/// The report of `kiln run`.
pub fn run_text(r: &RunOutcome) -> String {
    let mut o = String::new();
    let title = if r.title.is_empty() {
        "(untitled)"
    } else {
        &r.title
    };
    let _ = writeln!(o, "Kiln run: {title}");
    let s = &r.settings;
    let _ = writeln!(
        o,
        "  seed {}, {} chains × ({} warm-up + {} draws), method {:?}, integrator {:?}, {} energy evaluations",
        s.seed, s.chains, s.warmup, s.draws, s.method, s.integrator, r.gradient_evaluations
    );
    let _ = writeln!(
        o,
        "\n{}\n  {}",
        r.verdict.headline.to_uppercase(),
        r.verdict.sentence
    );
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

    let _ = writeln!(o, "\nModes");
    let mut h = vec!["#".to_string()];
    h.extend(r.unknowns.iter().map(|u| u.name.clone()));
    h.extend([
        "mass".into(),
        "± SE".into(),
        "Laplace".into(),
        "visited".into(),
    ]);
    if r.exact_masses.is_some() {
        h.push("exact".into());
    }
    let mut rows = vec![h];
    for (k, m) in r.est.modes.iter().take(30).enumerate() {
        let mut row = vec![format!(
            "{}{}",
            k + 1,
            if m.found_by == FoundBy::Chains {
                "+"
            } else {
                ""
            }
        )];
        row.extend(m.location.iter().map(|v| num(*v)));
        match m.mass_se {
            Some(se) => {
                row.push(format!("{:.4}", m.mass));
                row.push(se_text(se));
            }
            None => {
                row.push("not visited".into());
                row.push(String::new());
            }
        }
        row.push(format!("{:.4}", m.laplace_mass));
        row.push(if m.visited { "yes".into() } else { "NO".into() });
        if let Some(ex) = &r.exact_masses {
            row.push(format!("{:.4}", ex[k]));
        }
        rows.push(row);
    }
    o.push_str(&table(&rows));
    if r.est.modes.len() > 30 {
        let _ = writeln!(o, "  … and {} more (see --json)", r.est.modes.len() - 30);
    }
    if r.est.modes.iter().any(|m| m.found_by == FoundBy::Chains) {
        let _ = writeln!(o, "  + found by the chains, not by the mode search");
    }
    coverage_text(&mut o, &r.mode_coverage);

    let _ = writeln!(o, "\nUnknowns (target draws, weighted by p(β=1|x))");
    let mut rows = vec![
        ["unknown", "mean", "sd", "5%", "50%", "95%", "R-hat", "ESS"]
            .iter()
            .map(|s| s.to_string())
            .collect::<Vec<_>>(),
    ];
    for (j, u) in r.unknowns.iter().enumerate() {
        rows.push(vec![
            u.name.clone(),
            num(r.est.mean[j]),
            num(r.est.sd[j]),
            num(r.est.quantiles[j][0]),
            num(r.est.quantiles[j][1]),
            num(r.est.quantiles[j][2]),
            format!("{:.3}", r.est.rhat[j]),
            format!("{:.0}", r.est.ess[j]),
        ]);
    }
    o.push_str(&table(&rows));

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
    for n in &r.notes {
        let _ = writeln!(o, "  note: {n}");
    }
    if r.warnings.is_empty() {
        let _ = writeln!(o, "\nNo warnings.");
    } else {
        let _ = writeln!(o, "\nWarnings");
        for w in &r.warnings {
            let _ = writeln!(o, "  - {w}");
        }
    }
    o
}

/// The report of `kiln compare`.
pub fn compare_text(c: &CompareOutcome, name_a: &str, name_b: &str) -> String {
    let mut o = String::new();
    let _ = writeln!(o, "Kiln compare\n");
    let _ = writeln!(
        o,
        "  A: {name_a}  log Z = {}",
        pm(c.a.est.log_z, c.a.est.log_z_se)
    );
    let _ = writeln!(
        o,
        "  B: {name_b}  log Z = {}",
        pm(c.b.est.log_z, c.b.est.log_z_se)
    );
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
    let _ = writeln!(
        o,
        "  A: {}\n  B: {}",
        c.a.verdict.headline, c.b.verdict.headline
    );
    if c.warnings.is_empty() {
        let _ = writeln!(o, "\nNo warnings.");
    } else {
        let _ = writeln!(o, "\nWarnings");
        for w in &c.warnings {
            let _ = writeln!(o, "  - {w}");
        }
    }
    o
}

/// The mode search's evidence, for the run and check reports.
fn coverage_text(o: &mut String, c: &Coverage) {
    let _ = writeln!(o, "\nMode search");
    let _ = writeln!(o, "  {}", c.summary);
    let k = &c.counts;
    let _ = writeln!(
        o,
        "  {} of {} starts ended in {} distinct modes, {} of them reached by only one start; chance that one more start finds a new mode {:.1}% (Good–Turing); expected modes not yet seen {} (Boender & Rinnooy Kan)",
        k.converged,
        c.starts,
        k.distinct,
        k.singletons,
        100.0 * c.new_mode_chance,
        c.expected_unseen.map_or("unknown (too few starts)".to_string(), |u| format!("{u:.2}"))
    );
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
