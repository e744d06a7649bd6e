//! A run that advances one step at a time, for the page's workers.
//!
//! Owns: [`Session`] (a prepared target, its grid check and a stepper that owns some chains),
//! the running log Z after each sampling step, and [`Progress`]. A leading session searches
//! for the modes and summarises; following sessions (the page's other workers) take the
//! leader's modes instead of searching again and only run their chains.
//! Must not: differ in any number from a whole run (`outcome::run` drives a session too).

use super::outcome::{finish_run, RunResult};
use super::prepare::{heavy_tail_error, prepare, Prepared, GRID_WORK};
use super::settings::{run_settings, sampler_options, Overrides, RunSettings};
use crate::common::error::KilnError;
use crate::estimate::quadrature::{grid_log_z, GridResult};
use crate::model::spec::Spec;
use crate::model::target::Target;
use crate::search::laplace::Laplace;
use crate::search::modes::Mode;
use serde::Serialize;

/// A run that advances one step at a time, for the page: each worker holds one, owning some
/// chains, and all exchange their records after every step (see `sample::Stepper`).
pub struct Session {
    spec: Spec,
    /// The mode search and the grid check: only the leading session has them.
    lead: Option<Lead>,
    settings: RunSettings,
    stepper: crate::sample::Stepper,
    running: Vec<RunningLogZ>,
}

struct Lead {
    prepared: Prepared,
    grid: Option<GridResult>,
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
        let grid = grid_log_z(
            &prepared.target,
            &prepared.search.modes,
            prepared.target.evaluator_work(),
            GRID_WORK,
        );
        if let Some(axis) = grid.as_ref().and_then(|g| g.growing_along) {
            return Err(heavy_tail_error(&prepared.target.names[axis]));
        }
        let stepper = crate::sample::Stepper::new(
            &prepared.target,
            prepared.search.modes.clone(),
            prepared.laplace.clone(),
            sampler_options(&settings),
            owned,
        )?;
        Ok(Session {
            spec: spec.clone(),
            lead: Some(Lead { prepared, grid }),
            settings,
            stepper,
            running: Vec::new(),
        })
    }

    /// A session for the given chains that takes the leader's modes ([`Session::modes_json`])
    /// instead of searching: the same target, Laplace mixture and plan, so its chains' records
    /// are bit for bit those the leader would make. It runs and absorbs steps but does not
    /// summarise.
    pub fn follow(
        spec: &Spec,
        overrides: &Overrides,
        owned: &[usize],
        modes_json: &str,
    ) -> Result<Session, KilnError> {
        let settings = run_settings(spec, overrides)?;
        let mut seeded = spec.clone();
        seeded.settings.seed = Some(settings.seed);
        let target = Target::from_spec(&seeded)?;
        let modes: Vec<Mode> = serde_json::from_str(modes_json).map_err(|e| {
            KilnError::usage(format!("could not read the leading worker's modes: {e}"))
                .with_hint("reload the page and run again")
        })?;
        if modes.is_empty() || modes.iter().any(|m| m.z.len() != target.dim()) {
            return Err(
                KilnError::usage("the leading worker's modes do not fit this model")
                    .with_hint("reload the page and run again"),
            );
        }
        let laplace = Laplace::from_modes(&modes)?;
        let stepper = crate::sample::Stepper::new(
            &target,
            modes,
            laplace,
            sampler_options(&settings),
            Some(owned),
        )?;
        Ok(Session {
            spec: spec.clone(),
            lead: None,
            settings,
            stepper,
            running: Vec::new(),
        })
    }

    /// The modes found by a leading session, as JSON (floats round-trip exactly), for
    /// [`Session::follow`]; `None` for a following session.
    pub fn modes_json(&self) -> Option<String> {
        let lead = self.lead.as_ref()?;
        serde_json::to_string(&lead.prepared.search.modes).ok()
    }

    /// True for the session that searched for the modes and can summarise.
    pub fn leads(&self) -> bool {
        self.lead.is_some()
    }

    pub fn settings(&self) -> &RunSettings {
        &self.settings
    }

    pub fn step(&self) -> Option<crate::sample::Step> {
        self.stepper.step()
    }

    pub fn step_index(&self) -> usize {
        self.stepper.step_index()
    }

    pub fn step_count(&self) -> usize {
        self.stepper.step_count()
    }

    /// Runs this session's chains through the current step.
    pub fn run_step(&mut self) -> Vec<crate::sample::Record> {
        self.stepper.run_step()
    }

    /// Takes every chain's records for the current step and advances.
    pub fn absorb(&mut self, records: Vec<crate::sample::Record>) -> Result<(), KilnError> {
        let sampling = matches!(
            self.stepper.step(),
            Some(crate::sample::Step::Sample { .. })
        );
        self.stepper.absorb(records)?;
        if sampling && self.lead.is_some() {
            let e = crate::estimate::log_z_estimate(&self.stepper.plan, &self.stepper.kept);
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
            Some(crate::sample::Step::Warmup { .. }) => "warmup",
            Some(crate::sample::Step::Sample { .. }) => "sampling",
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
        let Some(lead) = &self.lead else {
            return Err(
                KilnError::usage("only the leading session summarises a run")
                    .with_hint("call finish on the session that searched for the modes"),
            );
        };
        finish_run(
            &self.spec,
            &lead.prepared,
            lead.grid.as_ref(),
            &self.stepper,
            self.settings.clone(),
        )
    }
}
