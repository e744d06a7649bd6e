//! Layer 3 — mode search and the Laplace mixture: target → its modes → the base q and log ζ.
//!
//! In: a [`crate::model::target::Target`]. Out: [`ModeSearch`] (distinct modes with Hessians,
//! starts, evaluations, notes) and [`Laplace`] (the base mixture and log ζ).
//!
//! Files: `starts` (where to start), `optimiser` (BFGS, line search, Hessian), `diagnose`
//! (curvature check, saddles, improper densities), `modes` (the search as a whole, dedup),
//! `outward` (barrier crossing, lattice completion), `scan` (the dense scan in few unknowns and
//! the searched region), `coverage` (how sure the search is that it found every mode: the
//! estimators and the stopping rule), `laplace` (the mixture from the modes).
//! Must not: sample or estimate.

pub mod coverage;
pub mod diagnose;
pub mod laplace;
pub mod modes;
pub mod optimiser;
pub mod outward;
pub mod scan;
pub mod starts;

pub use coverage::Coverage;
pub use laplace::Laplace;
pub use modes::{
    basin_of, find_modes, mahalanobis2, merge_mode, mode_from, FoundBy, Mode, ModeSearch,
};
pub use starts::SearchOptions;
