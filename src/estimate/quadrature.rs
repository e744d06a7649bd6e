//! Independent check: log Z by grid quadrature, for one or two unknowns.
//!
//! Owns: the grid check of the method note, whose domain does not come from the modes found:
//! the searched region of `search::scan` (the bounds, or for unbounded directions the start
//! design's region, widened only to hold modes found outside it), on axes that are linear in
//! the unknown or, for an unknown with one bound, linear in the log of its distance from the
//! bound; widened ×4 on open sides while their edge cells still carry mass. A base grid
//! resolves any mode at least half a cell wide anywhere in the region; cells are then split
//! where the density concentrates (where splitting changes their value, the midpoint rule's
//! own error estimate) until the estimated error is below [`TOLERANCE`] nats or the work
//! budget is spent, which the result says. Cells around the modes found that are wider than
//! those modes are split too, so that a narrow mode the search did find is integrated
//! accurately; that uses the modes for accuracy only, never for where to look. A mode the
//! search missed, if at least half a base cell wide, is integrated all the same, and shows as
//! a disagreement with the sampler.
//!
//! The error reported is the change of the whole estimate made by the last round of splitting:
//! for a smooth density it is larger than the error of the value after it, so it errs on the
//! side of caution.
//! Must not: use the sampler or the Laplace masses.

use crate::common::maths::{exp, ln, log_sum_exp};
use crate::common::message::Message;
use crate::model::target::Target;
use crate::search::coverage::Range;
use crate::search::scan::{mode_sd_z, search_axes, GridAxis, Spacing};
use crate::search::Mode;
use serde::Serialize;

/// Result of the grid quadrature.
#[derive(Clone, Debug, Serialize)]
pub struct GridResult {
    /// Best estimate of log Z (the finest cells).
    pub log_z: f64,
    /// The error estimate, in nats.
    pub change: f64,
    /// Cells per axis of the base grid.
    pub points_per_axis: Vec<usize>,
    /// Whether the error estimate fell below the tolerance within the budget.
    pub converged: bool,
    /// Share of the mass in the outermost cells of unbounded directions.
    pub edge_mass: f64,
    /// Set when widening the grid along this axis kept adding mass at a rate that does not
    /// die out: the density looks not normalisable along it.
    pub growing_along: Option<usize>,
    /// The region integrated, per unknown (user units).
    pub region: Vec<Range>,
    /// How each axis is spaced.
    pub scale: Vec<Spacing>,
    /// The narrowest mode the base grid resolves anywhere in the region, per unknown (half a
    /// base cell: user units for a linear axis, log units for a log axis).
    pub narrowest: Vec<f64>,
    /// Energy evaluations spent.
    pub evaluations: u64,
    pub warnings: Vec<Message>,
}

/// Target error of the grid value, in nats.
pub const TOLERANCE: f64 = 1e-4;
/// Most times the grid is widened along open directions.
const MAX_WIDENINGS: usize = 7;
/// Cells of the base grid, by number of unknowns.
const BASE_CELLS: [f64; 2] = [100_000.0, 1_000_000.0];
/// Most levels of splitting below the base grid.
const MAX_LEVELS: u32 = 60;
/// Cells whose value and neighbours' values are all below this share of the largest cell are
/// not split (their total is below 1e-14 × cells of the whole).
const NEGLIGIBLE: f64 = 1e-14;

/// A cell: its lower corner and level (its width is the base width / 2^level per axis), with
/// the log of its midpoint estimate.
#[derive(Clone, Copy, Debug)]
struct Cell {
    lo: [f64; 2],
    level: u32,
    log_m: f64,
}

struct Grid {
    axes: Vec<GridAxis>,
    base: Vec<f64>,
    d: usize,
    evaluations: u64,
    x: Vec<f64>,
    ev: crate::model::target::TargetEval,
}

impl Grid {
    fn width(&self, j: usize, level: u32) -> f64 {
        self.base[j] / (1u64 << level.min(62)) as f64
    }

    /// log of the midpoint estimate of a cell: log f(mid) + log |dx/du| + log volume.
    fn log_m(&mut self, lo: [f64; 2], level: u32) -> f64 {
        let mut log_vol = 0.0;
        let mut log_jac = 0.0;
        for j in 0..self.d {
            let w = self.width(j, level);
            let u = lo[j] + 0.5 * w;
            self.x[j] = self.axes[j].x_of(u);
            log_jac += self.axes[j].log_jacobian(u);
            log_vol += ln(w);
        }
        self.evaluations += 1;
        let e = self.ev.user_energy(&self.x);
        if e.is_finite() {
            log_jac + log_vol - e
        } else {
            f64::NEG_INFINITY
        }
    }

    /// The 2^d children of a cell.
    fn children(&mut self, c: &Cell) -> Vec<Cell> {
        let level = c.level + 1;
        let mut out = Vec::with_capacity(1 << self.d);
        for k in 0..(1usize << self.d) {
            let mut lo = c.lo;
            for j in 0..self.d {
                if k >> j & 1 == 1 {
                    lo[j] += self.width(j, level);
                }
            }
            let log_m = self.log_m(lo, level);
            out.push(Cell { lo, level, log_m });
        }
        out
    }

    /// Whether a cell is wider than a known mode it is near (within 6 of the mode's standard
    /// deviations), along some axis. (With cells at most one standard deviation wide, the
    /// midpoint rule on a Gaussian bump is exact to about e^(−2π²) ≈ 3e−9 of its mass.)
    fn near_narrow_mode(&self, c: &Cell, modes: &[(Vec<f64>, Vec<f64>)]) -> bool {
        modes.iter().any(|(u, s)| {
            (0..self.d).all(|j| {
                let w = self.width(j, c.level);
                u[j] + 6.0 * s[j] >= c.lo[j] && u[j] - 6.0 * s[j] <= c.lo[j] + w
            }) && (0..self.d).any(|j| self.width(j, c.level) > s[j])
        })
    }
}

/// The modes' locations and widths in the grid's coordinates.
fn modes_in_u(target: &Target, axes: &[GridAxis], modes: &[Mode]) -> Vec<(Vec<f64>, Vec<f64>)> {
    modes
        .iter()
        .map(|m| {
            let sd = mode_sd_z(m);
            let mut u = Vec::new();
            let mut s = Vec::new();
            for (j, a) in axes.iter().enumerate() {
                let (uj, sj) = match a.spacing {
                    Spacing::Log => (m.z[j], sd[j]),
                    Spacing::Linear => {
                        let (x, dx, _, _) = target.transforms[j].with_jacobian(m.z[j]);
                        (x, sd[j] * dx.abs())
                    }
                };
                u.push(uj);
                s.push(if sj.is_finite() && sj > 0.0 {
                    sj
                } else {
                    f64::INFINITY
                });
            }
            (u, s)
        })
        .collect()
}

/// One integration of the region given by `axes`: (log Z, error in nats, converged, log of the
/// mass in the edge cells of open sides per axis, base cells per axis, evaluations).
struct Pass {
    log_z: f64,
    error: f64,
    converged: bool,
    edge: Vec<f64>,
    cells: Vec<usize>,
    narrowest: Vec<f64>,
    budget_out: bool,
}

fn integrate(
    target: &Target,
    axes: &[GridAxis],
    open: &[[bool; 2]],
    modes: &[Mode],
    max_points: f64,
    evaluations: &mut u64,
) -> Pass {
    let d = axes.len();
    let base_cells = BASE_CELLS[d - 1].min(0.25 * max_points).max(1.0);
    let per_axis = ((exp(ln(base_cells) / d as f64)) as usize).max(4);
    let cells_per_axis = vec![per_axis; d];
    let base: Vec<f64> = axes
        .iter()
        .map(|a| (a.upper - a.lower) / per_axis as f64)
        .collect();
    let mut g = Grid {
        axes: axes.to_vec(),
        base: base.clone(),
        d,
        evaluations: 0,
        x: vec![0.0; d],
        ev: target.evaluator(),
    };
    let mode_u = modes_in_u(target, axes, modes);
    // The base grid.
    let n_total = if d == 1 {
        per_axis
    } else {
        per_axis * per_axis
    };
    let mut cells: Vec<Cell> = Vec::with_capacity(n_total);
    for flat in 0..n_total {
        let idx = [flat % per_axis, flat / per_axis];
        let mut lo = [0.0; 2];
        for j in 0..d {
            lo[j] = axes[j].lower + idx[j] as f64 * base[j];
        }
        let log_m = g.log_m(lo, 0);
        cells.push(Cell {
            lo,
            level: 0,
            log_m,
        });
    }
    // Edge mass of open sides, from the base grid.
    let mut edge = vec![f64::NEG_INFINITY; d];
    for (flat, c) in cells.iter().enumerate() {
        let idx = [flat % per_axis, flat / per_axis];
        for j in 0..d {
            if (open[j][0] && idx[j] == 0) || (open[j][1] && idx[j] + 1 == per_axis) {
                edge[j] = crate::common::maths::log_add_exp(edge[j], c.log_m);
            }
        }
    }
    let top = cells
        .iter()
        .map(|c| c.log_m)
        .fold(f64::NEG_INFINITY, f64::max);
    if !top.is_finite() {
        *evaluations += g.evaluations;
        return Pass {
            log_z: f64::NEG_INFINITY,
            error: 0.0,
            converged: true,
            edge,
            cells: cells_per_axis,
            narrowest: base.iter().map(|b| 0.5 * b).collect(),
            budget_out: false,
        };
    }
    // Which base cells to split first: those that matter, or border one that does.
    let cut = top + ln(NEGLIGIBLE);
    let matters: Vec<bool> = cells.iter().map(|c| c.log_m > cut).collect();
    let mut active: Vec<Cell> = Vec::new();
    let mut frozen: Vec<f64> = Vec::new();
    for (flat, c) in cells.iter().enumerate() {
        let idx = [flat % per_axis, flat / per_axis];
        let mut near = matters[flat];
        if !near {
            'n: for dy in -1i64..=1 {
                for dx in -1i64..=1 {
                    let (i, k) = (idx[0] as i64 + dx, idx[1] as i64 + dy);
                    if d == 1 && dy != 0 {
                        continue;
                    }
                    if i < 0 || i >= per_axis as i64 || k < 0 || (d == 2 && k >= per_axis as i64) {
                        continue;
                    }
                    let f = if d == 1 {
                        i as usize
                    } else {
                        i as usize + k as usize * per_axis
                    };
                    if matters[f] {
                        near = true;
                        break 'n;
                    }
                }
            }
        }
        if near || g.near_narrow_mode(c, &mode_u) {
            active.push(*c);
        } else {
            frozen.push(c.log_m);
        }
    }
    let mut converged = false;
    let mut budget_out = false;
    // The change of the whole estimate made by the last round of splitting, in nats: the error
    // estimate of the value before it (infinite before the first round).
    let mut change = f64::INFINITY;
    for _ in 0..MAX_LEVELS {
        if active.is_empty() {
            converged = change < TOLERANCE || change.is_infinite();
            if change.is_infinite() {
                change = 0.0;
            }
            break;
        }
        if (g.evaluations as f64) + (active.len() << d) as f64 > max_points {
            budget_out = true;
            break;
        }
        // Split every active cell.
        let mut split: Vec<(Vec<Cell>, f64, f64, bool)> = Vec::with_capacity(active.len());
        for c in &active {
            let kids = g.children(c);
            let fine = log_sum_exp(&kids.iter().map(|k| k.log_m).collect::<Vec<_>>());
            let narrow = kids.iter().any(|k| g.near_narrow_mode(k, &mode_u));
            split.push((kids, fine, c.log_m, narrow));
        }
        let mut before: Vec<f64> = frozen.clone();
        before.extend(split.iter().map(|s| s.2));
        let mut after: Vec<f64> = frozen.clone();
        after.extend(split.iter().map(|s| s.1));
        let (log_before, log_after) = (log_sum_exp(&before), log_sum_exp(&after));
        if !log_after.is_finite() {
            converged = true;
            change = 0.0;
            frozen = after;
            active.clear();
            break;
        }
        change = if log_before.is_finite() {
            (log_after - log_before).abs()
        } else {
            f64::INFINITY
        };
        let narrow_left = split.iter().any(|s| s.3);
        if change < TOLERANCE && !narrow_left {
            frozen.extend(split.iter().map(|s| s.1));
            converged = true;
            active.clear();
            break;
        }
        // Split again every cell whose split still mattered (its |coarse − fine| above a
        // thousandth of the tolerance, relative to the whole) or that lies near a known mode
        // narrower than itself; freeze the others at their fine value.
        let mut next = Vec::new();
        for (kids, fine, coarse, narrow) in split {
            let moved = (exp(coarse - log_after) - exp(fine - log_after)).abs();
            if narrow || moved > 1e-3 * TOLERANCE {
                next.extend(kids);
            } else {
                frozen.push(fine);
            }
        }
        active = next;
    }
    let mut parts = frozen;
    parts.extend(active.iter().map(|c| c.log_m));
    let log_z = log_sum_exp(&parts);
    let error = change;
    *evaluations += g.evaluations;
    Pass {
        log_z,
        // A relative error of the integral is, to first order, an error in nats of its log.
        error,
        converged,
        edge,
        cells: cells_per_axis,
        narrowest: base.iter().map(|b| 0.5 * b).collect(),
        budget_out,
    }
}

/// Grid quadrature of log Z for `D ≤ 2` over the searched region (see the module note);
/// `None` for larger dimensions. `max_work`: budget in tape instructions (the cost of one
/// evaluation times the evaluations).
pub fn grid_log_z(
    target: &Target,
    modes: &[Mode],
    work_per_point: usize,
    max_work: f64,
) -> Option<GridResult> {
    let d = target.dim();
    if d == 0 || d > 2 {
        return None;
    }
    let max_points = (max_work / work_per_point.max(1) as f64).min(4e7);
    let mut axes = search_axes(target, modes);
    // Open sides: an unbounded direction, or the far side of a one-sided unknown (its near
    // side, log distance → −∞, is open too: mass can pile up at the bound).
    let open: Vec<[bool; 2]> = target
        .transforms
        .iter()
        .map(|t| match t {
            crate::model::target::Transform::Interval(..) => [false, false],
            _ => [true, true],
        })
        .collect();
    let mut warnings = Vec::new();
    let mut increments: Vec<f64> = Vec::new();
    let mut evaluations = 0u64;
    let mut result: Option<GridResult> = None;
    let mut edge_by_axis = vec![0.0; d];
    for _extent in 0..MAX_WIDENINGS {
        if 4.0 * (BASE_CELLS[d - 1].min(0.25 * max_points)) > max_points
            && BASE_CELLS[d - 1].min(0.25 * max_points) < 16.0
        {
            warnings.push(Message::warning(
                "grid_skipped",
                format!("grid quadrature skipped: one evaluation costs about {work_per_point} operations, and even a coarse grid is over the budget of {max_work:.1e}"),
                "the other checks still vote; for a grid value, simplify the formula or thin the data",
            ));
            return Some(GridResult {
                log_z: f64::NAN,
                change: f64::INFINITY,
                points_per_axis: vec![0; d],
                converged: false,
                edge_mass: f64::NAN,
                growing_along: None,
                region: axes.iter().map(|a| a.range()).collect(),
                scale: axes.iter().map(|a| a.spacing).collect(),
                narrowest: vec![f64::NAN; d],
                evaluations,
                warnings,
            });
        }
        let pass = integrate(target, &axes, &open, modes, max_points, &mut evaluations);
        edge_by_axis = pass
            .edge
            .iter()
            .map(|e| exp(e - pass.log_z))
            .map(|e| if e.is_finite() { e } else { 0.0 })
            .collect();
        let edge_mass = edge_by_axis.iter().sum::<f64>();
        if let Some(r) = &result {
            increments.push(pass.log_z - r.log_z);
        }
        let budget_out = pass.budget_out;
        result = Some(GridResult {
            log_z: pass.log_z,
            change: pass.error,
            points_per_axis: pass.cells,
            converged: pass.converged,
            edge_mass,
            growing_along: None,
            region: axes.iter().map(|a| a.range()).collect(),
            scale: axes.iter().map(|a| a.spacing).collect(),
            narrowest: pass.narrowest,
            evaluations,
            warnings: Vec::new(),
        });
        let still_gaining = increments.last().is_some_and(|inc| *inc > TOLERANCE);
        let any_open = open.iter().any(|o| o[0] || o[1]);
        if !any_open || budget_out || (!(edge_mass > 1e-9) && !still_gaining) {
            break;
        }
        if (evaluations as f64) > max_points {
            break;
        }
        for (j, a) in axes.iter_mut().enumerate() {
            let w = a.upper - a.lower;
            if open[j][0] {
                a.lower -= 1.5 * w;
            }
            if open[j][1] {
                a.upper += 1.5 * w;
            }
        }
    }
    // Mass that keeps arriving as the grid widens, at a rate that does not die out (each ×4
    // widening adds at least 0.7 times what the previous one added), is the signature of a
    // density that is not normalisable; a proper tail decaying like 1/x² gives a ratio of 1/4.
    let n = increments.len();
    if n >= 3 && increments[n - 1] > 1e-3 && increments[n - 1] > 0.7 * increments[n - 2] {
        if let Some(r) = result.as_mut() {
            let axis = (0..d)
                .max_by(|&a, &b| edge_by_axis[a].total_cmp(&edge_by_axis[b]))
                .unwrap_or(0);
            r.growing_along = Some(axis);
        }
    }
    let mut r = result?;
    if !r.converged {
        warnings.push(Message::warning(
            "grid_budget",
            format!("grid quadrature ran out of its work budget before its error estimate fell below {TOLERANCE:.0e} nats: its value carries an error estimate of {:.2e} nats", r.change),
            "read the grid value with that error; bounds closer around the mass let the grid resolve it",
        ));
    }
    if r.edge_mass > 1e-4 {
        warnings.push(Message::warning(
            "grid_edge_mass",
            format!("the edge of the quadrature grid still carries {:.2}% of the mass: the density has heavy tails, and the grid value may be too low", 100.0 * r.edge_mass),
            "give bounds that contain the mass, or a prior that makes the tails fall faster",
        ));
    }
    if r.log_z == f64::NEG_INFINITY {
        warnings.push(Message::warning(
            "grid_no_mass",
            "the quadrature grid found no mass: the density is zero or not finite everywhere on it",
            "check the formula's domain and the bounds: the density must be positive somewhere inside them",
        ));
    }
    r.warnings = warnings;
    Some(r)
}
