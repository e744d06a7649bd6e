//! Searching outward from the modes found: barrier crossing along each mode's Hessian axes and
//! lattice completion from the steps between neighbouring modes.
//!
//! Owns: [`hop_search`], [`lattice_search`] and their budgets.
//! Must not: choose starting points or build the approximation.

use super::modes::{mahalanobis2, merge_mode, mode_from, FoundBy, Mode};
use super::optimiser::beyond_edge;
use crate::common::error::KilnError;
use crate::common::maths::sqrt;
use crate::model::target::{Target, TargetEval};
use nalgebra::{DMatrix, SymmetricEigen};

/// Optimises from `start` unless it already lies inside a known mode (squared Mahalanobis
/// distance below 9); a new mode is merged into `modes`. Returns the optimiser runs made (0/1).
pub(super) fn optimise_if_unexplored(
    target: &Target,
    ev: &mut TargetEval,
    modes: &mut Vec<Mode>,
    start: &[f64],
    how: FoundBy,
) -> Result<usize, KilnError> {
    if modes
        .iter()
        .any(|known| mahalanobis2(start, &known.z, &known.hessian) < 9.0)
    {
        return Ok(0);
    }
    if let Some(mut found) = mode_from(target, ev, start)? {
        found.hits = 0;
        found.found_by = how;
        merge_mode(modes, found);
    }
    Ok(1)
}

/// Most modes whose neighbourhoods the barrier-crossing search explores.
const MAX_HOP_MODES: usize = 600;

/// Barrier crossing: from each known mode, scan the energy along both directions of every
/// Hessian eigenvector in doubling steps (1, 2, 4, … standard deviations); where the energy
/// has passed a maximum and falls again, follow it down the line and, unless that point already
/// lies inside a known mode, optimise from there. Neighbouring modes of products and lattices
/// of modes, which scattered starts find only by luck in several dimensions, are found this
/// way. `max_runs` bounds the optimiser runs. Returns the number of runs made.
pub(super) fn hop_search(
    target: &Target,
    ev: &mut TargetEval,
    modes: &mut Vec<Mode>,
    max_runs: usize,
) -> Result<usize, KilnError> {
    let d = target.dim();
    let mut runs = 0;
    let mut next = 0;
    while next < modes.len() && next < MAX_HOP_MODES && runs < max_runs {
        let m = modes[next].clone();
        next += 1;
        let eig = SymmetricEigen::new(DMatrix::from_row_slice(d, d, &m.hessian));
        for k in 0..d {
            let lam = eig.eigenvalues[k];
            if !(lam > 0.0) {
                continue;
            }
            let sd = 1.0 / sqrt(lam);
            let v: Vec<f64> = eig.eigenvectors.column(k).iter().copied().collect();
            for sign in [1.0, -1.0] {
                if runs >= max_runs {
                    break;
                }
                let Some(start) = cross_barrier(ev, target, &m, &v, sign * sd) else {
                    continue;
                };
                runs += optimise_if_unexplored(target, ev, modes, &start, FoundBy::Barrier)?;
            }
        }
    }
    Ok(runs)
}

/// Scans from mode `m` along `step` (one standard deviation along an eigenvector) for a point
/// past an energy barrier, at the bottom of the descent beyond it.
pub(super) fn cross_barrier(
    ev: &mut TargetEval,
    target: &Target,
    m: &Mode,
    v: &[f64],
    step: f64,
) -> Option<Vec<f64>> {
    let at = |t: f64| -> Vec<f64> { m.z.iter().zip(v).map(|(z, c)| z + t * step * c).collect() };
    let mut prev = m.energy;
    let mut t = 1.0;
    for _ in 0..12 {
        let p = at(t);
        if beyond_edge(&p, &target.transforms) {
            return None;
        }
        let e = ev.energy(&p);
        if !e.is_finite() {
            return None;
        }
        if e >= prev {
            // Still climbing out of the mode.
            prev = e;
            t *= 2.0;
            continue;
        }
        // Descending: walk on in steps of a quarter of the distance so far until it rises.
        let dt = 0.25 * t;
        let mut best = (t, e);
        for _ in 0..16 {
            let tn = best.0 + dt;
            let pn = at(tn);
            if beyond_edge(&pn, &target.transforms) {
                break;
            }
            let en = ev.energy(&pn);
            if !(en < best.1) {
                break;
            }
            best = (tn, en);
        }
        return Some(at(best.0));
    }
    None
}

/// Lattice completion: the steps between neighbouring modes (each mode to its two nearest) are
/// collected, and every known mode is moved by every such step (both ways); where that lands
/// outside all known modes, the optimiser starts there. Modes arranged like a product or a
/// lattice (for example 2^D modes of independent two-mode factors, rotated) are completed from
/// a partial set this way, even when their Hessians are isotropic and their eigenvectors say
/// nothing about where the neighbours are. `max_runs` bounds the optimiser runs.
pub(super) fn lattice_search(
    target: &Target,
    ev: &mut TargetEval,
    modes: &mut Vec<Mode>,
    max_runs: usize,
) -> Result<usize, KilnError> {
    let d = target.dim();
    if modes.len() < 2 {
        return Ok(0);
    }
    let dist = |a: &[f64], b: &[f64]| -> f64 {
        a.iter().zip(b).map(|(x, y)| (x - y) * (x - y)).sum::<f64>()
    };
    // Steps between each mode and its two nearest neighbours, merged when nearly equal.
    let mut steps: Vec<(Vec<f64>, usize)> = Vec::new();
    for i in 0..modes.len().min(MAX_HOP_MODES) {
        let mut near: Vec<(f64, usize)> = (0..modes.len())
            .filter(|&j| j != i)
            .map(|j| (dist(&modes[i].z, &modes[j].z), j))
            .collect();
        near.sort_by(|a, b| a.0.total_cmp(&b.0));
        for &(_, j) in near.iter().take(2) {
            let e: Vec<f64> = (0..d).map(|k| modes[j].z[k] - modes[i].z[k]).collect();
            let norm = sqrt(dist(&e, &vec![0.0; d]));
            let same = steps.iter_mut().find(|(f, _)| {
                let neg: Vec<f64> = f.iter().map(|v| -v).collect();
                sqrt(dist(f, &e)) < 0.1 * norm || sqrt(dist(&neg, &e)) < 0.1 * norm
            });
            match same {
                Some((_, count)) => *count += 1,
                None => steps.push((e, 1)),
            }
        }
    }
    steps.sort_by_key(|s| std::cmp::Reverse(s.1));
    steps.truncate(4 * d);
    let mut runs = 0;
    let mut i = 0;
    while i < modes.len() && i < MAX_HOP_MODES && runs < max_runs {
        let base = modes[i].z.clone();
        i += 1;
        for (e, _) in &steps {
            for sign in [1.0, -1.0] {
                if runs >= max_runs {
                    break;
                }
                let c: Vec<f64> = base.iter().zip(e).map(|(z, v)| z + sign * v).collect();
                if beyond_edge(&c, &target.transforms) {
                    continue;
                }
                runs += optimise_if_unexplored(target, ev, modes, &c, FoundBy::Lattice)?;
            }
        }
    }
    Ok(runs)
}
