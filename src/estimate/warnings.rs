//! Warnings about anything that makes a run's numbers unreliable, each with what to do.
//!
//! Owns: the rules that turn diagnostics (round trips, time near β = 1, effective draws,
//! unvisited modes, weight far from every mode, disagreeing checks, R-hat, divergences) into
//! [`Message`]s with a code, a sentence and a remedy; the codes are listed in [`CODES`].
//! Must not: compute diagnostics (they come from `summary`).

use super::crosscheck::CrossCheck;
use super::summary::Estimates;
use crate::common::format::num;
use crate::common::message::Message;

/// Every code [`warnings`] can give, with what it is about (for the documentation and tests).
pub const CODES: &[(&str, &str)] = &[
    (
        "no_round_trip",
        "a chain never travelled from β = 0 to β = 1 and back",
    ),
    (
        "few_round_trips",
        "fewer than 5 round trips in β per chain on average",
    ),
    (
        "little_time_at_target",
        "under 2 % of the time spent near β = 1",
    ),
    (
        "few_log_z_draws",
        "under 100 effective draws of the log Z series",
    ),
    (
        "mode_not_visited",
        "a mode with Laplace mass above 0.001 got no draw near β = 1",
    ),
    (
        "weight_far_from_modes",
        "over 1 % of the target's weight far from every known mode",
    ),
    (
        "check_disagrees",
        "a voting cross-check disagrees with the sampler",
    ),
    ("rhat_high", "R-hat of an unknown above 1.01"),
    (
        "divergences",
        "divergent transitions in over 1 % of iterations",
    ),
];

/// Warnings about anything that makes the numbers unreliable.
pub fn warnings(
    est: &Estimates,
    checks: &[CrossCheck],
    names: &[String],
    tempered: bool,
    iterations: usize,
) -> Vec<Message> {
    let mut w = Vec::new();
    let dg = &est.diagnostics;
    let longer = "run longer (more warm-up and more draws per chain)";
    if tempered {
        let stuck: Vec<String> = dg
            .round_trips
            .iter()
            .enumerate()
            .filter(|(_, t)| **t == 0)
            .map(|(c, _)| (c + 1).to_string())
            .collect();
        if !stuck.is_empty() {
            let who = if stuck.len() == 1 {
                format!("chain {}", stuck[0])
            } else {
                format!("chains {}", stuck.join(", "))
            };
            w.push(Message::warning(
                "no_round_trip",
                format!("{who} never made a round trip between β = 0 and β = 1, so it may not have moved between modes"),
                format!("{longer}; if it persists, tighten the bounds around the region that matters"),
            ));
        }
        let total: usize = dg.round_trips.iter().sum();
        if total > 0 && total < 5 * dg.round_trips.len() {
            w.push(Message::warning(
                "few_round_trips",
                format!("only {total} round trips in β over all chains: the mode masses and log Z rest on few independent visits"),
                longer,
            ));
        }
        if dg.share_near_beta_one < 0.02 {
            w.push(Message::warning(
                "little_time_at_target",
                format!(
                    "the chains spent only {:.1}% of the time near β = 1, so the density itself is poorly sampled",
                    100.0 * dg.share_near_beta_one
                ),
                format!("{longer}; a density far from every mode's Gaussian shape needs more warm-up to learn the tempering bias"),
            ));
        }
        if dg.log_z_ess < 100.0 {
            w.push(Message::warning(
                "few_log_z_draws",
                format!(
                    "the log Z series has only {:.0} effective draws, so its error bar is itself uncertain",
                    dg.log_z_ess
                ),
                format!("{longer}, or use more chains"),
            ));
        }
    }
    for m in &est.modes {
        if !m.visited && m.laplace_mass > 1e-3 {
            let loc: Vec<String> = m.location.iter().map(|v| num(*v)).collect();
            w.push(Message::warning(
                "mode_not_visited",
                format!(
                    "the mode search found a mode at ({}) with Laplace mass {:.3}, but no chain visited it near β = 1",
                    loc.join(", "),
                    m.laplace_mass
                ),
                "run longer or with more chains; if it stays unvisited, check whether that mode is real (kiln check lists it)",
            ));
        }
    }
    if dg.far_from_modes > 0.01 {
        w.push(Message::warning(
            "weight_far_from_modes",
            format!(
                "{:.1}% of the target's weight lies far from every known mode: a mode may have been missed, or the modes have heavy tails",
                100.0 * dg.far_from_modes
            ),
            "ask for more optimiser starts (\"starts\" in the settings) and compare the mode table of a longer run",
        ));
    }
    for c in checks {
        if c.agrees == Some(false) {
            w.push(Message::warning(
                "check_disagrees",
                format!(
                    "the {} cross-check ({:.4}) disagrees with the sampler beyond their combined errors",
                    c.name.label(),
                    c.log_z
                ),
                "do not use log Z yet: run longer, ask for more optimiser starts, or tighten the bounds, and run again",
            ));
        }
    }
    let high: Vec<String> = est
        .rhat
        .iter()
        .enumerate()
        .filter(|(_, r)| **r > 1.01)
        .map(|(j, r)| format!("`{}` {:.3}", names[j], r))
        .collect();
    if !high.is_empty() {
        w.push(Message::warning(
            "rhat_high",
            format!(
                "R-hat above 1.01 ({}): the chains disagree about {}",
                high.join(", "),
                if high.len() == 1 {
                    "that unknown"
                } else {
                    "those unknowns"
                }
            ),
            format!("{longer}; if R-hat stays high, look for a mode only some chains reach"),
        ));
    }
    if iterations > 0 && dg.divergences as f64 > 0.01 * iterations as f64 {
        w.push(Message::warning(
            "divergences",
            format!(
                "{} divergent transitions ({:.1}% of iterations): the energy is hard to integrate somewhere (very curved, or not finite)",
                dg.divergences,
                100.0 * dg.divergences as f64 / iterations as f64
            ),
            "raise the acceptance goal (\"acceptance_goal\": 0.9 in the settings) for smaller steps, or reparameterise the steep direction",
        ));
    }
    w
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn the_codes_are_distinct_snake_case_words() {
        let mut seen = std::collections::BTreeSet::new();
        for (code, about) in CODES {
            assert!(seen.insert(*code), "{code} twice");
            assert!(
                code.chars().all(|c| c.is_ascii_lowercase() || c == '_'),
                "{code}"
            );
            assert!(!about.is_empty());
        }
    }
}
