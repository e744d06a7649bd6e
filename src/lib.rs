//! Kiln: modes, log evidence and cross-checks for multimodal densities.
//!
//! The crate is a pipeline; read the modules in this order:
//!
//! 1. [`spec`]: the JSON spec → a validated spec (shape, names, bounds, data, mixtures).
//! 2. [`syntax`]: formula text → syntax tree.
//! 3. [`check`]: syntax tree → checked formula graph (names, arities, `sum` rules).
//! 4. [`tape`]: checked formula → compiled tape with exact reverse-mode gradients.
//! 5. [`target`]: tape (or mixture) + bounds → energy on the real line, in user units.
//! 6. [`modes`]: multi-start BFGS → distinct modes with Hessians.
//! 7. [`approx`]: modes → Laplace mixture base q and log ζ.
//! 8. [`quadrature`]: an independent grid check of log Z for one or two unknowns.
//! 9. [`pipeline`]: runs the stages for a command and collects the outcome.
//! 10. [`report`]: outcome → text for people.
//!
//! Support: [`error`] (diagnostics with carets), [`maths`] (libm-backed scalar functions),
//! [`gaussian`] (normal and Student-t mixtures), [`rng`] (the seeded portable generator).
//! The command line (`src/main.rs`) and the WebAssembly layer (`wasm`) only translate.

pub mod error;
pub mod gaussian;
pub mod maths;
pub mod rng;

pub mod approx;
pub mod baselines;
pub mod bench;
pub mod check;
pub mod control;
pub mod estimates;
pub mod hmc;
pub mod modes;
pub mod pipeline;
pub mod quadrature;
pub mod refit;
pub mod report;
pub mod sampler;
pub mod spec;
pub mod syntax;
pub mod tape;
pub mod target;
pub mod tempering;

#[cfg(target_arch = "wasm32")]
pub mod wasm;
#[cfg(target_arch = "wasm32")]
pub mod wasm_bench;

pub use error::{ErrorKind, KilnError};
pub use spec::{parse_spec, Spec};
