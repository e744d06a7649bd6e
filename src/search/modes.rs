//! Modes: what they are, how two are told apart, and the whole search for them.
//!
//! Owns: [`Mode`], [`ModeSearch`], [`find_modes`] (scattered starts, then the outward searches),
//! [`mode_from`] (optimise from one point and settle), settling a converged point into a mode
//! (Newton polish and the curvature check), [`merge_mode`] (one mode when within one standard
//! deviation) and [`mahalanobis2`].
//! Must not: build the approximation from the modes (that is `laplace`) or sample.

use super::diagnose::{curvature_check, describe_point, escape_variable, improper, Curvature};
use super::optimiser::{axpy, hessian, minimize, Descent};
use super::outward::{hop_search, lattice_search};
use super::starts::{start_point, SearchOptions};
use crate::common::error::KilnError;
use crate::common::format::num;
use crate::common::maths::sqrt;
use crate::common::rng::{Purpose, Stream};
use crate::model::target::{Target, TargetEval};
use nalgebra::DMatrix;

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
    /// How many optimiser runs ended here.
    pub hits: usize,
    /// True when the finite-difference Hessian was replaced by curvatures measured along its
    /// eigenvectors because the mode is far from quadratic (see [`curvature_check`]).
    pub non_quadratic: bool,
}

/// Everything the mode search found.
#[derive(Clone, Debug)]
pub struct ModeSearch {
    /// Distinct modes, lowest energy first.
    pub modes: Vec<Mode>,
    /// Optimiser starts made.
    pub starts: usize,
    /// Energy-and-gradient evaluations spent.
    pub evaluations: u64,
    /// Plain-words remarks for the report.
    pub notes: Vec<String>,
}

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
                let hits = known.hits;
                *known = m;
                known.hits = hits;
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
    let mut last_new = 0;
    let mut starts = 0;
    for k in 0..opts.max_starts {
        // Stop early once new starts have long stopped finding new modes.
        if opts.early_stop && k >= 64 && k - last_new > k / 2 && !modes.is_empty() {
            break;
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
                            if merge_mode(&mut modes, mode) {
                                last_new = k;
                            }
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
    modes.sort_by(|a, b| a.energy.total_cmp(&b.energy));
    let before = modes.len();
    let mut hops = hop_search(target, &mut ev, &mut modes, opts.max_starts * 4)?;
    hops += lattice_search(target, &mut ev, &mut modes, opts.max_starts * 8)?;
    if modes.len() > before {
        notes.push(format!(
            "{} of the {} modes were found from known modes, by crossing barriers and by repeating the steps between neighbouring modes ({hops} optimiser runs)",
            modes.len() - before,
            modes.len()
        ));
    }
    if modes.iter().any(|m| m.non_quadratic) {
        notes.push("some modes are far from Gaussian; their Laplace masses use the measured width instead of the Hessian".to_string());
    }
    modes.sort_by(|a, b| a.energy.total_cmp(&b.energy));
    Ok(ModeSearch {
        modes,
        starts,
        evaluations: ev.evaluations,
        notes,
    })
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
