//! Kiln: modes, log evidence and cross-checks for multimodal densities.
//!
//! The crate is a pipeline of layers; read them in this order (the map, the chain of types
//! between the layers and the invariants are in DEVELOPERS.md):
//!
//! 0. [`common`]: portable maths, the seeded generator, Gaussian mixtures and whitening,
//!    statistics of draws, number formatting, errors with locations.
//! 1. [`formula`]: formula text → syntax tree → resolved graph → compiled tape with gradients.
//! 2. [`model`]: the JSON spec → a validated spec → the target density on the real line.
//! 3. [`search`]: the target → its modes → the Laplace mixture (the base q and log ζ).
//! 4. [`sample`]: continuously tempered HMC between the base and the target → kept records.
//! 5. [`estimate`]: records → log Z ± SE, masses, moments, diagnostics; cross-checks, verdict.
//! 6. [`run`]: the stages in order for `check`, `run`, `compare`, and stepwise sessions.
//! 7. [`report`]: outcomes → text and CSV.
//! 8. [`bench`]: `kiln bench`, Kiln against published methods at equal cost.
//!
//! The command line (`src/main.rs`) and the WebAssembly layer (`wasm`, `wasm_bench`) sit above
//! every layer and only translate. A module may use its own layer and the layers below it,
//! never one above: [`LAYERS`] is the table, and `tests/layers.rs` reads every `crate::` path
//! in `src/` and fails on an upward one.

pub mod bench;
pub mod common;
pub mod estimate;
pub mod formula;
pub mod model;
pub mod report;
pub mod run;
pub mod sample;
pub mod search;

#[cfg(target_arch = "wasm32")]
pub mod wasm;
#[cfg(target_arch = "wasm32")]
pub mod wasm_bench;

/// The layers from the bottom up: each may import from itself and from the layers before it.
/// The last entry holds the translating shells, which may import from every layer.
pub const LAYERS: &[&str] = &[
    "common", "formula", "model", "search", "sample", "estimate", "run", "report", "bench", "shell",
];

/// The top-level files that are shells (`main.rs` is the binary and imports the crate as
/// `kiln::`).
pub const SHELLS: &[&str] = &["wasm", "wasm_bench", "main"];

pub use common::error::{ErrorKind, KilnError};
pub use model::spec::{parse_spec, Spec};
