//! Independent check: log Z by grid quadrature, for one or two unknowns.
//!
//! Owns: the grid over the user's coordinates (the box given by the bounds, or for unbounded
//! directions the modes ± many standard deviations, widened while its edge still carries mass),
//! the midpoint rule on that grid refined by doubling until two levels agree, and the warning
//! when the grid's edge still holds noticeable mass or the work budget ran out first.
//! Must not: use the sampler or the Laplace masses (only the modes' locations and widths, to
//! place the grid), so that it stays an independent check.

use crate::common::maths::{exp, ln, log_add_exp};
use crate::model::target::{Target, Transform};
use serde::Serialize;

/// Result of the grid quadrature.
#[derive(Clone, Debug, Serialize)]
pub struct GridResult {
    /// Best estimate of log Z (the finest level).
    pub log_z: f64,
    /// |difference| between the last two levels, in nats: the error estimate.
    pub change: f64,
    /// Grid points per axis at the finest level.
    pub points_per_axis: Vec<usize>,
    pub converged: bool,
    /// Share of the mass in the outermost cells of unbounded directions.
    pub edge_mass: f64,
    /// Set when widening the grid along this axis kept adding mass at a rate that does not
    /// die out: the density looks not normalisable along it.
    pub growing_along: Option<usize>,
    pub warnings: Vec<String>,
}

#[derive(Clone, Copy, Debug)]
struct Segment {
    a: f64,
    b: f64,
    /// Points at the coarsest level.
    n: usize,
}

#[derive(Clone, Debug)]
struct Axis {
    segments: Vec<Segment>,
    open_low: bool,
    open_high: bool,
}

impl Axis {
    fn points(&self, level: u32) -> Vec<(f64, f64)> {
        let mut out = Vec::new();
        for s in &self.segments {
            let n = s.n << level;
            let h = (s.b - s.a) / n as f64;
            for j in 0..n {
                out.push((s.a + (j as f64 + 0.5) * h, h));
            }
        }
        out
    }
    fn count(&self, level: u32) -> usize {
        self.segments.iter().map(|s| s.n << level).sum()
    }
}

/// Widths (user coordinates) and locations of the modes, per unknown.
pub struct ModeScales {
    pub location: Vec<Vec<f64>>,
    pub sd: Vec<Vec<f64>>,
}

/// How many standard deviations around each mode an unbounded grid spans at first.
const SPAN: f64 = 12.0;
/// Tolerance between successive refinements, in nats.
const TOLERANCE: f64 = 2e-4;
/// Most times the grid is widened along open directions.
const MAX_WIDENINGS: usize = 7;

fn build_axis(i: usize, t: Transform, scales: &ModeScales, widen: [u32; 2]) -> Axis {
    let locs: Vec<f64> = scales.location.iter().map(|l| l[i]).collect();
    let sds: Vec<f64> = scales.sd.iter().map(|s| s[i].max(1e-300)).collect();
    let min_sd = sds.iter().copied().fold(f64::INFINITY, f64::min);
    let grow = |w: f64, k: u32| w * (1u64 << (2 * k)) as f64;
    // Intervals around modes, merged where they overlap.
    let mut spans: Vec<(f64, f64, f64)> = locs
        .iter()
        .zip(&sds)
        .map(|(m, s)| (m - SPAN * s, m + SPAN * s, *s))
        .collect();
    let (lo_bound, hi_bound) = match t {
        Transform::Free => (None, None),
        Transform::Lower(l) => (Some(l), None),
        Transform::Upper(u) => (None, Some(u)),
        Transform::Interval(l, u) => (Some(l), Some(u)),
    };
    if let (Some(l), Some(u)) = (lo_bound, hi_bound) {
        // A box: one segment, resolved to the narrowest mode.
        let n = (((u - l) / (0.5 * min_sd)).ceil() as usize).clamp(32, 1 << 16);
        return Axis {
            segments: vec![Segment { a: l, b: u, n }],
            open_low: false,
            open_high: false,
        };
    }
    spans.sort_by(|a, b| a.0.total_cmp(&b.0));
    let mut merged: Vec<(f64, f64, f64)> = Vec::new();
    for s in spans {
        match merged.last_mut() {
            Some(last) if s.0 <= last.1 => {
                last.1 = last.1.max(s.1);
                last.2 = last.2.min(s.2);
            }
            _ => merged.push(s),
        }
    }
    let mut lo = merged.first().map_or(-1.0, |m| m.0);
    let mut hi = merged.last().map_or(1.0, |m| m.1);
    let total = hi - lo;
    lo -= grow(total, widen[0]) - total;
    hi += grow(total, widen[1]) - total;
    if let Some(l) = lo_bound {
        lo = l;
    }
    if let Some(u) = hi_bound {
        hi = u;
    }
    // Segments: each merged span at its own resolution, and the gaps between them coarser.
    let mut segments = Vec::new();
    let mut cursor = lo;
    for (a, b, sd) in merged {
        let (a, b) = (a.max(lo), b.min(hi));
        if b <= a {
            continue;
        }
        if a > cursor {
            segments.push(Segment {
                a: cursor,
                b: a,
                n: 32,
            });
        }
        let a = a.max(cursor);
        if b > a {
            let n = (((b - a) / (0.5 * sd)).ceil() as usize).clamp(32, 1 << 16);
            segments.push(Segment { a, b, n });
            cursor = b;
        }
    }
    if hi > cursor {
        segments.push(Segment {
            a: cursor,
            b: hi,
            n: 32,
        });
    }
    Axis {
        segments,
        open_low: lo_bound.is_none(),
        open_high: hi_bound.is_none(),
    }
}

/// One pass over the grid: (log Z, log of the mass in edge cells of open directions, per axis).
fn integrate(target: &Target, axes: &[Axis], level: u32) -> (f64, Vec<f64>) {
    let mut ev = target.evaluator();
    let px: Vec<Vec<(f64, f64)>> = axes.iter().map(|a| a.points(level)).collect();
    let mut total = f64::NEG_INFINITY;
    let mut edge = vec![f64::NEG_INFINITY; axes.len()];
    let is_edge = |axis: usize, j: usize, n: usize| -> bool {
        (axes[axis].open_low && j == 0) || (axes[axis].open_high && j + 1 == n)
    };
    // Streaming log-sum-exp with a shared running maximum.
    let add = |acc: &mut f64, v: f64| {
        *acc = log_add_exp(*acc, v);
    };
    if axes.len() == 1 {
        let n = px[0].len();
        for (j, &(x, w)) in px[0].iter().enumerate() {
            let e = ev.user_energy(&[x]);
            if e.is_finite() {
                let v = -e + ln(w);
                add(&mut total, v);
                if is_edge(0, j, n) {
                    add(&mut edge[0], v);
                }
            }
        }
    } else {
        let (nx, ny) = (px[0].len(), px[1].len());
        let mut row = Vec::with_capacity(ny);
        for (i, &(x, wx)) in px[0].iter().enumerate() {
            row.clear();
            for (j, &(y, wy)) in px[1].iter().enumerate() {
                let e = ev.user_energy(&[x, y]);
                if e.is_finite() {
                    let v = -e + ln(wx * wy);
                    row.push(v);
                    if is_edge(0, i, nx) {
                        add(&mut edge[0], v);
                    }
                    if is_edge(1, j, ny) {
                        add(&mut edge[1], v);
                    }
                }
            }
            add(&mut total, crate::common::maths::log_sum_exp(&row));
        }
    }
    (total, edge)
}

/// Grid quadrature of log Z for `D ≤ 2`; `None` for larger dimensions.
/// `max_work`: budget in tape instructions (the cost of one evaluation times grid points).
pub fn grid_log_z(
    target: &Target,
    scales: &ModeScales,
    work_per_point: usize,
    max_work: f64,
) -> Option<GridResult> {
    let d = target.dim();
    if d == 0 || d > 2 {
        return None;
    }
    let max_points =
        (max_work / work_per_point.max(1) as f64).min(if d == 1 { 4e6 } else { 3.2e7 });
    let mut warnings = Vec::new();
    let mut widen = vec![[0u32; 2]; d];
    let mut result: Option<GridResult> = None;
    let mut increments: Vec<f64> = Vec::new();
    let mut edge_by_axis = vec![0.0; d];
    // Widen open edges (×4 each time) while they carry mass or widening still adds mass,
    // refining at each extent.
    for _extent in 0..MAX_WIDENINGS {
        let axes: Vec<Axis> = (0..d)
            .map(|i| build_axis(i, target.transforms[i], scales, widen[i]))
            .collect();
        let mut prev: Option<f64> = None;
        let mut level = 0;
        let mut last = (f64::NEG_INFINITY, vec![f64::NEG_INFINITY; d]);
        let mut converged = false;
        let mut change = f64::INFINITY;
        loop {
            let points: f64 = axes.iter().map(|a| a.count(level) as f64).product();
            if points > max_points {
                break;
            }
            last = integrate(target, &axes, level);
            if let Some(p) = prev {
                change = (last.0 - p).abs();
                if change < TOLERANCE || (last.0 == f64::NEG_INFINITY && p == f64::NEG_INFINITY) {
                    converged = true;
                    break;
                }
            }
            prev = Some(last.0);
            level += 1;
            if level > 12 {
                break;
            }
        }
        if prev.is_none() && !converged {
            if let Some(r) = result.take() {
                // The last extent that fitted the budget stands.
                result = Some(r);
                break;
            }
            // Not even the coarsest grid fits the budget.
            let cost =
                axes.iter().map(|a| a.count(0) as f64).product::<f64>() * work_per_point as f64;
            warnings.push(format!(
                "grid quadrature skipped: it would need about {:.1e} operations, over the budget of {:.1e}",
                cost, max_work
            ));
            return Some(GridResult {
                log_z: f64::NAN,
                change: f64::INFINITY,
                points_per_axis: axes.iter().map(|a| a.count(0)).collect(),
                converged: false,
                edge_mass: f64::NAN,
                growing_along: None,
                warnings,
            });
        }
        edge_by_axis = last
            .1
            .iter()
            .map(|e| exp(e - last.0))
            .map(|e| if e.is_finite() { e } else { 0.0 })
            .collect();
        let edge_mass = edge_by_axis.iter().sum::<f64>();
        let used_level = if converged {
            level
        } else {
            level.saturating_sub(1)
        };
        if let Some(r) = &result {
            increments.push(last.0 - r.log_z);
        }
        result = Some(GridResult {
            log_z: last.0,
            change,
            points_per_axis: axes.iter().map(|a| a.count(used_level)).collect(),
            converged,
            edge_mass,
            growing_along: None,
            warnings: Vec::new(),
        });
        let open = axes.iter().any(|a| a.open_low || a.open_high);
        let still_gaining = increments.last().is_some_and(|inc| *inc > TOLERANCE);
        if !open || (!(edge_mass > 1e-9) && !still_gaining) {
            break;
        }
        for (i, a) in axes.iter().enumerate() {
            if a.open_low {
                widen[i][0] += 1;
            }
            if a.open_high {
                widen[i][1] += 1;
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
        warnings.push(format!(
            "grid quadrature did not settle within its budget: the last two refinements differ by {:.2e} nats",
            r.change
        ));
    }
    if r.edge_mass > 1e-4 {
        warnings.push(format!(
            "the edge of the quadrature grid still carries {:.2}% of the mass: the density has heavy tails, and the grid value may be too low",
            100.0 * r.edge_mass
        ));
    }
    if r.log_z == f64::NEG_INFINITY {
        warnings.push(
            "the quadrature grid found no mass: the density is zero or not finite everywhere on it"
                .to_string(),
        );
    }
    r.warnings = warnings;
    Some(r)
}
