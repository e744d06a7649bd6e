//! A run that advances one step at a time, for the page's workers.
//!
//! Owns: [`Session`] (a prepared target, its grid check and a stepper that owns some chains),
//! the running log Z after each sampling step, and [`Progress`].
//! Must not: differ in any number from a whole run (`outcome::run` drives a session too).

use super::outcome::{finish_run, RunResult};
use super::prepare::{heavy_tail_error, prepare, Prepared, GRID_WORK};
use super::settings::{run_settings, sampler_options, Overrides, RunSettings};
use crate::common::error::KilnError;
use crate::estimate::quadrature::{grid_log_z, GridResult};
use crate::model::spec::Spec;
use serde::Serialize;

/// A run that advances one step at a time, for the page: each worker holds one, owning some
/// chains, and all exchange their records after every step (see `sample::Stepper`).
pub struct Session {
    spec: Spec,
    prepared: Prepared,
    grid: Option<GridResult>,
    settings: RunSettings,
    stepper: crate::sample::Stepper,
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
        if sampling {
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
        finish_run(
            &self.spec,
            &self.prepared,
            self.grid.as_ref(),
            &self.stepper,
            self.settings.clone(),
        )
    }
}
