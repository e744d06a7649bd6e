//! Modes: what they are, how two are told apart, and the whole search for them.
//!
//! Owns: [`Mode`], [`ModeSearch`], [`find_modes`] (scattered starts, then the outward searches),
//! [`mode_from`] (optimise from one point and settle), settling a converged point into a mode
//! (Newton polish and the curvature check), [`merge_mode`] (one mode when within one standard
//! deviation) and [`mahalanobis2`].
//! Must not: build the approximation from the modes (that is `laplace`) or sample.

use super::coverage::{Coverage, Limitation, Range, StartCounts};
use super::diagnose::{curvature_check, describe_point, escape_variable, improper, Curvature};
use super::optimiser::{axpy, hessian, minimize, Descent};
use super::outward::{hop_search, lattice_search};
use super::scan::{mode_sd, mode_sd_z, scan, start_region, Spacing};
use super::starts::{start_point, SearchOptions};
use crate::common::error::KilnError;
use crate::common::format::num;
use crate::common::maths::sqrt;
use crate::common::rng::{Purpose, Stream};
use crate::model::target::{Target, TargetEval, Transform};
use nalgebra::DMatrix;
use serde::Serialize;

/// A local minimum of the energy in unconstrained coordinates.
#[derive(Clone, Debug)]
pub struct Mode {
    /// Location in unconstrained coordinates.
    pub z: Vec<f64>,
    /// Location in the user's coordinates.
    pub x: Vec<f64>,
    /// Energy at `z` in unconstrained coordinates (the log-Jacobian included).
    pub energy: f64,
    /// The user's energy at `x` (the formula as written; −log density for a log density).
    pub user_energy: f64,
    /// Hessian of the energy at `z`, row-major, as used for the Laplace approximation.
    pub hessian: Vec<f64>,
    /// How many of the scattered starts ended here (0 for a mode found another way).
    pub hits: usize,
    /// How the mode was first found.
    pub found_by: FoundBy,
    /// True when the finite-difference Hessian was replaced by curvatures measured along its
    /// eigenvectors because the mode is far from quadratic (see [`curvature_check`]).
    pub non_quadratic: bool,
}

/// How a mode was first found.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Serialize)]
#[serde(rename_all = "snake_case")]
pub enum FoundBy {
    /// A scattered start.
    Starts,
    /// Crossing a barrier along a known mode's Hessian axis.
    Barrier,
    /// Repeating the step between neighbouring modes.
    Lattice,
    /// A local maximum of the dense scan.
    Scan,
    /// Draws of the chains far from every known mode, in warm-up.
    Chains,
}

/// Everything the mode search found.
#[derive(Clone, Debug)]
pub struct ModeSearch {
    /// Distinct modes, lowest energy first.
    pub modes: Vec<Mode>,
    /// Scattered starts made.
    pub starts: usize,
    /// Energy-and-gradient evaluations spent.
    pub evaluations: u64,
    /// The evidence that every mode was found.
    pub coverage: Coverage,
    /// Plain-words remarks for the report.
    pub notes: Vec<String>,
}

/// Work budget of the scattered starts, in tape instructions (evaluations × the evaluator's
/// work per call); the starts stop when it is spent, and the coverage says so.
pub const START_WORK: f64 = 5e9;

/// Squared Mahalanobis distance (a − b)ᵀ H (a − b).
pub fn mahalanobis2(a: &[f64], b: &[f64], h: &[f64]) -> f64 {
    let d = a.len();
    let diff: Vec<f64> = (0..d).map(|i| a[i] - b[i]).collect();
    (0..d)
        .map(|i| diff[i] * (0..d).map(|j| h[i * d + j] * diff[j]).sum::<f64>())
        .sum()
}

/// Polishes a converged point with Newton steps on the finite-difference Hessian and checks it.
/// Returns a mode, or a better starting point if this was not a minimum.
pub(super) fn settle(
    ev: &mut TargetEval,
    target: &Target,
    mut z: Vec<f64>,
    mut f: f64,
    sd_guess: &[f64],
) -> Result<Result<Mode, Vec<f64>>, KilnError> {
    let d = z.len();
    let transforms = &target.transforms;
    let mut steps: Vec<f64> = (0..d)
        .map(|i| (1e-3 * sd_guess[i]).clamp(1e-10 * (1.0 + z[i].abs()), 1e-2 * (1.0 + z[i].abs())))
        .collect();
    let mut g = vec![0.0; d];
    for round in 0..4 {
        let h = hessian(ev, &z, &steps);
        let (h, non_quadratic) = match curvature_check(ev, &z, f, &h, transforms) {
            Curvature::Ok {
                hessian,
                non_quadratic,
            } => (hessian, non_quadratic),
            Curvature::NotMinimum(p) => return Ok(Err(p)),
            Curvature::Flat { direction } => {
                let far = axpy(&z, 1e6, &direction);
                let name = escape_variable(&z, &far, &target.names);
                return Err(improper(target, &name, &z));
            }
        };
        // Newton step from the Hessian; take it if it is worth taking and lowers the energy.
        f = ev.energy_grad(&z, &mut g);
        let hm = DMatrix::from_row_slice(d, d, &h);
        let step = hm
            .clone()
            .cholesky()
            .map(|c| c.solve(&nalgebra::DVector::from_column_slice(&g)));
        let mut moved = false;
        if let Some(step) = step {
            let s: Vec<f64> = step.iter().map(|v| -v).collect();
            let size2 = mahalanobis2(&s, &vec![0.0; d], &h);
            if size2 > 1e-10 && round < 3 {
                let zn = axpy(&z, 1.0, &s);
                let fn_ = ev.energy(&zn);
                if fn_ < f {
                    z = zn;
                    f = fn_;
                    moved = true;
                }
            }
        }
        // Steps for the next round: a thousandth of a standard deviation.
        if let Some(inv) = hm.clone().try_inverse() {
            for i in 0..d {
                let sd = sqrt(inv[(i, i)].abs());
                if sd.is_finite() && sd > 0.0 {
                    steps[i] = (1e-3 * sd).max(1e-12 * (1.0 + z[i].abs()));
                }
            }
        }
        if !moved {
            let x = target.to_user(&z);
            let user_energy = ev.user_energy(&x);
            return Ok(Ok(Mode {
                z,
                x,
                energy: f,
                user_energy,
                hessian: h,
                hits: 1,
                found_by: FoundBy::Starts,
                non_quadratic,
            }));
        }
    }
    let h = hessian(ev, &z, &steps);
    let x = target.to_user(&z);
    let user_energy = ev.user_energy(&x);
    Ok(Ok(Mode {
        z,
        x,
        energy: f,
        user_energy,
        hessian: h,
        hits: 1,
        found_by: FoundBy::Starts,
        non_quadratic: false,
    }))
}

/// Adds `m` to `modes` unless it is within one standard deviation of a known mode.
/// Returns true if it was new.
pub fn merge_mode(modes: &mut Vec<Mode>, m: Mode) -> bool {
    for known in modes.iter_mut() {
        let near = mahalanobis2(&m.z, &known.z, &known.hessian) < 1.0
            || mahalanobis2(&m.z, &known.z, &m.hessian) < 1.0;
        if near {
            known.hits += m.hits;
            if m.energy < known.energy {
                let (hits, found_by) = (known.hits, known.found_by);
                *known = m;
                known.hits = hits;
                known.found_by = found_by;
            }
            return false;
        }
    }
    modes.push(m);
    true
}

/// Finds the modes of `target` by multi-start BFGS.
pub fn find_modes(target: &Target, opts: SearchOptions) -> Result<ModeSearch, KilnError> {
    let d = target.dim();
    let mut ev = target.evaluator();
    let mut rng = Stream::new(opts.seed, Purpose::ModeSearch, 0);
    let shift: Vec<f64> = (0..=d).map(|_| rng.uniform()).collect();
    let mut modes: Vec<Mode> = Vec::new();
    let mut notes = Vec::new();
    let mut bad_starts = 0;
    let mut bad_gradients = 0;
    let mut bad_example: Option<(Vec<f64>, f64)> = None;
    let mut starts = 0;
    let mut rule_held = false;
    let work = target.evaluator_work().max(1) as f64;
    for k in 0..opts.max_starts {
        // Stop once the stopping rule holds (or the work budget is spent).
        if opts.stop_rule && k >= opts.min_starts && !modes.is_empty() {
            if StartCounts::from_hits(modes.iter().map(|m| m.hits)).rule_holds() {
                rule_held = true;
                break;
            }
            if ev.evaluations as f64 * work > START_WORK {
                break;
            }
        }
        starts += 1;
        let mut z0 = start_point(k, &target.transforms, &shift);
        let mut tries = 0;
        loop {
            tries += 1;
            match minimize(&mut ev, z0.clone(), &target.transforms) {
                Descent::BadStart {
                    energy,
                    gradient_only,
                } => {
                    if gradient_only {
                        bad_gradients += 1;
                    } else {
                        bad_starts += 1;
                        if bad_example.is_none() {
                            bad_example = Some((z0.clone(), energy));
                        }
                    }
                    break;
                }
                Descent::Infinite { z } => {
                    return Err(KilnError::density(format!(
                        "the energy is −∞ (infinite density) at {}",
                        describe_point(target, &z)
                    ))
                    .with_hint("an infinite density cannot be normalised; check for log(0) or division by zero with the sign flipped"));
                }
                Descent::Escaped { z, along } => {
                    return Err(improper(target, &target.names[along], &z));
                }
                Descent::Converged {
                    z,
                    f,
                    inv_hessian_diag,
                } => {
                    let sd: Vec<f64> = inv_hessian_diag.iter().map(|v| sqrt(*v)).collect();
                    match settle(&mut ev, target, z, f, &sd)? {
                        Ok(mode) => {
                            merge_mode(&mut modes, mode);
                            break;
                        }
                        Err(lower) if tries < 4 => z0 = lower,
                        Err(_) => break,
                    }
                }
            }
        }
    }
    if modes.is_empty() {
        let detail = match bad_example {
            Some((z, e)) => format!(
                " (for example at {} the energy is {})",
                describe_point(target, &z),
                if e.is_nan() || e == f64::INFINITY {
                    "not finite".to_string()
                } else {
                    num(e)
                }
            ),
            None => String::new(),
        };
        return Err(KilnError::density(format!(
            "the energy is not finite at any of the {starts} starting points{detail}"
        ))
        .with_hint("check the formula's domain (log of a negative number, division by zero), or give bounds that keep the unknowns where it is defined"));
    }
    if bad_starts > 0 {
        notes.push(format!(
            "{bad_starts} of {starts} starting points had non-finite energy (zero density there) and were skipped"
        ));
    }
    if bad_gradients > 0 {
        notes.push(format!(
            "{bad_gradients} of {starts} starting points had a finite energy but a non-finite gradient (for example sqrt at 0) and were skipped"
        ));
    }
    if !opts.stop_rule {
        // Every requested start was made; the rule is judged on them all the same.
        rule_held = StartCounts::from_hits(modes.iter().map(|m| m.hits)).rule_holds();
    }
    let counts = StartCounts::from_hits(modes.iter().map(|m| m.hits));
    modes.sort_by(|a, b| a.energy.total_cmp(&b.energy));
    let before = modes.len();
    // The outward searches keep the budget they had before the stopping rule (a multiple of
    // 40 + 40 D starts), so that their cost does not grow with the start budget.
    let outward = (40 + 40 * d).min(2000);
    let mut hops = hop_search(target, &mut ev, &mut modes, outward * 4)?;
    hops += lattice_search(target, &mut ev, &mut modes, outward * 8)?;
    let found_outward = modes.len() - before;
    if found_outward > 0 {
        notes.push(format!(
            "{found_outward} of the {} modes were found from known modes, by crossing barriers and by repeating the steps between neighbouring modes ({hops} optimiser runs)",
            modes.len()
        ));
    }
    let scanned = scan(target, &mut modes, opts.scan_work)?;
    let scan_new: usize = scanned.iter().map(|s| s.new_modes).sum();
    if scan_new > 0 {
        notes.push(format!(
            "{scan_new} mode(s) were found only by the dense scan of the searched region"
        ));
    }
    if modes.iter().any(|m| m.non_quadratic) {
        notes.push("some modes are far from Gaussian; their Laplace masses use the measured width instead of the Hessian".to_string());
    }
    modes.sort_by(|a, b| a.energy.total_cmp(&b.energy));
    let evaluations = ev.evaluations + scanned.iter().map(|s| s.evaluations).sum::<u64>();
    let coverage = assess(
        target,
        &modes,
        starts,
        counts,
        rule_held,
        found_outward,
        scanned,
    );
    Ok(ModeSearch {
        modes,
        starts,
        evaluations,
        coverage,
        notes,
    })
}

/// Puts the search's evidence together: the estimators, the region, the scan's resolution,
/// and what could have been missed.
fn assess(
    target: &Target,
    modes: &[Mode],
    starts: usize,
    counts: StartCounts,
    rule_held: bool,
    found_outward: usize,
    scan: Vec<super::coverage::ScanSummary>,
) -> Coverage {
    let d = target.dim();
    // Widths in the units of the scan's axes: the user's units, or log units for an unknown
    // with one bound.
    let mut narrowest_found = vec![f64::INFINITY; d];
    for m in modes {
        let (sx, sz) = (mode_sd(target, m), mode_sd_z(m));
        for j in 0..d {
            let one_sided = matches!(
                target.transforms[j],
                Transform::Lower(_) | Transform::Upper(_)
            );
            let s = if one_sided { sz[j] } else { sx[j] };
            if s.is_finite() && s > 0.0 && s < narrowest_found[j] {
                narrowest_found[j] = s;
            }
        }
    }
    let expected_unseen = counts
        .expected_modes()
        .map(|k| (k - counts.distinct as f64).max(0.0));
    let mut limitations = Vec::new();
    // The finest grid of the scan: the one near the modes when there are two.
    let finest = scan.first();
    match finest {
        Some(s) => {
            let coarse: Vec<String> = (0..d)
                .filter(|&j| narrowest_found[j] < s.narrowest[j])
                .map(|j| target.names[j].clone())
                .collect();
            if !coarse.is_empty() {
                limitations.push(Limitation {
                    code: "scan_coarse".into(),
                    sentence: format!(
                        "the dense scan's grid is coarser than the narrowest mode found (along {}): a mode as narrow could lie between its points unseen",
                        coarse.join(", ")
                    ),
                });
            }
        }
        None if d > 3 => limitations.push(Limitation {
            code: "no_scan".into(),
            sentence: format!(
                "in {d} unknowns no dense scan is affordable: the search rests on {starts} scattered starts and on searches outward from the modes found, so a mode whose region of attraction is small (under about {:.2}% of the start region) could have been missed{}",
                100.0 * 3.0 / counts.converged.max(1) as f64,
                if rule_held { String::new() } else { format!("; the starts were used up before the stopping rule held (about {} more mode(s) expected)", expected_unseen.map_or("an unknown number of".to_string(), |u| format!("{u:.1}"))) }
            ),
        }),
        None if !rule_held => limitations.push(Limitation {
            code: "start_budget".into(),
            sentence: format!(
                "the {starts} scattered starts were used up before the stopping rule held: about {} more mode(s) may exist (Boender & Rinnooy Kan), and one more start would find a new one with chance {:.1}% (Good–Turing)",
                expected_unseen.map_or("an unknown number of".to_string(), |u| format!("{u:.1}")),
                100.0 * counts.new_mode_chance()
            ),
        }),
        None => {}
    }
    let ranges = |region: &[Range]| -> String {
        target
            .names
            .iter()
            .zip(region)
            .map(|(n, r)| format!("{n} in [{}, {}]", num(r.lower), num(r.upper)))
            .collect::<Vec<_>>()
            .join(", ")
    };
    let widths = |s: &super::coverage::ScanSummary| -> String {
        target
            .names
            .iter()
            .zip(&s.narrowest)
            .zip(&s.scale)
            .map(|((n, w), scale)| match scale {
                Spacing::Linear => format!("{} in {n}", num(*w)),
                Spacing::Log => format!("{:.2}% of {n}'s distance from its bound", 100.0 * w),
            })
            .collect::<Vec<_>>()
            .join(", ")
    };
    let rule = if rule_held { "held" } else { "not reached" };
    let mut summary = match scan.last() {
        Some(whole) => format!(
            "{starts} scattered starts (stopping rule {rule}), then a dense scan of {} on a grid of {} points: any mode at least {} wide there would have been found",
            ranges(&whole.region),
            whole.points.iter().map(|p| p.to_string()).collect::<Vec<_>>().join(" × "),
            widths(whole)
        ),
        None => format!(
            "{starts} scattered starts over {} (stopping rule {rule}); a mode whose region of attraction is smaller than about {:.2}% of that region could have been missed",
            ranges(&start_region(target)),
            100.0 * 3.0 / counts.converged.max(1) as f64
        ),
    };
    if scan.len() > 1 {
        summary.push_str(&format!(
            "; near the modes found ({}) a finer grid resolves modes at least {} wide",
            ranges(&scan[0].region),
            widths(&scan[0])
        ));
    }
    Coverage {
        starts,
        counts,
        new_mode_chance: counts.new_mode_chance(),
        expected_unseen,
        chao_unseen: counts.chao_unseen(),
        unreached_share: counts.unreached_share(),
        rule_held,
        start_region: start_region(target),
        found_outward,
        found_by_chains: 0,
        scan,
        narrowest_found,
        limitations,
        summary,
    }
}

/// The known mode whose region of attraction holds `z`: the local search from `z` is followed
/// to its end and matched to the mode it ends at (squared Mahalanobis distance below 9 under
/// that mode's Hessian); `None` when it ends nowhere known (or does not end). A mode's mass is
/// the target's mass in its region of attraction, which is what this assigns draws by.
pub fn basin_of(target: &Target, ev: &mut TargetEval, z: &[f64], modes: &[Mode]) -> Option<usize> {
    match minimize(ev, z.to_vec(), &target.transforms) {
        Descent::Converged { z: end, .. } => modes
            .iter()
            .enumerate()
            .map(|(k, m)| (k, mahalanobis2(&end, &m.z, &m.hessian)))
            .filter(|(_, d2)| *d2 < 9.0)
            .min_by(|a, b| a.1.total_cmp(&b.1))
            .map(|(k, _)| k),
        _ => None,
    }
}

/// Optimises from `z0` (for instance a draw in a region no start reached) and returns the mode
/// it ends in, if it ends in one.
pub fn mode_from(
    target: &Target,
    ev: &mut TargetEval,
    z0: &[f64],
) -> Result<Option<Mode>, KilnError> {
    let mut z = z0.to_vec();
    for _ in 0..4 {
        match minimize(ev, z.clone(), &target.transforms) {
            Descent::Converged {
                z: zc,
                f,
                inv_hessian_diag,
            } => {
                let sd: Vec<f64> = inv_hessian_diag.iter().map(|v| sqrt(*v)).collect();
                match settle(ev, target, zc, f, &sd)? {
                    Ok(m) => return Ok(Some(m)),
                    Err(lower) => z = lower,
                }
            }
            Descent::Escaped { z, along } => {
                return Err(improper(target, &target.names[along], &z));
            }
            Descent::Infinite { .. } | Descent::BadStart { .. } => return Ok(None),
        }
    }
    Ok(None)
}
