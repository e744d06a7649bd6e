//! The stages run in order, for one command.
//!
//! Owns: the sequence spec → target → modes → Laplace approximation → checks, and the plain
//! data structure each command's result is ([`CheckOutcome`]), which `report` renders and the
//! command line and the page translate. Holding the sequence here keeps the command-line and
//! WebAssembly layers free of statistics.
//! Must not: print, read files or format numbers.

use crate::approx::Laplace;
use crate::error::KilnError;
use crate::modes::{find_modes, ModeSearch, SearchOptions};
use crate::quadrature::{grid_log_z, GridResult, ModeScales};
use crate::spec::Spec;
use crate::target::{MixtureTruth, Target};
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
    /// Optimiser runs that ended here.
    pub hits: usize,
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
    pub gradient_evaluations: u64,
    pub warnings: Vec<String>,
}

/// The unknowns as reported: names and bounds.
fn unknowns_of(spec: &Spec) -> Vec<Unknown> {
    spec.variables
        .iter()
        .map(|v| Unknown {
            name: v.name.clone(),
            lower: v.bounds.lower,
            upper: v.bounds.upper,
        })
        .collect()
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
    let target = Target::from_spec(spec)?;
    let seed = spec.settings.seed.unwrap_or(DEFAULT_SEED);
    let mut opts = SearchOptions::default_for(target.dim(), seed);
    if let Some(s) = spec.settings.starts {
        // An explicit number of starts is honoured in full.
        opts.max_starts = s;
        opts.early_stop = false;
    }
    let search = find_modes(&target, opts)?;
    let laplace = Laplace::from_modes(&search.modes)?;
    Ok(Prepared {
        target,
        search,
        laplace,
        seed,
    })
}

/// Mode locations and widths in the user's coordinates.
pub fn mode_scales(p: &Prepared) -> ModeScales {
    let mut location = Vec::new();
    let mut sd = Vec::new();
    for (k, m) in p.search.modes.iter().enumerate() {
        let sd_z = p.laplace.component_sd(k);
        location.push(m.x.clone());
        sd.push(
            sd_z.iter()
                .zip(&m.z)
                .zip(&p.target.transforms)
                .map(|((s, z), t)| s * t.with_jacobian(*z).1.abs())
                .collect(),
        );
    }
    ModeScales { location, sd }
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
    let p = prepare(spec)?;
    let scales = mode_scales(&p);
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
            sd: scales.sd[k].clone(),
            hits: m.hits,
            non_quadratic: m.non_quadratic,
        })
        .collect();
    let work = p.target.evaluator_work();
    let grid = grid_log_z(&p.target, &scales, work, grid_work);
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
        gradient_evaluations: p.search.evaluations,
        warnings,
    })
}

// ---------------------------------------------------------------------------------------------
// `kiln run` and `kiln compare`.

use crate::estimates::{
    cross_checks, estimate, verdict, warnings, CrossCheck, Estimates, WeightedDraws,
};
use crate::sampler::{Integrator, Method, RefitPolicy, SamplerOptions, Stepper};

/// Defaults of `kiln run` (chosen by measurement; see DEVELOPERS.md).
pub const DEFAULT_CHAINS: usize = 4;
pub const DEFAULT_WARMUP: usize = 1000;
pub const DEFAULT_DRAWS: usize = 2000;
/// Draws of the importance-sampling cross-check.
pub const IS_DRAWS: usize = 4000;
/// Most values the kept draws may hold in memory (draws × chains × (unknowns + 3)).
pub const MAX_KEPT_VALUES: usize = 50_000_000;

/// Command-line values that override the spec's settings.
#[derive(Clone, Debug, Default)]
pub struct Overrides {
    pub seed: Option<u64>,
    pub chains: Option<usize>,
    pub draws: Option<usize>,
    pub warmup: Option<usize>,
    pub method: Option<String>,
    pub integrator: Option<String>,
}

/// The settings a run used, after defaults and overrides.
#[derive(Clone, Debug, Serialize)]
pub struct RunSettings {
    pub seed: u64,
    pub chains: usize,
    pub warmup: usize,
    pub draws: usize,
    pub method: Method,
    pub integrator: Integrator,
    pub target_accept: f64,
}

fn parse_method(m: &str) -> Result<Method, KilnError> {
    match m {
        "joint" => Ok(Method::Joint),
        "alternating" => Ok(Method::Alternating),
        other => Err(KilnError::usage(format!("unknown method `{other}`"))
            .with_hint("use `joint` or `alternating`")),
    }
}

fn parse_integrator(m: &str) -> Result<Integrator, KilnError> {
    match m {
        "nuts" => Ok(Integrator::Nuts),
        "hmc" => Ok(Integrator::Hmc),
        other => Err(KilnError::usage(format!("unknown integrator `{other}`"))
            .with_hint("use `nuts` or `hmc`")),
    }
}

/// Resolves the run settings: command line over spec settings over defaults.
pub fn run_settings(spec: &Spec, o: &Overrides) -> Result<RunSettings, KilnError> {
    let s = &spec.settings;
    let method = o
        .method
        .clone()
        .or_else(|| s.method.clone())
        .map_or(Ok(Method::Alternating), |m| parse_method(&m))?;
    let integrator = o
        .integrator
        .clone()
        .or_else(|| s.integrator.clone())
        .map_or(Ok(Integrator::Nuts), |m| parse_integrator(&m))?;
    let r = RunSettings {
        seed: o.seed.or(s.seed).unwrap_or(DEFAULT_SEED),
        chains: o.chains.or(s.chains).unwrap_or(DEFAULT_CHAINS),
        warmup: o.warmup.or(s.warmup).unwrap_or(DEFAULT_WARMUP),
        draws: o.draws.or(s.draws).unwrap_or(DEFAULT_DRAWS),
        method,
        integrator,
        target_accept: s.target_accept.unwrap_or(0.8),
    };
    if !(1..=64).contains(&r.chains) {
        return Err(KilnError::usage(format!("{} chains requested", r.chains))
            .with_hint("use between 1 and 64 chains"));
    }
    if !(10..=1_000_000).contains(&r.draws) || !(10..=1_000_000).contains(&r.warmup) {
        return Err(
            KilnError::usage("draws and warm-up must each be between 10 and 1000000")
                .with_hint("for example --draws 2000 --warmup 1000"),
        );
    }
    let kept = r.chains * r.draws * (spec.dimension() + 3);
    if kept > MAX_KEPT_VALUES {
        return Err(KilnError::limit(format!(
            "{} chains × {} draws of {} unknowns would keep {kept} values in memory; the limit is {MAX_KEPT_VALUES}",
            r.chains,
            r.draws,
            spec.dimension()
        ))
        .with_hint("use fewer draws or chains"));
    }
    Ok(r)
}

/// What `kiln run` reports: the run's identity and settings, the estimates (flattened into
/// the same JSON object), the cross-checks and the messages.
#[derive(Clone, Debug, Serialize)]
pub struct RunOutcome {
    pub title: String,
    pub dimension: usize,
    pub unknowns: Vec<Unknown>,
    pub settings: RunSettings,
    /// log Z, modes, moments and diagnostics (see `estimates::Estimates`).
    #[serde(flatten)]
    pub est: Estimates,
    pub laplace_log_z: f64,
    pub grid_log_z: Option<f64>,
    pub exact_log_z: Option<f64>,
    pub cross_checks: Vec<CrossCheck>,
    pub verdict: String,
    pub warnings: Vec<String>,
    pub notes: Vec<String>,
    pub seed: u64,
    pub gradient_evaluations: u64,
    /// Exact masses of the mixture components, in the order of `modes` (null unless a mixture).
    pub exact_masses: Option<Vec<f64>>,
}

/// A run's report and its draws.
pub struct RunResult {
    pub outcome: RunOutcome,
    pub draws: WeightedDraws,
    pub names: Vec<String>,
}

/// Sampler options for the resolved settings (the one place defaults meet the sampler).
pub fn sampler_options(r: &RunSettings) -> SamplerOptions {
    let mut o = SamplerOptions::new(r.seed);
    o.chains = r.chains;
    o.warmup = r.warmup;
    o.draws = r.draws;
    o.method = r.method;
    o.integrator = r.integrator;
    o.target_accept = r.target_accept;
    o.refit = RefitPolicy::Auto;
    o
}

/// `kiln run`: modes, warm-up, sampling, estimates, cross-checks. The same steps as the page.
pub fn run(spec: &Spec, overrides: &Overrides) -> Result<RunResult, KilnError> {
    let mut session = Session::new(spec, overrides, None)?;
    while session.step().is_some() {
        let records = session.run_step();
        session.absorb(records)?;
    }
    session.finish()
}

/// The sampling part of a run, for a prepared target (also used by benchmarks and tests).
pub fn run_prepared(
    spec: &Spec,
    p: &Prepared,
    grid: Option<GridResult>,
    opts: SamplerOptions,
    settings: RunSettings,
) -> Result<RunResult, KilnError> {
    let mut stepper = Stepper::new(
        &p.target,
        p.search.modes.clone(),
        p.laplace.clone(),
        opts,
        None,
    )?;
    stepper.run_to_end()?;
    finish_run(spec, p, grid.as_ref(), &stepper, settings)
}

/// Everything a run reports, from a stepper whose steps are all done.
pub fn finish_run(
    spec: &Spec,
    p: &Prepared,
    grid: Option<&GridResult>,
    stepper: &Stepper,
    settings: RunSettings,
) -> Result<RunResult, KilnError> {
    let laplace_log_z = p.laplace.log_zeta;
    let plan = &stepper.plan;
    let records = &stepper.kept;
    let (mut est, draws) = estimate(&p.target, plan, records, IS_DRAWS);
    est.diagnostics.step_sizes = stepper.step_sizes();
    let exact = p.target.mixture_truth();
    let exact_log_z = exact.as_ref().map(|t| t.log_z);
    let grid_pair = grid
        .filter(|g| g.log_z.is_finite())
        .map(|g| (g.log_z, g.change));
    let checks = cross_checks(
        est.log_z,
        est.log_z_se,
        exact_log_z,
        grid_pair,
        (est.is_log_z, est.is_log_z_se, est.diagnostics.is_ess),
        laplace_log_z,
    );
    let v = verdict(&checks, est.log_z, est.log_z_se);
    let names = p.target.names.clone();
    let iterations = plan.options.draws * plan.options.chains;
    let mut warns = warnings(&est, &checks, &names, plan.is_tempered(), iterations);
    if let Some(g) = grid {
        warns.extend(g.warnings.iter().cloned());
    }
    let mut notes = p.search.notes.clone();
    notes.extend(plan.notes.iter().cloned());
    if plan.new_modes > 0 {
        notes.push(format!(
            "the chains found {} mode(s) the optimiser had missed",
            plan.new_modes
        ));
    }
    let gradient_evaluations =
        p.search.evaluations + stepper.chain_evaluations() + plan.discovery_evaluations;
    // Exact masses, matched to modes by nearest component mean.
    let exact_masses = exact.map(|t| {
        est.modes
            .iter()
            .map(|m| {
                let best = (0..t.means.len())
                    .min_by(|&a, &b| {
                        dist2(&t.means[a], &m.location).total_cmp(&dist2(&t.means[b], &m.location))
                    })
                    .unwrap_or(0);
                t.masses[best]
            })
            .collect()
    });
    let outcome = RunOutcome {
        title: spec.title.clone(),
        dimension: p.target.dim(),
        unknowns: unknowns_of(spec),
        settings,
        est,
        laplace_log_z,
        grid_log_z: grid_pair.map(|g| g.0),
        exact_log_z,
        cross_checks: checks,
        verdict: v,
        warnings: warns,
        notes,
        seed: p.seed,
        gradient_evaluations,
        exact_masses,
    };
    Ok(RunResult {
        outcome,
        draws,
        names,
    })
}

fn dist2(a: &[f64], b: &[f64]) -> f64 {
    a.iter().zip(b).map(|(x, y)| (x - y) * (x - y)).sum()
}

/// What `kiln compare` reports: log(Z_A / Z_B) ± SE from two independent runs.
#[derive(Clone, Debug, Serialize)]
pub struct CompareOutcome {
    pub log_bayes_factor: f64,
    pub log_bayes_factor_se: f64,
    pub a: RunOutcome,
    pub b: RunOutcome,
    pub warnings: Vec<String>,
}

pub fn compare(a: RunOutcome, b: RunOutcome) -> CompareOutcome {
    let lbf = a.est.log_z - b.est.log_z;
    let se = crate::maths::sqrt(a.est.log_z_se * a.est.log_z_se + b.est.log_z_se * b.est.log_z_se);
    let mut warnings: Vec<String> = a.warnings.iter().map(|w| format!("A: {w}")).collect();
    warnings.extend(b.warnings.iter().map(|w| format!("B: {w}")));
    if a.verdict.starts_with("DISAGREEMENT") {
        warnings.push("A's cross-checks disagree: the Bayes factor inherits that doubt".into());
    }
    if b.verdict.starts_with("DISAGREEMENT") {
        warnings.push("B's cross-checks disagree: the Bayes factor inherits that doubt".into());
    }
    CompareOutcome {
        log_bayes_factor: lbf,
        log_bayes_factor_se: se,
        a,
        b,
        warnings,
    }
}

/// A run that advances one step at a time, for the page: each worker holds one, owning some
/// chains, and all exchange their records after every step (see `sampler::Stepper`).
pub struct Session {
    spec: Spec,
    prepared: Prepared,
    grid: Option<GridResult>,
    settings: RunSettings,
    stepper: crate::sampler::Stepper,
    running: Vec<RunningLogZ>,
}

/// log Z after some of the kept draws.
#[derive(Clone, Debug, Serialize)]
pub struct RunningLogZ {
    pub draws: usize,
    pub log_z: f64,
    pub log_z_se: f64,
}

/// Where a session is.
#[derive(Clone, Debug, Serialize)]
pub struct Progress {
    /// "warmup", "sampling" or "done".
    pub step_kind: String,
    pub step_index: usize,
    pub step_count: usize,
    /// Kept draws so far, over all chains.
    pub draws_done: usize,
    pub draws_total: usize,
    pub running: Vec<RunningLogZ>,
    /// β of the kept draws so far, per chain, thinned to at most 2000 values each.
    pub beta_trace: Vec<Vec<f64>>,
}

impl Session {
    /// Prepares the run (mode search, Laplace approximation, grid check) for the given chains.
    pub fn new(
        spec: &Spec,
        overrides: &Overrides,
        owned: Option<&[usize]>,
    ) -> Result<Session, KilnError> {
        let settings = run_settings(spec, overrides)?;
        let mut seeded = spec.clone();
        seeded.settings.seed = Some(settings.seed);
        let prepared = prepare(&seeded)?;
        let scales = mode_scales(&prepared);
        let grid = grid_log_z(
            &prepared.target,
            &scales,
            prepared.target.evaluator_work(),
            GRID_WORK,
        );
        if let Some(axis) = grid.as_ref().and_then(|g| g.growing_along) {
            return Err(heavy_tail_error(&prepared.target.names[axis]));
        }
        let stepper = crate::sampler::Stepper::new(
            &prepared.target,
            prepared.search.modes.clone(),
            prepared.laplace.clone(),
            sampler_options(&settings),
            owned,
        )?;
        Ok(Session {
            spec: spec.clone(),
            prepared,
            grid,
            settings,
            stepper,
            running: Vec::new(),
        })
    }

    pub fn settings(&self) -> &RunSettings {
        &self.settings
    }

    pub fn step(&self) -> Option<crate::sampler::Step> {
        self.stepper.step()
    }

    pub fn step_index(&self) -> usize {
        self.stepper.step_index()
    }

    pub fn step_count(&self) -> usize {
        self.stepper.step_count()
    }

    /// Runs this session's chains through the current step.
    pub fn run_step(&mut self) -> Vec<crate::sampler::Record> {
        self.stepper.run_step()
    }

    /// Takes every chain's records for the current step and advances.
    pub fn absorb(&mut self, records: Vec<crate::sampler::Record>) -> Result<(), KilnError> {
        let sampling = matches!(
            self.stepper.step(),
            Some(crate::sampler::Step::Sample { .. })
        );
        self.stepper.absorb(records)?;
        if sampling {
            let e = crate::estimates::log_z_estimate(&self.stepper.plan, &self.stepper.kept);
            let draws = self.stepper.kept.iter().map(|r| r.beta.len()).sum();
            self.running.push(RunningLogZ {
                draws,
                log_z: e.log_z,
                log_z_se: e.se,
            });
        }
        Ok(())
    }

    pub fn progress(&self) -> Progress {
        let step_kind = match self.stepper.step() {
            Some(crate::sampler::Step::Warmup { .. }) => "warmup",
            Some(crate::sampler::Step::Sample { .. }) => "sampling",
            None => "done",
        };
        let beta_trace = self
            .stepper
            .kept
            .iter()
            .map(|r| {
                let stride = r.beta.len().div_ceil(2000).max(1);
                r.beta.iter().step_by(stride).copied().collect()
            })
            .collect();
        Progress {
            step_kind: step_kind.to_string(),
            step_index: self.stepper.step_index(),
            step_count: self.stepper.step_count(),
            draws_done: self.stepper.kept.iter().map(|r| r.beta.len()).sum(),
            draws_total: self.settings.draws * self.settings.chains,
            running: self.running.clone(),
            beta_trace,
        }
    }

    /// The full report, once every step is done.
    pub fn finish(&self) -> Result<RunResult, KilnError> {
        if self.stepper.step().is_some() {
            return Err(KilnError::usage("the run has not finished yet")
                .with_hint("run and absorb every step first"));
        }
        finish_run(
            &self.spec,
            &self.prepared,
            self.grid.as_ref(),
            &self.stepper,
            self.settings.clone(),
        )
    }
}

fn heavy_tail_error(name: &str) -> KilnError {
    KilnError::density(format!("the density does not seem to be normalisable along `{name}`")).with_hint(format!(
        "its tails fall off too slowly: the integral keeps growing as the range of `{name}` widens; bound `{name}` or add a term that makes the energy rise faster, such as a prior"
    ))
}

/// Draws for plots: resampled target draws (at most `max`), per unknown, with their modes.
#[derive(Clone, Debug, Serialize)]
pub struct PlotDraws {
    pub names: Vec<String>,
    /// x[j][i]: unknown j of draw i.
    pub x: Vec<Vec<f64>>,
    /// 1-based mode of each draw.
    pub mode: Vec<usize>,
    pub beta: Vec<f64>,
}

impl RunResult {
    /// Resampled, unweighted target draws as in `kiln run --draws-csv`.
    pub fn resampled(&self) -> Vec<usize> {
        let n = self.outcome.settings.draws * self.outcome.settings.chains;
        crate::estimates::resample(&self.draws.weight, n, self.outcome.seed)
    }

    pub fn draws_csv(&self) -> String {
        crate::report::draws_csv(&self.names, &self.draws, &self.resampled())
    }

    pub fn plot_draws(&self, max: usize) -> PlotDraws {
        let picks = self.resampled();
        let stride = picks.len().div_ceil(max.max(1)).max(1);
        let d = self.names.len();
        let chosen: Vec<usize> = picks.iter().step_by(stride).copied().collect();
        PlotDraws {
            names: self.names.clone(),
            x: (0..d)
                .map(|j| chosen.iter().map(|&i| self.draws.x[i * d + j]).collect())
                .collect(),
            mode: chosen.iter().map(|&i| self.draws.mode[i] + 1).collect(),
            beta: chosen.iter().map(|&i| self.draws.beta[i]).collect(),
        }
    }
}

/// The user's log density on a grid of cell centres (row-major, y outer), for one or two
/// unknowns: `ix`, `iy` pick the unknowns (iy ignored for one unknown).
#[allow(clippy::too_many_arguments)]
pub fn log_density_grid(
    spec: &Spec,
    ix: usize,
    iy: usize,
    xr: (f64, f64),
    yr: (f64, f64),
    nx: usize,
    ny: usize,
) -> Result<Vec<f64>, KilnError> {
    let target = crate::target::Target::from_spec(spec)?;
    let d = target.dim();
    if d > 2 {
        return Err(KilnError::usage("a density map needs one or two unknowns")
            .with_hint("for more unknowns, plot the draws of a pair"));
    }
    if ix >= d || (d == 2 && (iy >= d || iy == ix)) {
        return Err(KilnError::usage(
            "choose two different unknowns for the density map",
        ));
    }
    let (nx, ny) = (
        nx.clamp(1, 1024),
        if d == 1 { 1 } else { ny.clamp(1, 1024) },
    );
    let mut ev = target.evaluator();
    let mut out = Vec::with_capacity(nx * ny);
    let mut x = vec![0.0; d];
    for j in 0..ny {
        for i in 0..nx {
            x[ix] = xr.0 + (i as f64 + 0.5) * (xr.1 - xr.0) / nx as f64;
            if d == 2 {
                x[iy] = yr.0 + (j as f64 + 0.5) * (yr.1 - yr.0) / ny as f64;
            }
            out.push(-ev.user_energy(&x));
        }
    }
    Ok(out)
}
