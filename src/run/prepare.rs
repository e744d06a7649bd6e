//! Preparing a target: spec → target → modes → Laplace mixture, and `kiln check`.
//!
//! Owns: [`Prepared`] (the input of every later stage), [`prepare`], the modes' locations and
//! widths in the user's coordinates, and [`CheckOutcome`] with everything `kiln check` reports.
//! Must not: sample, print or format numbers.

use crate::common::error::KilnError;
use crate::estimate::quadrature::{grid_log_z, GridResult};
use crate::model::spec::Spec;
use crate::model::target::{MixtureTruth, Target};
use crate::search::laplace::Laplace;
use crate::search::scan::mode_sd;
use crate::search::{find_modes, Coverage, FoundBy, ModeSearch, SearchOptions};
use serde::Serialize;

/// Default seed when the spec gives none (runs are always reproducible).
pub const DEFAULT_SEED: u64 = 1;
/// Work budget of the grid quadrature, in tape instructions.
pub const GRID_WORK: f64 = 4e9;

#[derive(Clone, Debug, Serialize)]
pub struct Unknown {
    pub name: String,
    pub lower: Option<f64>,
    pub upper: Option<f64>,
    /// The prior given in the spec (added to the log density), when there is one.
    #[serde(skip_serializing_if = "Option::is_none")]
    pub prior: Option<String>,
}

#[derive(Clone, Debug, Serialize)]
pub struct ModeSummary {
    /// Location in the user's coordinates.
    pub location: Vec<f64>,
    /// The user's energy there (−log density for a log-density formula).
    pub energy: f64,
    /// L_k / ζ.
    pub laplace_mass: f64,
    /// Standard deviations in the user's coordinates, from the Laplace approximation.
    pub sd: Vec<f64>,
    /// Scattered starts that ended here (0: found another way, see `found_by`).
    pub hits: usize,
    pub found_by: FoundBy,
    /// True when the Hessian was replaced by measured widths (a non-Gaussian mode).
    pub non_quadratic: bool,
}

#[derive(Clone, Debug, Serialize)]
pub struct Exact {
    pub log_z: f64,
    pub mean: Vec<f64>,
    pub cov: Vec<Vec<f64>>,
    pub masses: Vec<f64>,
    pub means: Vec<Vec<f64>>,
}

/// What `kiln check` found.
#[derive(Clone, Debug, Serialize)]
pub struct CheckOutcome {
    pub title: String,
    pub notes: String,
    /// "energy", "log_density" or "mixture".
    pub model: String,
    pub dimension: usize,
    pub unknowns: Vec<Unknown>,
    pub data_columns: Vec<String>,
    pub data_rows: usize,
    pub modes: Vec<ModeSummary>,
    pub laplace_log_z: f64,
    /// Null when D > 2 or when the grid could not run.
    pub grid_log_z: Option<f64>,
    pub grid: Option<GridResult>,
    /// Null unless a mixture.
    pub exact_log_z: Option<f64>,
    pub exact: Option<Exact>,
    pub seed: u64,
    pub starts: usize,
    /// The search's evidence that every mode was found.
    pub mode_coverage: Coverage,
    pub gradient_evaluations: u64,
    pub warnings: Vec<String>,
}

/// The unknowns as reported: names and bounds.
pub(super) fn unknowns_of(spec: &Spec) -> Vec<Unknown> {
    spec.variables
        .iter()
        .map(|v| Unknown {
            name: v.name.clone(),
            lower: v.bounds.lower,
            upper: v.bounds.upper,
            prior: v.prior.clone(),
        })
        .collect()
}

/// The note that states the spec's priors (`None` without priors), e.g. "priors from the spec,
/// added to the log density: `mu` normal(0, 2); `theta[1]`…`theta[6]` normal(mu, 0.6)".
pub(super) fn priors_note(spec: &Spec) -> Option<String> {
    let parts: Vec<String> = crate::model::target::prior_terms(spec)
        .iter()
        .map(|(_, text, subjects)| {
            let name = |i: u32| spec.variables[i as usize].name.clone();
            let who = match subjects.as_slice() {
                [one] => format!("`{}`", name(*one)),
                [first, .., last] => format!("`{}`…`{}`", name(*first), name(*last)),
                [] => String::new(),
            };
            format!("{who} {}", text.trim())
        })
        .collect();
    (!parts.is_empty()).then(|| {
        format!(
            "priors from the spec, added to the log density: {}",
            parts.join("; ")
        )
    })
}

/// A target with its modes and Laplace approximation: the input of every later stage.
#[derive(Clone, Debug)]
pub struct Prepared {
    pub target: Target,
    pub search: ModeSearch,
    pub laplace: Laplace,
    pub seed: u64,
}

/// Builds the target, finds its modes and the Laplace approximation.
pub fn prepare(spec: &Spec) -> Result<Prepared, KilnError> {
    prepare_with_scan_work(spec, crate::search::scan::SCAN_WORK)
}

/// [`prepare`] with another work budget for the dense scan (tape instructions).
pub fn prepare_with_scan_work(spec: &Spec, scan_work: f64) -> Result<Prepared, KilnError> {
    let target = Target::from_spec(spec)?;
    let seed = spec.settings.seed.unwrap_or(DEFAULT_SEED);
    let mut opts = SearchOptions::default_for(target.dim(), seed);
    opts.scan_work = scan_work;
    if let Some(s) = spec.settings.starts {
        // An explicit number of starts is honoured in full.
        opts.max_starts = s;
        opts.stop_rule = false;
    }
    let mut search = find_modes(&target, opts)?;
    if let Some(note) = priors_note(spec) {
        search.notes.insert(0, note);
    }
    let laplace = Laplace::from_modes(&search.modes)?;
    Ok(Prepared {
        target,
        search,
        laplace,
        seed,
    })
}

fn exact_of(t: &MixtureTruth) -> Exact {
    let d = t.mean.len();
    Exact {
        log_z: t.log_z,
        mean: t.mean.clone(),
        cov: (0..d).map(|i| t.cov[i * d..(i + 1) * d].to_vec()).collect(),
        masses: t.masses.clone(),
        means: t.means.clone(),
    }
}

/// Everything `kiln check` reports.
pub fn check(spec: &Spec) -> Result<CheckOutcome, KilnError> {
    check_with_grid_budget(spec, GRID_WORK)
}

/// [`check`] with another work budget for the grid quadrature (tape instructions); the fuzz
/// targets use a small one so that each case stays quick under instrumentation.
pub fn check_with_grid_budget(spec: &Spec, grid_work: f64) -> Result<CheckOutcome, KilnError> {
    // The same budget bounds the dense scan, so that a small budget keeps the whole check small.
    let p = prepare_with_scan_work(spec, grid_work.min(crate::search::scan::SCAN_WORK))?;
    let masses = p.laplace.masses();
    let modes = p
        .search
        .modes
        .iter()
        .enumerate()
        .map(|(k, m)| ModeSummary {
            location: m.x.clone(),
            energy: m.user_energy,
            laplace_mass: masses[k],
            sd: mode_sd(&p.target, m),
            hits: m.hits,
            found_by: m.found_by,
            non_quadratic: m.non_quadratic,
        })
        .collect();
    let work = p.target.evaluator_work();
    let grid = grid_log_z(&p.target, &p.search.modes, work, grid_work);
    if let Some(axis) = grid.as_ref().and_then(|g| g.growing_along) {
        return Err(heavy_tail_error(&p.target.names[axis]));
    }
    let mut warnings = p.search.notes.clone();
    if let Some(g) = &grid {
        warnings.extend(g.warnings.iter().cloned());
    }
    let exact = p.target.mixture_truth().map(|t| exact_of(&t));
    Ok(CheckOutcome {
        title: spec.title.clone(),
        notes: spec.notes.clone(),
        model: spec.model.field().to_string(),
        dimension: p.target.dim(),
        unknowns: unknowns_of(spec),
        data_columns: spec.data.iter().map(|(n, _)| n.clone()).collect(),
        data_rows: spec.data_rows,
        modes,
        laplace_log_z: p.laplace.log_zeta,
        grid_log_z: grid.as_ref().map(|g| g.log_z).filter(|v| v.is_finite()),
        grid,
        exact_log_z: exact.as_ref().map(|e| e.log_z),
        exact,
        seed: p.seed,
        starts: p.search.starts,
        mode_coverage: p.search.coverage.clone(),
        gradient_evaluations: p.search.evaluations,
        warnings,
    })
}

pub(super) fn heavy_tail_error(name: &str) -> KilnError {
    KilnError::density(format!("the density does not seem to be normalisable along `{name}`")).with_hint(format!(
        "its tails fall off too slowly: the integral keeps growing as the range of `{name}` widens; bound `{name}` or add a term that makes the energy rise faster, such as a prior"
    ))
}
