//! Layer 5 — estimates: what the kept draws and the independent checks say.
//!
//! In: the target, the frozen plan and the kept records (`sample`), grid and exact values.
//! Out: [`Estimates`] (log Z ± SE, masses ± SE, moments, diagnostics), [`WeightedDraws`], the
//! cross-checks, the verdict and the warnings.
//!
//! Files:
//! - `log_z`: log Z ± SE from the series, plain and with control variates (`control`);
//! - `summary`: weighted draws, moments, quantiles, R-hat, ESS, mode masses, diagnostics;
//! - `importance`: the importance-sampling check from the base;
//! - `quadrature`: the grid check for one or two unknowns;
//! - `crosscheck`: the agreement rule and the verdict;
//! - `warnings`: the plain-words warnings.
//!
//! Must not: run chains or change the plan; format anything but the sentences of warnings and
//! verdicts (numbers through `common::format`).

pub mod control;
pub mod crosscheck;
pub mod importance;
pub mod log_z;
pub mod quadrature;

pub mod summary;
pub mod warnings;

pub use crosscheck::{cross_checks, verdict, Agreement, CrossCheck, Verdict};
pub use log_z::{log_z_estimate, log_z_reported, ControlSummary, LogZ, ProposalSummary};
pub use summary::{estimate, Diagnostics, Estimates, ModeEstimate, WeightedDraws};
pub use warnings::warnings;
