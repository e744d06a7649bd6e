//! The dense scan: in few unknowns, the density on a grid over the whole searched region, and
//! the optimiser started from every local maximum of the grid that no known mode covers.
//!
//! Owns: the searched region ([`search_region`]: the bounds, or for unbounded directions the
//! region the scattered starts are drawn from widened to hold every mode found ± 12 standard
//! deviations; shared with the grid check), the grid's resolution within a work budget, the
//! local maxima, and [`ScanSummary`]'s figures. Scattered starts find a mode with a
//! probability equal to the size of its region of attraction; a grid finds every mode at least
//! about half a grid spacing wide wherever it is in the region, which is what the report can
//! then promise.
//! Must not: decide whether the search is complete (that is `coverage`).

use super::coverage::{Range, ScanSummary};
use super::modes::{mahalanobis2, merge_mode, mode_from, FoundBy, Mode};
use crate::common::error::KilnError;
use crate::common::maths::{exp, ln, sqrt};
use crate::model::target::{Target, Transform};
use nalgebra::DMatrix;
use serde::Serialize;

/// Most unknowns for a scan (four only when every unknown has two bounds).
pub const MAX_SCAN_DIM: usize = 3;
/// Most grid points of a scan, by number of unknowns (1, 2, 3, 4).
pub const MAX_SCAN_POINTS: [usize; 4] = [100_000, 1_000_000, 2_000_000, 2_000_000];
/// Work budget of a scan, in tape instructions (points × the evaluator's work per call).
pub const SCAN_WORK: f64 = 1e9;
/// Most optimiser runs started from the grid's local maxima (highest density first).
pub const MAX_SCAN_STARTS: usize = 200;
/// Half-width of the start design for an unknown without bounds (see `starts`).
pub const FREE_SPAN: f64 = 100.0;
/// The start design's reach in log(distance from the bound) for an unknown with one bound:
/// e^−6 to e^6 (see `starts`).
pub const LOG_SPAN: f64 = 6.0;
/// Modes are covered to this many of their standard deviations.
pub const MODE_REACH: f64 = 12.0;

/// Standard deviations of a mode in the user's coordinates, from its Hessian (NaN where the
/// Hessian cannot be inverted).
pub fn mode_sd(target: &Target, m: &Mode) -> Vec<f64> {
    mode_sd_z(m)
        .iter()
        .enumerate()
        .map(|(i, s)| s * target.transforms[i].with_jacobian(m.z[i]).1.abs())
        .collect()
}

/// Standard deviations of a mode in the unconstrained coordinates.
pub fn mode_sd_z(m: &Mode) -> Vec<f64> {
    let d = m.z.len();
    let inv = DMatrix::from_row_slice(d, d, &m.hessian).try_inverse();
    (0..d)
        .map(|i| sqrt(inv.as_ref().map_or(f64::NAN, |h| h[(i, i)]).abs()))
        .collect()
}

/// How a grid axis is spaced: evenly in the unknown, or evenly in the log of its distance from
/// its one bound (a scale or a rate, whose natural resolution is relative).
#[derive(Clone, Copy, Debug, PartialEq, Eq, Serialize)]
#[serde(rename_all = "snake_case")]
pub enum Spacing {
    Linear,
    Log,
}

/// One axis of a grid over the searched region: a coordinate u spaced evenly from `lower` to
/// `upper`, with x = u (linear) or x = bound + sign·e^u (log).
#[derive(Clone, Copy, Debug, PartialEq)]
pub struct GridAxis {
    pub spacing: Spacing,
    pub lower: f64,
    pub upper: f64,
    bound: f64,
    sign: f64,
}

impl GridAxis {
    /// The unknown at grid coordinate u.
    #[inline]
    pub fn x_of(&self, u: f64) -> f64 {
        match self.spacing {
            Spacing::Linear => u,
            Spacing::Log => self.bound + self.sign * exp(u),
        }
    }

    /// log |dx/du|.
    #[inline]
    pub fn log_jacobian(&self, u: f64) -> f64 {
        match self.spacing {
            Spacing::Linear => 0.0,
            Spacing::Log => u,
        }
    }

    /// The axis's extent in the user's units.
    pub fn range(&self) -> Range {
        let (a, b) = (self.x_of(self.lower), self.x_of(self.upper));
        Range {
            lower: a.min(b),
            upper: a.max(b),
        }
    }

    /// u of a mode at z (the optimiser's coordinate) and its standard deviation in u.
    fn mode_u(&self, t: Transform, z: f64, sd_z: f64) -> (f64, f64) {
        match self.spacing {
            Spacing::Log => (z, sd_z),
            Spacing::Linear => {
                let (x, dx, _, _) = t.with_jacobian(z);
                (x, sd_z * dx.abs())
            }
        }
    }

    /// Half-width of the start design in u, the axis's default extent.
    fn of_start_design(t: Transform) -> GridAxis {
        match t {
            Transform::Free => GridAxis {
                spacing: Spacing::Linear,
                lower: -FREE_SPAN,
                upper: FREE_SPAN,
                bound: 0.0,
                sign: 1.0,
            },
            Transform::Interval(l, u) => GridAxis {
                spacing: Spacing::Linear,
                lower: l,
                upper: u,
                bound: 0.0,
                sign: 1.0,
            },
            Transform::Lower(l) => GridAxis {
                spacing: Spacing::Log,
                lower: -LOG_SPAN,
                upper: LOG_SPAN,
                bound: l,
                sign: 1.0,
            },
            Transform::Upper(u) => GridAxis {
                spacing: Spacing::Log,
                lower: -LOG_SPAN,
                upper: LOG_SPAN,
                bound: u,
                sign: -1.0,
            },
        }
    }
}

/// The region the scattered starts are drawn from, per unknown, in the user's units.
pub fn start_region(target: &Target) -> Vec<Range> {
    target
        .transforms
        .iter()
        .map(|t| GridAxis::of_start_design(*t).range())
        .collect()
}

/// The axes of the searched region: the start design's region, widened on every unbounded side
/// to hold each mode found ± [`MODE_REACH`] standard deviations. It depends on the modes only
/// where they lie outside the start design.
pub fn search_axes(target: &Target, modes: &[Mode]) -> Vec<GridAxis> {
    let mut axes: Vec<GridAxis> = target
        .transforms
        .iter()
        .map(|t| GridAxis::of_start_design(*t))
        .collect();
    for m in modes {
        let sd = mode_sd_z(m);
        for (i, a) in axes.iter_mut().enumerate() {
            let t = target.transforms[i];
            if matches!(t, Transform::Interval(..)) {
                continue;
            }
            let (u, s) = a.mode_u(t, m.z[i], sd[i]);
            let reach = MODE_REACH * s;
            if reach.is_finite() {
                a.lower = a.lower.min(u - reach);
                a.upper = a.upper.max(u + reach);
            }
        }
    }
    axes
}

/// The searched region in the user's units.
pub fn search_region(target: &Target, modes: &[Mode]) -> Vec<Range> {
    search_axes(target, modes)
        .iter()
        .map(|a| a.range())
        .collect()
}

/// Whether a target gets a scan.
pub fn scan_applies(target: &Target) -> bool {
    let d = target.dim();
    d <= MAX_SCAN_DIM
        || (d == MAX_SCAN_DIM + 1
            && target
                .transforms
                .iter()
                .all(|t| matches!(t, Transform::Interval(..))))
}

/// Scans the searched region and optimises from every grid maximum no known mode covers; new
/// modes are merged into `modes`. Where the modes occupy a small part of the searched region,
/// half the budget goes to a finer grid over the part near them (each mode ± [`MODE_REACH`]
/// standard deviations) and half to the whole region. Returns what each grid did (empty when
/// the scan does not apply).
pub fn scan(
    target: &Target,
    modes: &mut Vec<Mode>,
    scan_work: f64,
) -> Result<Vec<ScanSummary>, KilnError> {
    if !scan_applies(target) || modes.is_empty() {
        return Ok(Vec::new());
    }
    let d = target.dim();
    let wide = search_axes(target, modes);
    let work = target.evaluator_work().max(1) as f64;
    let budget = (scan_work / work).min(MAX_SCAN_POINTS[d - 1] as f64);
    let widths = narrowest_widths(target, modes, &wide);
    let near = near_axes(target, modes, &wide);
    let share: f64 = near
        .iter()
        .zip(&wide)
        .map(|(n, w)| (n.upper - n.lower) / (w.upper - w.lower))
        .product();
    let mut out = Vec::new();
    if share < 0.25 {
        out.push(scan_grid(
            target,
            modes,
            &near,
            &widths,
            0.5 * budget,
            Part::NearModes,
        )?);
        out.push(scan_grid(
            target,
            modes,
            &wide,
            &widths,
            0.5 * budget,
            Part::Whole,
        )?);
    } else {
        out.push(scan_grid(
            target,
            modes,
            &wide,
            &widths,
            budget,
            Part::Whole,
        )?);
    }
    Ok(out)
}

/// The part of the searched region near the modes found: each mode ± [`MODE_REACH`] standard
/// deviations (in the grid's coordinates), within the searched region.
fn near_axes(target: &Target, modes: &[Mode], wide: &[GridAxis]) -> Vec<GridAxis> {
    let mut axes: Vec<GridAxis> = wide
        .iter()
        .map(|a| GridAxis {
            lower: f64::INFINITY,
            upper: f64::NEG_INFINITY,
            ..*a
        })
        .collect();
    for m in modes {
        let sd = mode_sd_z(m);
        for (i, a) in axes.iter_mut().enumerate() {
            let (u, s) = a.mode_u(target.transforms[i], m.z[i], sd[i]);
            let reach = MODE_REACH * s;
            if reach.is_finite() {
                a.lower = a.lower.min(u - reach);
                a.upper = a.upper.max(u + reach);
            }
        }
    }
    for (a, w) in axes.iter_mut().zip(wide) {
        a.lower = a.lower.max(w.lower);
        a.upper = a.upper.min(w.upper);
        if !(a.upper > a.lower) {
            *a = *w;
        }
    }
    axes
}

/// The narrowest standard deviation among the modes, per unknown, in the grid's coordinates
/// (a tenth of the axis where none is known).
fn narrowest_widths(target: &Target, modes: &[Mode], axes: &[GridAxis]) -> Vec<f64> {
    let mut w: Vec<f64> = axes.iter().map(|a| 0.1 * (a.upper - a.lower)).collect();
    for m in modes {
        let sd = mode_sd_z(m);
        for (i, a) in axes.iter().enumerate() {
            let (_, s) = a.mode_u(target.transforms[i], m.z[i], sd[i]);
            if s.is_finite() && s > 0.0 && s < w[i] {
                w[i] = s;
            }
        }
    }
    w
}

/// Which grid of the scan.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Serialize)]
#[serde(rename_all = "snake_case")]
pub enum Part {
    /// The part of the searched region near the modes found.
    NearModes,
    /// The whole searched region.
    Whole,
}

/// Points per axis: proportional to each axis's extent over the narrowest mode width along it,
/// so that the grid resolves the modes equally well along every unknown, within `budget`
/// points in all (at least 3 per axis).
fn points_per_axis(axes: &[GridAxis], widths: &[f64], budget: f64) -> Vec<usize> {
    let d = axes.len();
    let ratio: Vec<f64> = axes
        .iter()
        .zip(widths)
        .map(|(a, w)| ((a.upper - a.lower) / w).max(1.0))
        .collect();
    let log_scale = (ln(budget.max(1.0)) - ratio.iter().map(|r| ln(*r)).sum::<f64>()) / d as f64;
    let mut n: Vec<usize> = ratio
        .iter()
        .map(|r| ((r * exp(log_scale)) as usize).max(3))
        .collect();
    // Rounding and the floor of 3 can overshoot: shrink the largest axis until within budget.
    while n.iter().map(|k| *k as f64).product::<f64>() > budget.max(27.0) {
        let (j, _) = n
            .iter()
            .enumerate()
            .max_by_key(|(_, k)| **k)
            .unwrap_or((0, &3));
        if n[j] <= 3 {
            break;
        }
        n[j] -= 1;
    }
    n
}

fn scan_grid(
    target: &Target,
    modes: &mut Vec<Mode>,
    axes: &[GridAxis],
    widths: &[f64],
    budget: f64,
    part: Part,
) -> Result<ScanSummary, KilnError> {
    let d = target.dim();
    let n = points_per_axis(axes, widths, budget);
    let spacing: Vec<f64> = axes
        .iter()
        .zip(&n)
        .map(|(a, k)| (a.upper - a.lower) / *k as f64)
        .collect();
    let strides: Vec<usize> = (0..d).map(|j| n[..j].iter().product()).collect();
    let total: usize = n.iter().product();
    // The density in the grid's coordinates (for a log axis, times |dx/du|), so that a local
    // maximum on the grid is one of that density.
    let point = |flat: usize, x: &mut [f64]| -> f64 {
        let mut log_jac = 0.0;
        for j in 0..d {
            let i = (flat / strides[j]) % n[j];
            let u = axes[j].lower + (i as f64 + 0.5) * spacing[j];
            x[j] = axes[j].x_of(u);
            log_jac += axes[j].log_jacobian(u);
        }
        log_jac
    };
    let mut ev = target.evaluator();
    // Log density at every cell centre, the first unknown varying fastest.
    let mut value = vec![f64::NEG_INFINITY; total];
    let mut x = vec![0.0; d];
    for (flat, v) in value.iter_mut().enumerate() {
        let log_jac = point(flat, &mut x);
        let e = ev.user_energy(&x);
        if e.is_finite() {
            *v = log_jac - e;
        }
    }
    let evaluations = total as u64;
    // Local maxima over the 3^d neighbourhood; among equal neighbours the lowest index wins,
    // so that a plateau gives one representative per connected level set at most.
    let mut offsets: Vec<Vec<i64>> = vec![vec![]];
    for _ in 0..d {
        offsets = offsets
            .into_iter()
            .flat_map(|o| {
                [-1i64, 0, 1].into_iter().map(move |s| {
                    let mut p = o.clone();
                    p.push(s);
                    p
                })
            })
            .collect();
    }
    offsets.retain(|o| o.iter().any(|s| *s != 0));
    let mut maxima: Vec<(f64, usize)> = Vec::new();
    'cells: for (flat, &v) in value.iter().enumerate() {
        if !v.is_finite() {
            continue;
        }
        'neighbours: for o in &offsets {
            let mut other = 0usize;
            for j in 0..d {
                let k = ((flat / strides[j]) % n[j]) as i64 + o[j];
                if k < 0 || k >= n[j] as i64 {
                    continue 'neighbours;
                }
                other += k as usize * strides[j];
            }
            let w = value[other];
            if w > v || (w == v && other < flat) {
                continue 'cells;
            }
        }
        maxima.push((v, flat));
    }
    maxima.sort_by(|a, b| b.0.total_cmp(&a.0).then(a.1.cmp(&b.1)));
    let found_before = modes.len();
    let mut starts = 0;
    for &(_, flat) in &maxima {
        if starts >= MAX_SCAN_STARTS {
            break;
        }
        point(flat, &mut x);
        let Some(z) = target.to_unconstrained(&x) else {
            continue;
        };
        if modes
            .iter()
            .any(|m| mahalanobis2(&z, &m.z, &m.hessian) < 9.0)
        {
            continue;
        }
        starts += 1;
        if let Some(mut m) = mode_from(target, &mut ev, &z)? {
            m.hits = 0;
            m.found_by = FoundBy::Scan;
            merge_mode(modes, m);
        }
    }
    Ok(ScanSummary {
        part,
        narrowest: spacing.iter().map(|h| 0.5 * h).collect(),
        region: axes.iter().map(|a| a.range()).collect(),
        scale: axes.iter().map(|a| a.spacing).collect(),
        points: n,
        spacing,
        evaluations: evaluations + ev.evaluations,
        maxima: maxima.len(),
        starts,
        new_modes: modes.len() - found_before,
    })
}

#[cfg(test)]
mod tests {
    use super::*;

    fn axis(lower: f64, upper: f64) -> GridAxis {
        GridAxis {
            spacing: Spacing::Linear,
            lower,
            upper,
            bound: 0.0,
            sign: 1.0,
        }
    }

    #[test]
    fn points_follow_extent_over_width_within_the_budget() {
        let axes = [axis(0.0, 10.0), axis(-50.0, 50.0)];
        let n = points_per_axis(&axes, &[0.5, 0.5], 1e6);
        assert!(n.iter().product::<usize>() as f64 <= 1e6, "{n:?}");
        // Ten times the extent at the same width: about ten times the points.
        let r = n[1] as f64 / n[0] as f64;
        assert!((r - 10.0).abs() < 0.2, "{n:?}");
        // A tiny budget still gives a grid of at least 3 points per axis, and no more than 27.
        let tiny = points_per_axis(&axes, &[0.5, 0.5], 10.0);
        assert!(tiny.iter().all(|k| *k >= 3) && tiny.iter().product::<usize>() <= 27);
    }
}
