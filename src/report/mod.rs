//! Layer 7 — reports: outcomes → text and CSV for people and files. JSON is the outcome types'
//! own serialisation (serde), shared by the command line and the page.
//!
//! In: `run`'s outcomes. Out: strings.
//! Must not: compute statistics.

pub mod csv;
pub mod parts;
pub mod text;

pub use csv::{draws_csv, run_draws_csv};
pub use text::{check_text, compare_text, run_text};
