//! What a reader sees first of a result, decided once for the command line and the page: the
//! order of the mode table and which tiny modes fold into one row, and the unknowns summary
//! in Kiln's layout (unknown | prior | median | 90 % interval | mean ± sd | R-hat | effective
//! draws).
//!
//! Owns: [`ModeTable`] (+ [`mode_table_by_mass`], [`mode_table_by_laplace`]),
//! [`UnknownsSummary`] (+ [`unknowns_summary`]), [`FOLD_SHARE`], [`INTERVAL_LEVEL`].
//! Must not: estimate anything (it orders and adds what the estimates hold) or format numbers.

use super::prepare::Unknown;
use crate::estimate::{Estimates, ModeEstimate};
use serde::Serialize;

/// Modes that together hold less than this share of the mass fold into one row.
pub const FOLD_SHARE: f64 = 0.001;
/// The level of the unknowns summary's central interval (from the 5 % and 95 % quantiles).
pub const INTERVAL_LEVEL: f64 = 0.9;

/// The rows of the mode table: modes by number (1-based, as in `modes`, the plots and the
/// draws CSV), largest mass first, and the tail that folds into one row.
#[derive(Clone, Debug, PartialEq, Serialize)]
pub struct ModeTable {
    /// "sampler" (masses from the run) or "laplace" (masses of the Laplace approximation, before
    /// a run).
    pub sorted_by: &'static str,
    /// Mode numbers shown as rows, in order.
    pub shown: Vec<usize>,
    /// Mode numbers folded into one row (empty when nothing folds), in order.
    pub folded: Vec<usize>,
    /// Their mass together (sampler masses of the visited ones; Laplace masses before a run).
    pub folded_mass: f64,
    /// How many of the folded modes no chain visited.
    pub folded_not_visited: usize,
}

/// The order of a run's mode table: visited modes by sampler mass, then the modes no chain
/// visited by Laplace mass; the smallest tail that holds under [`FOLD_SHARE`] together (the
/// visited modes' sampler mass plus the unvisited ones' Laplace mass) folds, when it has at
/// least two modes.
pub fn mode_table_by_mass(modes: &[ModeEstimate]) -> ModeTable {
    let mut visited: Vec<usize> = (0..modes.len()).filter(|&k| modes[k].visited).collect();
    let mut unvisited: Vec<usize> = (0..modes.len()).filter(|&k| !modes[k].visited).collect();
    visited.sort_by(|&a, &b| modes[b].mass.total_cmp(&modes[a].mass).then(a.cmp(&b)));
    unvisited.sort_by(|&a, &b| {
        modes[b]
            .laplace_mass
            .total_cmp(&modes[a].laplace_mass)
            .then(a.cmp(&b))
    });
    let share = |k: usize| {
        if modes[k].visited {
            modes[k].mass
        } else {
            modes[k].laplace_mass
        }
    };
    // The tail may hold only modes whose own share is small: an unvisited mode that the
    // Laplace approximation weighs at 0.1 % or more stays in sight (it is also a warning).
    let order: Vec<usize> = visited.into_iter().chain(unvisited).collect();
    fold(order, share, "sampler", |k| !modes[k].visited)
}

/// The order of the mode table before a run (`kiln check`): by Laplace mass.
pub fn mode_table_by_laplace(laplace_masses: &[f64]) -> ModeTable {
    let mut order: Vec<usize> = (0..laplace_masses.len()).collect();
    order.sort_by(|&a, &b| {
        laplace_masses[b]
            .total_cmp(&laplace_masses[a])
            .then(a.cmp(&b))
    });
    fold(order, |k| laplace_masses[k], "laplace", |_| false)
}

fn fold(
    order: Vec<usize>,
    share: impl Fn(usize) -> f64,
    sorted_by: &'static str,
    not_visited: impl Fn(usize) -> bool,
) -> ModeTable {
    // The longest tail whose shares add up to less than FOLD_SHARE.
    let mut cut = order.len();
    let mut total = 0.0;
    while cut > 0 {
        let s = share(order[cut - 1]);
        if !(s >= 0.0) || total + s >= FOLD_SHARE {
            break;
        }
        total += s;
        cut -= 1;
    }
    if order.len() - cut < 2 {
        cut = order.len();
        total = 0.0;
    }
    let folded: Vec<usize> = order[cut..].to_vec();
    ModeTable {
        sorted_by,
        folded_not_visited: folded.iter().filter(|&&k| not_visited(k)).count(),
        shown: order[..cut].iter().map(|k| k + 1).collect(),
        folded: folded.iter().map(|k| k + 1).collect(),
        folded_mass: total,
    }
}

/// One unknown in the summary's layout.
#[derive(Clone, Debug, PartialEq, Serialize)]
pub struct UnknownRow {
    pub name: String,
    /// The prior given in the spec, when there is one.
    pub prior: Option<String>,
    pub median: f64,
    /// The central interval at [`INTERVAL_LEVEL`]: its lower and upper ends.
    pub interval: [f64; 2],
    pub mean: f64,
    pub sd: f64,
    pub rhat: f64,
    pub effective_draws: f64,
}

/// The unknowns summary: one row per unknown (vector elements one by one), with the interval's
/// level stated.
#[derive(Clone, Debug, PartialEq, Serialize)]
pub struct UnknownsSummary {
    /// 0.9: the interval holds the central 90 % of the target's mass.
    pub interval_level: f64,
    pub rows: Vec<UnknownRow>,
}

/// The summary of a run's unknowns from its estimates.
pub fn unknowns_summary(unknowns: &[Unknown], est: &Estimates) -> UnknownsSummary {
    let rows = unknowns
        .iter()
        .enumerate()
        .map(|(j, u)| {
            let q = est.quantiles.get(j).copied().unwrap_or([f64::NAN; 3]);
            let at = |v: &[f64]| v.get(j).copied().unwrap_or(f64::NAN);
            UnknownRow {
                name: u.name.clone(),
                prior: u.prior.clone(),
                median: q[1],
                interval: [q[0], q[2]],
                mean: at(&est.mean),
                sd: at(&est.sd),
                rhat: at(&est.rhat),
                effective_draws: at(&est.ess),
            }
        })
        .collect();
    UnknownsSummary {
        interval_level: INTERVAL_LEVEL,
        rows,
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::search::FoundBy;

    fn mode(mass: f64, laplace: f64, visited: bool) -> ModeEstimate {
        ModeEstimate {
            location: vec![0.0],
            mass,
            mass_se: visited.then_some(0.01),
            laplace_mass: laplace,
            visited,
            found_by: FoundBy::Starts,
        }
    }

    #[test]
    fn modes_sort_by_mass_and_a_tail_under_a_thousandth_folds() {
        // Masses 0.699, 0.3, one of 0.0006 and four of 0.0001: the tail of five adds to
        // 0.001, which is not under a thousandth, so only the four (0.0004 together) fold.
        let modes = vec![
            mode(0.3, 0.3, true),
            mode(0.0001, 0.0, true),
            mode(0.6990, 0.7, true),
            mode(0.0006, 0.0, true),
            mode(0.0001, 0.0, true),
            mode(0.0001, 0.0, true),
            mode(0.0001, 0.0, true),
        ];
        let t = mode_table_by_mass(&modes);
        assert_eq!(t.shown, vec![3, 1, 4]);
        assert_eq!(t.folded, vec![2, 5, 6, 7]);
        assert!((t.folded_mass - 0.0004).abs() < 1e-15);
        assert_eq!(t.folded_not_visited, 0);
    }

    #[test]
    fn one_tiny_mode_alone_does_not_fold_and_a_weighty_unvisited_one_stays_in_sight() {
        let t = mode_table_by_mass(&[mode(0.9999, 0.9, true), mode(0.0001, 0.1, true)]);
        assert_eq!((t.shown.clone(), t.folded.len()), (vec![1, 2], 0));
        // Unvisited: after the visited ones, by Laplace mass; the one at 0.02 never folds.
        let t = mode_table_by_mass(&[
            mode(0.0, 0.02, false),
            mode(1.0, 0.97, true),
            mode(0.0, 0.0001, false),
            mode(0.0, 0.0002, false),
        ]);
        assert_eq!(t.shown, vec![2, 1]);
        assert_eq!(t.folded, vec![4, 3]);
        assert_eq!(t.folded_not_visited, 2);
        assert!((t.folded_mass - 0.0003).abs() < 1e-15);
    }

    #[test]
    fn before_a_run_the_laplace_masses_order_the_table() {
        let t = mode_table_by_laplace(&[0.2, 0.0002, 0.7998, 0.0, 0.0]);
        assert_eq!(t.sorted_by, "laplace");
        assert_eq!(t.shown, vec![3, 1]);
        assert_eq!(t.folded, vec![2, 4, 5]);
    }
}
