//! Layer 0 — foundations every stage shares: portable maths, the seeded generator, Gaussian
//! and Student-t mixtures with whitening, statistics of draws, number formatting, errors
//! with source locations, and the warnings and notes of reports.
//!
//! Must not: know about specs, formulas, targets, samplers or reports.

pub mod error;
pub mod format;
pub mod gaussian;
pub mod maths;
pub mod message;
pub mod psis;
pub mod rng;
pub mod stats;
