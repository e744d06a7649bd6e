//! Layer 2 — the model: the JSON spec (`spec`, with `parts` for the pieces checked on their
//! own: vector elements, mixture components, settings), data given as CSV text (`table`,
//! through the `csv` crate), and the target density on the real line it defines (`target`:
//! compiled formula with the spec's priors added, or mixture; bound transforms and their
//! log-Jacobians).
//!
//! In: spec text. Out: a validated [`spec::Spec`] and a [`target::Target`] with evaluators.
//! Must not: search for modes or sample.

mod parts;
pub mod spec;
pub mod table;
pub mod target;
