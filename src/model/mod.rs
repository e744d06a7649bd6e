//! Layer 2 — the model: the JSON spec (`spec`) and the target density on the real line it
//! defines (`target`: compiled formula or mixture, bound transforms and their log-Jacobians).
//!
//! In: spec text. Out: a validated [`spec::Spec`] and a [`target::Target`] with evaluators.
//! Must not: search for modes or sample.

pub mod spec;
pub mod table;
pub mod target;
