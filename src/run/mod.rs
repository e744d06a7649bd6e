//! Layer 6 — running the stages for a command: `check`, `run`, `compare`, and sessions that the
//! page's workers step through.
//!
//! In: a validated spec and overrides. Out: plain result structs ([`CheckOutcome`],
//! [`RunOutcome`], [`CompareOutcome`], [`Progress`]) that `report` lays out and the command
//! line and WebAssembly layers translate. Holding the sequence here keeps those layers free of
//! statistics.
//! Must not: print, read or write files, or format numbers (beyond the sentences of notes).

pub mod density;
pub mod digest;
pub mod outcome;
pub mod prepare;
pub mod session;
pub mod settings;

pub use density::log_density_grid;
pub use digest::{ModeTable, UnknownRow, UnknownsSummary, FOLD_SHARE, INTERVAL_LEVEL};
pub use outcome::{
    bayes_factor, compare, finish_run, run, run_prepared, BayesFactor, CompareOutcome, Evidence,
    ModelMessage, PlotDraws, RunOutcome, RunResult, IS_DRAWS,
};
pub use prepare::{
    check, check_with_grid_budget, prepare, CheckOutcome, Exact, ModeSummary, Prepared, Unknown,
    DEFAULT_SEED, GRID_WORK,
};
pub use session::{Progress, RunningLogZ, Session};
pub use settings::{
    run_settings, sampler_options, Overrides, RunSettings, DEFAULT_ACCEPTANCE_GOAL, DEFAULT_CHAINS,
    DEFAULT_DRAWS, DEFAULT_WARMUP, MAX_KEPT_VALUES,
};
