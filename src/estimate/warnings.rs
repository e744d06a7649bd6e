//! Plain-words warnings about anything that makes a run's numbers unreliable.
//!
//! Owns: the rules that turn diagnostics (round trips, time near β = 1, effective draws,
//! unvisited modes, weight far from every mode, disagreeing checks, R-hat, divergences) into
//! sentences for the report.
//! Must not: compute diagnostics (they come from `summary`).

use super::crosscheck::CrossCheck;
use super::summary::Estimates;
use crate::common::format::num;

/// Plain-words warnings about anything that makes the numbers unreliable.
pub fn warnings(
    est: &Estimates,
    checks: &[CrossCheck],
    names: &[String],
    tempered: bool,
    iterations: usize,
) -> Vec<String> {
    let mut w = Vec::new();
    let dg = &est.diagnostics;
    if tempered {
        for (c, trips) in dg.round_trips.iter().enumerate() {
            if *trips == 0 {
                w.push(format!("chain {} never made a round trip between β = 0 and β = 1: it may not have mixed between modes", c + 1));
            }
        }
        let total: usize = dg.round_trips.iter().sum();
        if total > 0 && total < 5 * dg.round_trips.len() {
            w.push(format!("only {total} round trips in β over all chains: mode masses and log Z rest on few independent visits; run longer"));
        }
        if dg.share_near_beta_one < 0.02 {
            w.push(format!(
                "the chains spent only {:.1}% of the time near β = 1: the target is poorly sampled",
                100.0 * dg.share_near_beta_one
            ));
        }
        if dg.log_z_ess < 100.0 {
            w.push(format!("the log Z series has only {:.0} effective draws: its error bar is itself uncertain", dg.log_z_ess));
        }
    }
    for m in &est.modes {
        if !m.visited && m.laplace_mass > 1e-3 {
            let loc: Vec<String> = m.location.iter().map(|v| num(*v)).collect();
            w.push(format!(
                "the optimiser found a mode at ({}) with Laplace mass {:.3}, but no chain visited it near β = 1",
                loc.join(", "),
                m.laplace_mass
            ));
        }
    }
    if dg.far_from_modes > 0.01 {
        w.push(format!(
            "{:.1}% of the target's weight lies far from every known mode: the mode table may be incomplete (a mode may have been missed) or the modes have heavy tails",
            100.0 * dg.far_from_modes
        ));
    }
    for c in checks {
        if c.agrees == Some(false) {
            w.push(format!(
                "the {} cross-check ({:.4}) disagrees with the sampler beyond their errors",
                c.name.label(),
                c.log_z
            ));
        }
    }
    for (j, r) in est.rhat.iter().enumerate() {
        if *r > 1.01 {
            w.push(format!("R-hat of `{}` is {:.3} (above 1.01): the chains disagree; run longer or check the modes", names[j], r));
        }
    }
    if iterations > 0 && dg.divergences as f64 > 0.01 * iterations as f64 {
        w.push(format!(
            "{} divergent transitions ({:.1}% of iterations): the energy is hard to integrate somewhere (very curved, or non-finite)",
            dg.divergences,
            100.0 * dg.divergences as f64 / iterations as f64
        ));
    }
    w
}
