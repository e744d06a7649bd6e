//! Layer 1 — the formula language: text → syntax tree (`syntax`) → resolved expression graph
//! (`resolve`: names, arities, `sum` rules, constant folding) → compiled tape with exact
//! reverse-mode gradients (`tape`). The built-in log densities (`densities`) are functions of
//! the language, expanded into the graph by `resolve`; `catalogue` describes every function for
//! the page's editor.
//!
//! In: formula text, the names of the unknowns and data columns, the data.
//! Out: a [`tape::Tape`] and its [`tape::Evaluator`].
//! Must not: know what a formula means (energy or log density, bounds, mixtures).

pub mod catalogue;
pub mod densities;
pub mod resolve;
pub mod syntax;
pub mod tape;
